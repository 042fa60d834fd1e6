"""Import cycles among convwitness modules, counting module-level imports and the
imports inside functions alike.

    python scripts/import_cycles.py [REPO]     # prints the cycles; exit 1 when there are any
"""
import ast
import os
import sys

root = sys.argv[1] if len(sys.argv) > 1 else os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
pkgmap = {"conformance": "convwitness", "adapters": "convwitness.adapters"}
mods = {}
for base, pkg in pkgmap.items():
    for dp, _, fs in os.walk(os.path.join(root, base)):
        for f in fs:
            if f.endswith(".py"):
                rel = os.path.relpath(os.path.join(dp, f), os.path.join(root, base))[:-3].replace(os.sep, ".")
                name = pkg + ("" if rel == "__init__" else "." + rel.removesuffix(".__init__"))
                mods[name] = os.path.join(dp, f)
def resolve(mod, node, toplevel_only):
    out = set()
    is_pkg = mods[mod].endswith("__init__.py")
    for n in ast.walk(node):
        if isinstance(n, ast.ImportFrom):
            if n.level:
                parts = mod.split(".")
                base = parts if is_pkg else parts[:-1]
                base = base[:len(base) - (n.level - 1)]
                target = ".".join(base + ([n.module] if n.module else []))
            else:
                target = n.module or ""
            for a in n.names:
                cand = target + "." + a.name
                out.add(cand if cand in mods else target)
        elif isinstance(n, ast.Import):
            for a in n.names:
                out.add(a.name)
    return {t for t in out if t in mods and t != mod}
def graph(toplevel):
    g = {}
    for m, p in mods.items():
        tree = ast.parse(open(p).read())
        if toplevel:
            body = ast.Module(body=[s for s in tree.body if isinstance(s, (ast.Import, ast.ImportFrom))], type_ignores=[])
            g[m] = resolve(m, body, True)
        else:
            g[m] = resolve(m, tree, False)
    return g
def cycles(g):
    idx, low, st, on, res, c = {}, {}, [], set(), [], [0]
    sys.setrecursionlimit(10000)
    def sc(v):
        idx[v] = low[v] = c[0]; c[0] += 1; st.append(v); on.add(v)
        for w in g[v]:
            if w not in idx: sc(w); low[v] = min(low[v], low[w])
            elif w in on: low[v] = min(low[v], idx[w])
        if low[v] == idx[v]:
            comp = []
            while True:
                w = st.pop(); on.discard(w); comp.append(w)
                if w == v: break
            if len(comp) > 1: res.append(sorted(comp))
    for v in g:
        if v not in idx: sc(v)
    return res
found = 0
for label, top in (("module-level imports", True), ("all imports", False)):
    cs = cycles(graph(top))
    found += len(cs)
    print(f"{label}: {len(cs)} cycle(s)" + "".join(f"\n  {' <-> '.join(c)}" for c in cs))
sys.exit(1 if found else 0)
