"""Terminal output: progress lines while a run goes, and the summary table at its end."""
from __future__ import annotations

import sys

__all__ = ["Progress", "summary_table"]

_MARK = {"pass": "pass", "fail": "FAIL", "error": "ERROR", "crash": "CRASH", "timeout": "TIMEOUT",
         "not-applicable": "n/a", "unavailable": "unavailable"}


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
            verdict = _MARK.get(r.verdict, r.verdict) + (" (info)" if r.informational and r.verdict == "fail" else "")
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


def _share(v) -> str:
    if v is None:
        return "-"
    if v == "inf":
        return "inf"
    return f"{v:.3g}"


def summary_table(doc: dict) -> str:
    rows = [("invariant", "verdict", "examples", "worst share", "ex/s")]
    for r in doc["invariants"]:
        v = _MARK.get(r["verdict"], r["verdict"])
        if r["informational"] and r["verdict"] == "fail":
            v += " (info)"
        rows.append((r["id"], v, str(r["examples"]), _share(r["worst_share"]),
                     f"{r['examples_per_s']:.0f}"))
    widths = [max(len(row[i]) for row in rows) for i in range(len(rows[0]))]
    lines = ["  ".join(c.ljust(w) for c, w in zip(row, widths)) for row in rows]
    lines.insert(1, "  ".join("-" * w for w in widths))
    s = doc["summary"]
    verdict = "CONFORMANT" if doc["conformant"] else "NOT CONFORMANT"
    lines.append("")
    lines.append(f"{doc['adapter']['name']} {doc['adapter']['version']}: {verdict} — "
                 + ", ".join(f"{n} {k}" for k, n in s.items() if n)
                 + f" in {doc['duration_s']:.1f}s (profile {doc['profile']['name']}, seed {doc['seed']})")
    for r in doc["invariants"]:
        if r["verdict"] in ("fail", "error", "crash", "timeout") and r.get("witness"):
            w = r["witness"]
            lines.append(f"  {r['id']}: {r['message'].splitlines()[0] if r['message'] else r['verdict']}")
            lines.append(f"    minimal: {w['geometry']} ({w['kind']})")
            if w.get("replay"):
                lines.append(f"    replay:  {w['replay']}")
            for k, extra in enumerate(r.get("further_causes") or (), start=2):
                fw = extra["witness"]
                lines.append(f"    cause {k}: {extra['message'].splitlines()[0] if extra['message'] else extra['verdict']}")
                lines.append(f"      minimal: {fw['geometry']} ({fw['kind']})")
                if fw.get("replay"):
                    lines.append(f"      replay:  {fw['replay']}")
    return "\n".join(lines)
