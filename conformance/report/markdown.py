"""``summary.md``: a short summary of a report, sized for a pull-request comment.

The verdict and counts on top, then a table of what went wrong (each with its
minimal geometry and replay command), then every invariant folded away in a
``<details>`` block. Strings from the report are escaped so that an adapter's name
or message cannot inject markup or break a table.
"""
from __future__ import annotations

import re

from .verdicts import judge, label, worst_text
from .reach import markdown_lines as reach_lines, shapes_text

__all__ = ["render", "md_text", "md_code"]

_SPECIAL = re.compile(r"([\\`*_\[\]|~])")
_MARK = {"CONFORMANT": "✅", "NOT CONFORMANT": "❌", "PARTIAL": "⏸", "INTERNAL ERROR": "⚠️",
         "NOTHING CERTIFIED": "⭕"}


def md_text(value) -> str:
    """Plain text safe inside Markdown (and a table cell): HTML escaped, specials backslashed."""
    s = str(value).replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;")
    s = _SPECIAL.sub(r"\\\1", s)
    return " ".join(s.split())


def md_code(value) -> str:
    """An inline code span that holds ``value`` whatever backticks it contains."""
    s = " ".join(str(value).split()).replace("|", "\\|")
    runs = [len(m) for m in re.findall(r"`+", s)]
    fence = "`" * (max(runs) + 1 if runs else 1)
    pad = " " if s.startswith("`") or s.endswith("`") else ""
    return f"{fence}{pad}{s}{pad}{fence}"


def _block(value) -> str:
    s = str(value)
    runs = [len(m) for m in re.findall(r"`{3,}", s)]
    fence = "`" * (max(runs) + 1 if runs else 3)
    return f"{fence}text\n{s}\n{fence}"


def render(doc: dict, report_dir: str | None = None) -> str:
    a = doc["adapter"]
    j = judge(doc)
    lines = [f"### {_MARK.get(j.headline, '')} convwitness: {j.headline} — {md_text(a['name'])} {md_text(a['version'])}",
             "",
             f"**{md_text(j.line(doc))}**",
             "",
             f"{len(doc['invariants'])} invariants · {doc['duration_s']:.1f} s"
             + (f" · {md_text(shapes_text(doc))}" if shapes_text(doc) else "")
             + (f" · status {doc['status']}" + (f" (shard {md_text(doc['shard'])})" if doc.get("shard") else "")
                if doc["status"] != "complete" else ""),
             ""]
    if j.not_applicable:
        lines += ["<details><summary>Not applicable "
                  f"({len(j.not_applicable)})</summary>", ""]
        lines += [f"- {md_code(i)}: {md_text(why)}" for i, why in j.not_applicable]
        lines += ["", "</details>", ""]
    skips = [(i, n, why) for i, (n, why) in j.skipped.items() if i not in dict(j.not_applicable)]
    if skips:
        lines += [f"<details><summary>Skipped examples, not counted ({len(skips)} invariants)</summary>", ""]
        lines += [f"- {md_code(i)}: {n}, commonest reason: {md_text(why)}" for i, n, why in skips]
        lines += ["", "</details>", ""]
    bad = [r for r in doc["invariants"] if r["id"] in j.blocking or r["id"] in j.info]
    if bad:
        lines += ["| invariant | verdict | worst share | minimal case |", "|---|---|---|---|"]
        for r in bad:
            w = r["witness"]
            case = f"{md_code(w['geometry'])} ({md_text(w['kind'])})" if w else "–"
            lines.append(f"| {md_code(r['id'])} | {md_text(label(r))} | {worst_text(r)} | {case} |")
        lines.append("")
        for r in bad:
            if not r["message"] and not r["witness"]:
                continue
            lines.append(f"<details><summary>{md_text(r['id'])}: {md_text(label(r))}</summary>")
            lines.append("")
            if r["message"]:
                lines += [_block(r["message"]), ""]
            if r["witness"] and r["witness"].get("replay"):
                lines += ["Replay:", "", _block(r["witness"]["replay"]), ""]
            for k, extra in enumerate(r.get("further_causes") or (), start=2):
                fw = extra["witness"]
                lines += [f"Cause {k} (searched with the earlier causes' regions excluded): "
                          f"{md_text(fw.get('geometry', ''))}", "", _block(extra["message"]), ""]
                if fw.get("replay"):
                    lines += [_block(fw["replay"]), ""]
            lines += ["</details>", ""]
    else:
        lines += ["Every applicable invariant passed." if j.conformant else
                  "No invariant failed, but the run does not certify the adapter (see the verdict line).", ""]
    causes = doc.get("causes") or []
    if causes:
        lines += ["## Causes", "",
                  "Failures grouped by cause (the same signature: verdict kind plus the geometry "
                  "features of the minimal case, or a replayed witness that came back).", "",
                  "| verdict | invariants | signature | witness |", "|---|---|---|---|"]
        for c in causes:
            lines.append(f"| {md_text(c['verdict'])} | {md_text(', '.join(c['invariants']))} | "
                         f"{md_text(c['signature'].partition(': ')[2])} | "
                         f"{md_code(c['witness']) if c['witness'] else ''} |")
        lines.append("")
    lines += reach_lines(doc)
    lines += ["<details><summary>All invariants</summary>", "",
              "| invariant | verdict | examples | skipped | worst share | examples/s |",
              "|---|---|---:|---:|---:|---:|"]
    for r in doc["invariants"]:
        lines.append(f"| {md_code(r['id'])} | {md_text(label(r))} | {r['examples']} | {r.get('skipped', 0)} | "
                     f"{worst_text(r)} | {r['examples_per_s']:.0f} |")
    lines += ["", "</details>", "",
              f"<sub>convwitness {md_text(doc['tool']['version'])} · adapter {md_code(a['source'])} · "
              "full report in report.html</sub>", ""]
    return "\n".join(lines)
