"""``report.html``: one self-contained page for people.

Inline CSS and inline SVG only: no script, no network, no external font. A
Content-Security-Policy meta tag forbids scripts and remote loads as a second
line of defence; the first is that every string taken from the report (which holds
what adapters and libraries said) goes through :func:`html.escape`.

Layout: the verdict at a glance; the failures with links; a table of every
invariant; the coverage of geometry features; one section per invariant with its
statement, property, examples, time, rate and a chart of the share of the bound
used per example; inside a failing section its witness (geometry, the arrays when
small, the failure anatomy and the replay command); the environment last.
"""
from __future__ import annotations

import html as _html
import math
import os

from .outputs import FAILING, headline, is_failure, label, share_text
from .verdicts import judge, word, worst_text
from .reach import shapes_text

__all__ = ["render"]

PRINT_LIMIT = 64          # arrays up to this many elements are printed in full
_COVERAGE_ORDER = ("ndim", "dtype", "layout", "stride", "dilation", "groups", "padding",
                   "remainder", "batch", "bias", "transposed", "kind")
_CLAIMED = {"ndim": "ndims", "dtype": "dtypes", "layout": "layouts"}


def esc(value) -> str:
    return _html.escape(str(value), quote=True)


_CSS = """
:root{--ink:#1d2433;--mute:#5b6475;--line:#d9dde5;--bg:#f5f6f8;--card:#fff;
--ok:#1b7f5a;--bad:#b42318;--info:#a15c07;--na:#7a8290;--acc:#2f5d9e;--int:#6b3fa0}
*{box-sizing:border-box}
body{margin:0;background:var(--bg);color:var(--ink);
font:15px/1.5 system-ui,-apple-system,"Segoe UI",Roboto,"DejaVu Sans",sans-serif}
code,pre,.mono{font-family:ui-monospace,"SFMono-Regular","DejaVu Sans Mono",Menlo,monospace;font-size:13px}
pre{background:#f0f2f5;border:1px solid var(--line);border-radius:6px;padding:10px 12px;
overflow-x:auto;white-space:pre-wrap;word-break:break-word;margin:6px 0 12px}
a{color:var(--acc)}
header.top{padding:28px 40px 22px;color:#fff;background:#273043}
header.top.v-ok{border-top:8px solid var(--ok)} header.top.v-bad{border-top:8px solid var(--bad)}
header.top.v-part{border-top:8px solid var(--info)}
.verdict{display:inline-block;font-weight:700;font-size:26px;letter-spacing:.06em;
padding:4px 16px;border-radius:6px;margin-bottom:10px}
.v-ok .verdict{background:var(--ok)} .v-bad .verdict{background:var(--bad)}
.v-part .verdict{background:var(--na)} .v-internal .verdict{background:var(--int)}
header h1{margin:4px 0 2px;font-size:22px;font-weight:600}
header h1 .ver{font-weight:400;color:#c4cad6;margin-left:8px}
header p{margin:0;color:#c4cad6} header code{color:#fff}
dl.meta{display:flex;flex-wrap:wrap;gap:6px 28px;margin:14px 0 0}
dl.meta div{display:flex;gap:6px} dl.meta dt{color:#9aa3b5} dl.meta dd{margin:0}
ul.counts{list-style:none;display:flex;flex-wrap:wrap;gap:8px;padding:0;margin:16px 0 0}
.chip{display:inline-block;border-radius:999px;padding:1px 10px;font-size:13px;font-weight:600;
background:#e7eaf0;color:var(--ink);white-space:nowrap}
.chip.pass{background:#dcf1e7;color:var(--ok)} .chip.fail,.chip.error,.chip.crash,.chip.timeout{background:#fbe3e1;color:var(--bad)}
.chip.info{background:#fcefd9;color:var(--info)} .chip.internal{background:#ece3f7;color:var(--int)} .chip.na{background:#eceef2;color:var(--na)}
main{max-width:1120px;margin:0 auto;padding:8px 24px 40px}
section{background:var(--card);border:1px solid var(--line);border-radius:10px;padding:18px 22px;margin:18px 0}
section.inv.bad{border-left:6px solid var(--bad)} section.inv.ok{border-left:6px solid var(--ok)}
section.inv.info{border-left:6px solid var(--info)} section.inv.internal{border-left:6px solid var(--int)} section.inv.na{border-left:6px solid var(--na)}
h2{font-size:18px;margin:0 0 10px} h3{font-size:16px;margin:0} h4{font-size:14px;margin:16px 0 4px;color:var(--mute);
text-transform:uppercase;letter-spacing:.05em}
.head{display:flex;gap:12px;align-items:center;flex-wrap:wrap}
.stmt{margin:6px 0 4px}
table{border-collapse:collapse;width:100%} th,td{text-align:left;padding:5px 8px;border-bottom:1px solid var(--line);vertical-align:top}
th{font-size:12px;color:var(--mute);text-transform:uppercase;letter-spacing:.04em}
td.num,th.num{text-align:right;font-variant-numeric:tabular-nums}
.facts{display:flex;flex-wrap:wrap;gap:4px 26px;margin:8px 0;color:var(--mute)} .facts b{color:var(--ink);font-weight:600}
.witness{background:#fdf6f5;border:1px solid #f1cfcb;border-radius:8px;padding:4px 16px 10px;margin-top:14px}
.arrays{display:grid;grid-template-columns:repeat(auto-fill,minmax(300px,1fr));gap:0 16px}
.arrays figure{margin:0} figcaption{font-size:13px;color:var(--mute)}
pre.cmd{background:#1f2533;color:#e8ecf3;border-color:#1f2533}
.grid{display:grid;align-items:start;grid-template-columns:repeat(auto-fill,minmax(290px,1fr));gap:14px}
.card{border:1px solid var(--line);border-radius:8px;padding:8px 10px}
.card h3{font-size:13px;color:var(--mute);text-transform:uppercase;letter-spacing:.05em;margin-bottom:4px}
ul.fails{margin:0;padding-left:20px} ul.fails li{margin:4px 0}
svg{display:block;max-width:100%;height:auto} svg text{font-family:system-ui,"DejaVu Sans",sans-serif}
.note{color:var(--mute);font-size:13px}
footer{max-width:1120px;margin:0 auto 30px;padding:0 24px;color:var(--mute);font-size:13px}
"""


def _chip(r: dict) -> str:
    v = word(r)
    cls = "na" if v in ("not-applicable", "unavailable") else v
    return f'<span class="chip {esc(cls)}">{esc(label(r))}</span>'


def _state(r: dict) -> str:
    v = word(r)
    if is_failure(r):
        return "bad"
    if v in ("info", "internal"):
        return v
    return "ok" if v == "pass" else "na"


def _anchor(r: dict) -> str:
    return "inv-" + "".join(c if c.isalnum() or c in "-_." else "_" for c in r["id"])


def _num(v) -> float:
    return math.inf if v == "inf" else float(v)


# -- charts ----------------------------------------------------------------------------
def share_chart(shares: list, width: int = 1000, height: int = 160) -> str:
    """Bars of the share of the bound used per example; the bound (1) is a dashed line."""
    if not shares:
        return '<p class="note">No example ran, so there is nothing to chart.</p>'
    values = [math.inf if _num(s) >= 1e300 else _num(s) for s in shares]
    top = 1.25
    left, right, up, down = 46, 50, 16, 26
    pw, ph = width - left - right, height - up - down
    y = lambda v: up + ph - min(v, top) / top * ph  # noqa: E731
    n = len(values)
    bw = pw / n
    parts = [f'<svg viewBox="0 0 {width} {height}" width="{width}" height="{height}" role="img" '
             f'aria-label="share of the bound used per example">']
    for tick in (0, 0.5, 1.0):
        ty = y(tick)
        dash = ' stroke-dasharray="5 3" stroke="#b42318"' if tick == 1.0 else ' stroke="#d9dde5"'
        parts.append(f'<line x1="{left}" x2="{left + pw}" y1="{ty:.1f}" y2="{ty:.1f}"{dash}/>')
        parts.append(f'<text x="{left - 6}" y="{ty + 4:.1f}" font-size="11" text-anchor="end" '
                     f'fill="#5b6475">{tick:g}</text>')
    parts.append(f'<text x="{left + pw + 6}" y="{y(1.0) + 4:.1f}" font-size="11" fill="#b42318">bound</text>')
    for i, v in enumerate(values):
        h = max(y(0) - y(v), 1.5 if v > 0 else 0.0)
        if h <= 0:
            continue
        color = "#b42318" if v > 1.0 else "#2f5d9e"
        parts.append(f'<rect x="{left + i * bw + bw * 0.12:.2f}" y="{y(0) - h:.2f}" '
                     f'width="{max(bw * 0.76, 0.6):.2f}" height="{h:.2f}" fill="{color}"/>')
        if v > top:
            parts.append(f'<text x="{left + (i + 0.5) * bw:.1f}" y="{up - 3}" font-size="8" '
                         f'text-anchor="middle" fill="#b42318">&#9650;</text>')
    worst = max(values)
    if worst == 0:
        note = "every example exact: share 0 throughout"
    else:
        note = f"worst {share_text('inf' if worst == math.inf else worst)}"
        if worst > top:
            note += " · bars above 1.25 are cut and marked ▲"
    parts.append(f'<text x="{left}" y="{height - 8}" font-size="11" fill="#5b6475">1</text>')
    parts.append(f'<text x="{left + pw}" y="{height - 8}" font-size="11" text-anchor="end" '
                 f'fill="#5b6475">{n}</text>')
    parts.append(f'<text x="{left + pw / 2}" y="{height - 8}" font-size="11" text-anchor="middle" '
                 f'fill="#5b6475">example, in the order drawn · {esc(note)}</text>')
    parts.append("</svg>")
    return "".join(parts)


def _feature_chart(feature: str, counts: dict, claimed: list) -> str:
    rows = sorted(counts.items(), key=lambda kv: (-kv[1], kv[0]))
    rows += [(str(c), 0) for c in claimed if str(c) not in counts]
    most = max([n for _, n in rows] + [1])
    lw, bw, rh = 150, 80, 18
    width, height = lw + bw + 40, rh * len(rows) + 4
    parts = [f'<svg viewBox="0 0 {width} {height}" width="{width}" height="{height}" role="img" '
             f'aria-label="coverage of {esc(feature)}">']
    for i, (value, n) in enumerate(rows):
        ty = i * rh + 13
        text = value if len(value) <= 24 else value[:23] + "…"
        parts.append(f'<text x="{lw - 6}" y="{ty}" font-size="11" text-anchor="end" fill="#1d2433">'
                     f'<title>{esc(value)}</title>{esc(text)}</text>')
        if n:
            parts.append(f'<rect x="{lw}" y="{ty - 10}" width="{max(bw * n / most, 1.5):.1f}" height="12" '
                         'rx="2" fill="#2f5d9e"/>')
            parts.append(f'<text x="{lw + bw * n / most + 4:.1f}" y="{ty}" font-size="11" fill="#5b6475">{n}</text>')
        else:
            parts.append(f'<text x="{lw}" y="{ty}" font-size="11" fill="#a15c07">claimed, not drawn</text>')
    parts.append("</svg>")
    return f'<div class="card"><h3>{esc(feature)}</h3>{"".join(parts)}</div>'


def coverage_chart(doc: dict) -> str:
    cov = doc.get("coverage") or {}
    if not cov:
        return '<p class="note">No geometry was drawn in this run.</p>'
    caps = doc["adapter"].get("capabilities") or {}
    names = [f for f in _COVERAGE_ORDER if f in cov] + sorted(set(cov) - set(_COVERAGE_ORDER))
    cards = [_feature_chart(f, cov[f], caps.get(_CLAIMED.get(f, ""), []) or []) for f in names]
    return ('<p class="note">How often each geometry feature was drawn, over all invariants '
            '(value kinds count examples, the others geometries).</p>'
            f'<div class="grid">{"".join(cards)}</div>')


# -- witnesses -------------------------------------------------------------------------
def _array_text(a) -> str:
    import numpy as np
    native = a.dtype in (np.float16, np.float32, np.float64)
    shown = a if native else a.astype(np.float64)      # bfloat16, float8: print their values
    if a.size <= PRINT_LIMIT:
        # every digit needed to give back the stored value (numpy's floatmode "unique"):
        # a witness's values are what reproduces its failure
        with np.printoptions(threshold=PRINT_LIMIT + 1, linewidth=72, floatmode="unique"):
            return np.array2string(shown, separator=", ")
    flat = np.asarray(shown, dtype=np.float64).ravel()
    head = ", ".join(f"{v:.6g}" for v in flat[:8])
    finite = flat[np.isfinite(flat)]
    rng = f"min {finite.min():.6g}, max {finite.max():.6g}" if finite.size else "no finite values"
    return f"{a.size} elements (too many to print): {rng}\nfirst values: {head}, …"


def witness_arrays(w: dict, report_dir: str | None, passes) -> str:
    """The witness arrays, read from the .npz beside the report when it is there."""
    if not report_dir or not w.get("path"):
        return '<p class="note">The witness files were not saved with this report.</p>'
    path = os.path.join(report_dir, w["path"])
    if not os.path.isfile(path):
        return (f'<p class="note">The witness file {esc(w["path"])} is not beside this report, '
                'so its arrays cannot be shown.</p>')
    from ..cases.case import load_case
    from ..errors import CaseFileError
    try:
        case, _meta = load_case(path)
    except CaseFileError as exc:
        return f'<p class="note">The witness could not be read: {esc(exc)}</p>'
    names = ["x", "w", "b"] + (["grad_y"] if "backward" in passes else [])
    figs = []
    for name in names:
        a = getattr(case, name)
        if a is None:
            continue
        figs.append(f'<figure><figcaption><b>{esc(name)}</b> · shape {esc(tuple(a.shape))} · '
                    f'{esc(case.spec.dtype)}</figcaption><pre>{esc(_array_text(a))}</pre></figure>')
    return f'<div class="arrays">{"".join(figs)}</div>'


def _witness(r: dict, report_dir: str | None) -> str:
    w = r["witness"]
    out = ['<div class="witness"><h4>Minimal counterexample (witness)</h4>',
           f'<div class="facts"><span>geometry <b class="mono">{esc(w["geometry"])}</b></span>'
           f'<span>value kind <b>{esc(w["kind"])}</b></span>']
    if w.get("path"):
        out.append(f'<span>files <b class="mono">{esc(w["path"])}</b>, '
                   f'<b class="mono">{esc(w.get("arrays", ""))}</b></span>')
    out.append("</div>")
    if r["message"]:
        out.append(f'<h4>Anatomy of the failure</h4><pre>{esc(r["message"])}</pre>')
    out.append("<h4>Arrays</h4>" + witness_arrays(w, report_dir, r["passes"]))
    if w.get("replay"):
        out.append(f'<h4>Replay</h4><pre class="cmd">{esc(w["replay"])}</pre>')
    out.append("</div>")
    return "".join(out)


def _invariant(r: dict, report_dir: str | None) -> str:
    facts = [("passes", ", ".join(r["passes"])), ("examples", r["examples"]),
             ("geometries", r["geometries"]), ("time", f'{r["duration_s"]:.2f} s'),
             ("examples/s", f'{r["examples_per_s"]:.0f}'), ("worst share of bound", worst_text(r)),
             ("skipped", r.get("skipped", 0))]
    out = [f'<section class="inv {_state(r)}" id="{esc(_anchor(r))}">',
           f'<div class="head"><h3 class="mono">{esc(r["id"])}</h3>{_chip(r)}</div>',
           f'<p class="stmt">{esc(r["statement"])}</p>',
           '<div class="facts">' + "".join(f"<span>{esc(k)} <b>{esc(v)}</b></span>" for k, v in facts) + "</div>"]
    if r["reason"]:
        out.append(f'<p class="note">{esc(r["reason"])}</p>')
    for s in r.get("skip_reasons") or []:
        out.append(f'<p class="note">skipped {s["examples"]}: {esc(s["reason"])}</p>')
    out.append(f'<h4>Property</h4><pre>{esc(r["property"])}</pre>')
    if word(r) not in ("not-applicable", "unavailable"):
        if r["worst_bound"]:
            out.append(f'<h4>Bound of the worst example</h4><pre>{esc(r["worst_bound"])}</pre>')
        out.append("<h4>Share of the bound used, per example</h4>" + share_chart(r["shares"]))
    if r["witness"]:
        out.append(_witness(r, report_dir))
    elif r["message"]:
        out.append(f'<h4>Message</h4><pre>{esc(r["message"])}</pre>')
    tb = "Traceback of convwitness (a bug in convwitness)" if word(r) == "internal" else "Traceback of the adapter"
    for key, title in (("traceback", tb), ("output", "What the adapter printed")):
        if r[key]:
            out.append(f'<details><summary>{title}</summary><pre>{esc(r[key])}</pre></details>')
    out.append("</section>")
    return "".join(out)


def _when(iso: str) -> str:
    import datetime as _dt
    try:
        t = _dt.datetime.fromisoformat(iso)
    except ValueError:
        return iso
    return t.strftime("%Y-%m-%d %H:%M:%S") + (" UTC" if t.utcoffset() is not None and not t.utcoffset() else "")


def _header(doc: dict) -> str:
    a, j = doc["adapter"], judge(doc)
    head = j.headline
    cls = {"CONFORMANT": "v-ok", "NOT CONFORMANT": "v-bad", "INTERNAL ERROR": "v-internal"}.get(head, "v-part")
    meta = [("profile", doc["profile"].get("name", "?")), ("seed", doc["seed"]),
            ("run time", f'{doc["duration_s"]:.1f} s'), ("started", _when(doc["started"])),
            ("status", doc["status"] + (f' (shard {doc["shard"]})' if doc.get("shard") else "")),
            ("tool", f'{doc["tool"]["name"]} {doc["tool"]["version"]}')]
    chips = "".join(f'<li><span class="chip {"na" if k in ("not-applicable", "unavailable") else k}">'
                    f'{n} {esc(label({"verdict": k}))}</span></li>' for k, n in j.counts.items() if n)
    na = "".join(f"<li><code>{esc(i)}</code>: {esc(why)}</li>" for i, why in j.not_applicable)
    return (f'<header class="top {cls}"><div class="verdict">{esc(head)}</div>'
            f'<h1>{esc(a["name"])}<span class="ver">{esc(a["version"])}</span></h1>'
            f'<p class="line" id="verdict-line">{esc(j.line(doc))}</p>'
            f'<p>adapter <code>{esc(a["source"])}</code></p><dl class="meta">'
            + "".join(f"<div><dt>{esc(k)}</dt><dd>{esc(v)}</dd></div>" for k, v in meta)
            + f'</dl><ul class="counts">{chips}</ul>'
            + (f'<details class="na"><summary>not applicable ({len(j.not_applicable)})</summary>'
               f'<ul>{na}</ul></details>' if na else "") + '</header>')


def _failures(doc: dict) -> str:
    bad = [r for r in doc["invariants"] if word(r) in FAILING + ("internal", "info")]
    if not bad:
        return ""
    items = []
    for r in bad:
        geo = (f'<br><span class="note">minimal case</span> <span class="mono">'
               f'{esc(r["witness"]["geometry"])}</span> <span class="note">({esc(r["witness"]["kind"])})</span>'
               if r["witness"] else "")
        items.append(f'<li><a class="mono" href="#{esc(_anchor(r))}">{esc(r["id"])}</a> {_chip(r)} '
                     f'{esc(r["statement"])}{geo}</li>')
    return f'<section id="failures"><h2>Failures</h2><ul class="fails">{"".join(items)}</ul></section>'


def _not_applicable(doc: dict) -> str:
    rows = [r for r in doc["invariants"] if word(r) in ("not-applicable", "unavailable")]
    if not rows:
        return ""
    body = "".join(f'<tr id="{esc(_anchor(r))}"><td class="mono">{esc(r["id"])}</td><td>{_chip(r)}</td>'
                   f'<td>{esc(r["statement"])}<br><span class="note">{esc(r["reason"])}</span></td></tr>'
                   for r in rows)
    return ('<section id="not-applicable" class="inv na"><h2>Not checked on this adapter</h2>'
            '<table><thead><tr><th>invariant</th><th>verdict</th><th>property and reason</th></tr>'
            f'</thead><tbody>{body}</tbody></table></section>')


def _overview(doc: dict) -> str:
    rows = []
    skipped = [r for r in doc["invariants"] if word(r) in ("not-applicable", "unavailable")]
    for r in doc["invariants"]:
        if r in skipped:
            continue
        cells = (r["examples"], r.get("skipped", 0), worst_text(r), f'{r["duration_s"]:.2f} s',
                 f'{r["examples_per_s"]:.0f}')
        rows.append(f'<tr><td><a class="mono" href="#{esc(_anchor(r))}">{esc(r["id"])}</a></td>'
                    f'<td>{_chip(r)}</td>' + "".join(f'<td class="num">{esc(c)}</td>' for c in cells) + "</tr>")
    note = (f'<p class="note">{len(skipped)} more invariant(s) were not checked on this adapter: '
            '<a href="#not-applicable">see why</a>.</p>' if skipped else "")
    return ('<section id="overview"><h2>Invariants</h2><table><thead><tr><th>invariant</th>'
            '<th>verdict</th><th class="num">examples</th><th class="num">skipped</th>'
            '<th class="num">worst share</th>'
            '<th class="num">time</th><th class="num">examples/s</th></tr></thead><tbody>'
            + "".join(rows) + f"</tbody></table>{note}</section>")


def _cluster(env: dict) -> str:
    c = env.get("cluster")
    return (f'; invariants run as tasks on the Dask cluster <span class="mono">{esc(c["address"])}</span> '
            f'({int(c["workers"])} worker(s) at the start)') if c else ""


def _environment(doc: dict) -> str:
    env, caps = doc["environment"], doc["adapter"].get("capabilities") or {}
    libs = "".join(f"<tr><td>{esc(k)}</td><td class='mono'>{esc(v)}</td></tr>"
                   for k, v in env["libraries"].items())
    claims = "".join(f"<tr><td>{esc(k)}</td><td class='mono'>{esc(v)}</td></tr>"
                     for k, v in caps.items() if k not in ("error_models",))
    return (f'<section id="environment"><h2>Environment and claims</h2>'
            f'<p>Python {esc(env["python"])} on {esc(env["platform"])}{_cluster(env)}</p><div class="grid">'
            f'<div><h4>Libraries</h4><table>{libs}</table></div>'
            f'<div><h4>Capabilities claimed</h4><table>{claims}</table></div></div></section>')


def render(doc: dict, report_dir: str | None = None) -> str:
    """The HTML page of a report document (``report_dir`` locates the witness files)."""
    a = doc["adapter"]
    title = f'convwitness · {a["name"]} {a["version"]} · {headline(doc)}'
    body = [_header(doc), "<main>", _failures(doc), _overview(doc),
            '<section id="coverage"><h2>Coverage of geometry features</h2>', coverage_chart(doc),
            f"<p>{esc(shapes_text(doc))}</p>" if shapes_text(doc) else "", "</section>"]
    body += [_invariant(r, report_dir) for r in doc["invariants"]
             if word(r) not in ("not-applicable", "unavailable")]
    body += [_not_applicable(doc), _environment(doc), "</main>",
             f'<footer>Written by convwitness {esc(doc["tool"]["version"])} from report.json '
             f'({esc(doc["format"])}). A passing report is evidence for the geometries drawn, '
             'not a proof for all of them.</footer>']
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            "<meta http-equiv=\"Content-Security-Policy\" content=\"default-src 'none'; "
            "style-src 'unsafe-inline'; img-src data:\">"
            "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">"
            f"<title>{esc(title)}</title><style>{_CSS}</style></head>\n<body>"
            + "\n".join(b for b in body if b) + "</body></html>\n")
