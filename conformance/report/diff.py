"""``convwitness diff OLD.json NEW.json``: what changed between two reports.

For nightly regression jobs. Each invariant is put in one state per report:
absent, ``na`` (not applicable / unavailable), ``pass``, ``fail`` (a result that
keeps the run from certifying: fail, error, crash, timeout or internal) or ``info`` (a
deviation that is information only); the verdict words come from report/verdicts.py. The transitions sort into:

* **newly failing** — pass, info, na or absent before, fail now (a regression);
* **fixed** — fail before, pass (or information only) now;
* **still failing** — fail in both; matched by :func:`fingerprint` (the invariant
  and the shape of the minimal geometry, never the message text, whose numbers move),
  so a still-failing invariant whose minimal case changed shape is shown as such;
* **newly applicable** — na or absent before, checked now;
* **no longer checked** — checked before, not applicable or absent now (a regression:
  the certified scope shrank);
* **accuracy drift** — passing in both, but the worst share of the bound grew by more
  than ``drift`` (absolute, on the 0-1 scale of the bound; a regression even though it
  still passes);
* information only — changes among informational failures (never a regression);

plus coverage values that appeared or disappeared, and changed library, adapter,
tool, profile and seed identities. ``regressed`` is true when any regression class is
non-empty; the command exits 1 then, else 0.
"""
from __future__ import annotations

import hashlib
import json
import math

from ..geometry.spec import ConvSpec
from ..cases.features import feature_of
from .outputs import FAILING, share_text
from .verdicts import judge, word

__all__ = ["DIFF_FORMAT", "diff_reports", "fingerprint", "render", "REGRESSIONS"]

DIFF_FORMAT = "convwitness-diff/1"
REGRESSIONS = ("newly_failing", "no_longer_checked", "drift")


def _state(r: dict | None) -> str:
    """The state of one result, from its verdict word (report/verdicts.py)."""
    if r is None:
        return "absent"
    w = word(r)
    if w in ("not-applicable", "unavailable"):
        return "na"
    if w in FAILING or w == "internal":
        return "fail"
    return "info" if w == "info" else "pass"


def geometry_shape(spec: dict) -> dict:
    """The shape of a geometry: its structural features, without its sizes or values."""
    return feature_of(ConvSpec.from_dict(spec))


def fingerprint(r: dict) -> str:
    """A stable name of a failure: invariant id + the shape of its minimal geometry.

    ``forward.group_split@1d/float64/channels_first/grouped/...#3f2a9c01d4``: the readable
    part lists the features, the hash makes it compact and order-independent.
    """
    w = r.get("witness")
    if not w:
        return f"{r['id']}@no-witness/{r['verdict']}"
    shape = geometry_shape(w["spec"])
    digest = hashlib.sha1(json.dumps(shape, sort_keys=True).encode()).hexdigest()[:10]
    keys = ("ndim", "transposed", "dtype", "layout", "groups", "stride", "dilation", "padding",
            "remainder", "batch", "bias")
    return f"{r['id']}@" + "/".join(str(shape[k]) for k in keys if k in shape) + f"#{digest}"


def _num(v) -> float:
    return math.inf if v == "inf" else float(v or 0.0)


def _entry(i: str, o: dict | None, n: dict | None, **extra) -> dict:
    d = {"id": i, "old": o["verdict"] if o else None, "new": n["verdict"] if n else None}
    for side, r in (("old", o), ("new", n)):
        if r is not None and word(r) in FAILING + ("internal", "info"):
            d[f"{side}_fingerprint"] = fingerprint(r)
            if r.get("witness"):
                d[f"{side}_geometry"] = r["witness"]["geometry"]
    d.update(extra)
    return d


def _coverage(old: dict, new: dict) -> dict:
    def flat(doc):
        return {f"{f}={v}" for f, vals in (doc.get("coverage") or {}).items() for v, c in vals.items() if c}
    a, b = flat(old), flat(new)
    return {"appeared": sorted(b - a), "disappeared": sorted(a - b)}


def _mapping_changes(a: dict, b: dict) -> list[dict]:
    return [{"name": k, "old": a.get(k), "new": b.get(k)}
            for k in sorted(set(a) | set(b), key=str) if a.get(k) != b.get(k)]


def diff_reports(old: dict, new: dict, *, drift: float = 0.25) -> dict:
    """The difference of two report documents (the JSON form ``--format json`` prints)."""
    olds = {r["id"]: r for r in old["invariants"]}
    news = {r["id"]: r for r in new["invariants"]}
    ids = list(olds) + [i for i in news if i not in olds]
    out = {k: [] for k in ("newly_failing", "fixed", "still_failing", "newly_applicable",
                           "no_longer_checked", "drift", "information_only")}
    for i in ids:
        o, n = olds.get(i), news.get(i)
        so, sn = _state(o), _state(n)
        if so in ("absent", "na") and sn not in ("absent", "na"):
            out["newly_applicable"].append(_entry(i, o, n))
        if sn == "fail" and so != "fail":
            out["newly_failing"].append(_entry(i, o, n))
        elif so == "fail" and sn in ("pass", "info"):
            out["fixed"].append(_entry(i, o, n))
        elif so == "fail" and sn == "fail":
            e = _entry(i, o, n)
            e["same_failure"] = e["old_fingerprint"] == e["new_fingerprint"]
            out["still_failing"].append(e)
        if so in ("pass", "fail", "info") and sn in ("absent", "na"):
            out["no_longer_checked"].append(_entry(i, o, n, reason=(n or {}).get("reason", "absent from NEW")
                                                   or "absent from NEW"))
        if "info" in (so, sn) and sn != "fail" and so != "fail" and so != sn:
            out["information_only"].append(_entry(i, o, n))
        if so == "pass" and sn == "pass":
            grew = _num(n["worst_share"]) - _num(o["worst_share"])
            if grew > drift:
                out["drift"].append(_entry(i, o, n, old_share=o["worst_share"], new_share=n["worst_share"],
                                           grew="inf" if grew == math.inf else round(grew, 6)))
    ident = {}
    for key, get in (("adapter", lambda d: d["adapter"]["name"]),
                     ("adapter_version", lambda d: d["adapter"]["version"]),
                     ("tool_version", lambda d: d["tool"]["version"]),
                     ("profile", lambda d: d["profile"].get("name")), ("seed", lambda d: d["seed"])):
        if get(old) != get(new):
            ident[key] = {"old": get(old), "new": get(new)}
    return {
        "format": DIFF_FORMAT, "drift_threshold": drift,
        "old": _side(old), "new": _side(new),
        "regressed": any(out[k] for k in REGRESSIONS),
        **out,
        "coverage": _coverage(old, new),
        "libraries": _mapping_changes(old["environment"]["libraries"], new["environment"]["libraries"]),
        "capabilities": _mapping_changes(old["adapter"].get("capabilities") or {},
                                         new["adapter"].get("capabilities") or {}),
        "identity": ident,
    }


def _side(doc: dict) -> dict:
    return {"adapter": doc["adapter"]["name"], "version": doc["adapter"]["version"],
            "profile": doc["profile"].get("name"), "seed": doc["seed"], "started": doc["started"],
            "conformant": judge(doc).conformant, "verdict": judge(doc).headline, "status": doc["status"]}


_TITLES = (("newly_failing", "Newly failing"), ("no_longer_checked", "No longer checked"),
           ("drift", "Accuracy drift"), ("still_failing", "Still failing"), ("fixed", "Fixed"),
           ("newly_applicable", "Newly applicable"), ("information_only", "Information only"))


def _line(key: str, e: dict, code) -> str:
    arrow = f"{e['old'] or 'absent'} -> {e['new'] or 'absent'}"
    if key == "drift":
        return (f"{code(e['id'])}: worst share {share_text(e['old_share'])} -> "
                f"{share_text(e['new_share'])} (+{share_text(e['grew'])})")
    if key == "still_failing":
        same = "same failure" if e["same_failure"] else "minimal case changed shape"
        return f"{code(e['id'])}: {arrow}, {same} ({code(e['new_fingerprint'])})"
    if key == "no_longer_checked":
        return f"{code(e['id'])}: {arrow} ({e['reason']})"
    geo = f", minimal case {code(e['new_geometry'])}" if e.get("new_geometry") and e["new"] in FAILING + ("internal",) else ""
    note = " (information only: the adapter does not claim it)" if key == "information_only" else ""
    return f"{code(e['id'])}: {arrow}{geo}{note}"


def render(d: dict, fmt: str = "text") -> str:
    """The diff as ``text``, ``markdown`` or ``json``."""
    if fmt == "json":
        return json.dumps(d, indent=2) + "\n"
    md = fmt == "markdown"
    if md:
        from .markdown import md_code as code, md_text as text
    else:
        code = text = str  # noqa: E731
    o, n = d["old"], d["new"]
    head = "REGRESSED" if d["regressed"] else "no regression"
    lines = [(f"### convwitness diff: {head}" if md else f"convwitness diff: {head}"),
             "" if md else "",
             f"old: {text(o['adapter'])} {text(o['version'])} ({o['profile']}, seed {o['seed']}, "
             f"{o['verdict'].lower()}, {o['started']})",
             f"new: {text(n['adapter'])} {text(n['version'])} ({n['profile']}, seed {n['seed']}, "
             f"{n['verdict'].lower()}, {n['started']})"]
    if md:
        lines[2:4] = [f"- {lines[2]}", f"- {lines[3]}"]
    for key, title in _TITLES:
        if d[key]:
            lines += ["", (f"**{title}** ({len(d[key])})" if md else f"{title} ({len(d[key])}):")]
            lines += [("- " if md else "  ") + _line(key, e, code) for e in d[key]]
    cov = d["coverage"]
    if cov["appeared"] or cov["disappeared"]:
        lines += ["", "**Coverage**" if md else "Coverage:"]
        for label in ("appeared", "disappeared"):
            if cov[label]:
                lines.append(("- " if md else "  ") + f"{label}: " + ", ".join(code(v) for v in cov[label]))
    for key, title in (("libraries", "Library versions"), ("capabilities", "Capabilities"),):
        if d[key]:
            lines += ["", f"**{title}**" if md else f"{title}:"]
            lines += [("- " if md else "  ") + f"{text(c['name'])}: {code(c['old'])} -> {code(c['new'])}"
                      for c in d[key]]
    if d["identity"]:
        lines += ["", "**Compared runs differ in**" if md else "Compared runs differ in:"]
        lines += [("- " if md else "  ") + f"{k}: {code(v['old'])} -> {code(v['new'])}"
                  for k, v in d["identity"].items()]
    if not any(d[k] for k, _ in _TITLES):
        lines += ["", "No invariant changed its verdict."]
    return "\n".join(lines) + "\n"
