"""Terminal output: progress lines while a run goes, and the summary table at its end."""
from __future__ import annotations

import sys

from .verdicts import judge, word, word_of, worst_text

__all__ = ["Progress", "summary_table"]

_MARK = {"pass": "pass", "fail": "FAIL", "error": "ERROR", "crash": "CRASH", "timeout": "TIMEOUT",
         "internal": "INTERNAL", "info": "info", "not-applicable": "n/a", "unavailable": "unavailable"}


class Progress:
    """One line per invariant; live (rewritten) on a terminal, plain lines otherwise."""

    def __init__(self, stream=None):
        self.stream = stream or sys.stderr
        self.live = hasattr(self.stream, "isatty") and self.stream.isatty()
        self.examples = 0

    def __call__(self, event: str, payload: dict):
        i, total = payload.get("index", 0), payload.get("total", 0)
        if event == "start" and self.live:
            self.stream.write(f"\r[{i + 1}/{total}] {payload['id']} ...\x1b[K")
            self.stream.flush()
        elif event == "done":
            r = payload["result"]
            self.examples += r.examples
            rate = self.examples / payload["elapsed"] if payload["elapsed"] > 0 else 0.0
            w = word_of(r.verdict, r.informational)
            verdict = _MARK.get(w, w)
            line = (f"[{i + 1}/{total}] {r.id:34s} {verdict:12s} {r.examples:4d} ex "
                    f"{r.duration_s:6.2f}s  (total {payload['elapsed']:.1f}s, {rate:.0f} ex/s)")
            self.stream.write(("\r" if self.live else "") + line + ("\x1b[K\n" if self.live else "\n"))
            self.stream.flush()
        elif event == "heartbeat" and not self.live:
            self.stream.write(f"  ... {payload['id']}: {payload['examples']} examples so far, "
                              f"{payload['elapsed_invariant']:.0f} s\n")
            self.stream.flush()
        elif event == "interrupted":
            self.stream.write(f"\ninterrupted ({payload.get('signal', 'SIGINT')}) after {payload['done']} of "
                              f"{payload['total']} invariants; "
                              "writing a partial report\n")
            self.stream.flush()


def summary_table(doc: dict) -> str:
    """The table of every invariant, then the verdict line, the not-applicable invariants
    with their reasons, and each blocking invariant with its minimal case."""
    j = judge(doc)
    rows = [("invariant", "verdict", "examples", "skipped", "worst share", "ex/s")]
    for r in doc["invariants"]:
        w = word(r)
        rows.append((r["id"], _MARK.get(w, w), str(r["examples"]), str(r.get("skipped", 0)),
                     worst_text(r), f"{r['examples_per_s']:.0f}"))
    widths = [max(len(row[i]) for row in rows) for i in range(len(rows[0]))]
    lines = ["  ".join(c.ljust(w) for c, w in zip(row, widths)) for row in rows]
    lines.insert(1, "  ".join("-" * w for w in widths))
    lines.append("")
    lines.append(j.line(doc) + f" in {doc['duration_s']:.1f}s")
    if j.not_applicable:
        lines.append("not applicable:")
        lines += [f"  {text}" for text in j.not_applicable_lines()]
    skips = [f"  {i}: {n}, commonest reason: {why}" for i, (n, why) in j.skipped.items()
             if i not in dict(j.not_applicable)]
    if skips:
        lines += ["skipped examples (not counted as checked):"] + skips
    if j.blocking or j.info:
        lines.append("minimal cases:")
    for r in doc["invariants"]:
        if r["id"] in j.blocking or r["id"] in j.info:
            first = r["message"].splitlines()[0] if r["message"] else r["verdict"]
            lines.append(f"  {r['id']} ({_MARK.get(word(r), word(r))}): {first}")
            w = r.get("witness")
            if w:
                lines.append(f"    minimal: {w['geometry']} ({w['kind']})")
                if w.get("replay"):
                    lines.append(f"    replay:  {w['replay']}")
            for n, extra in enumerate(r.get("further_causes") or (), start=2):
                fw = extra["witness"]
                first = extra["message"].splitlines()[0] if extra["message"] else extra["verdict"]
                lines.append(f"    cause {n}: {first}")
                lines.append(f"      minimal: {fw['geometry']} ({fw['kind']})")
                if fw.get("replay"):
                    lines.append(f"      replay:  {fw['replay']}")
    return "\n".join(lines)
