"""The exit code of a finished command, from its report (report/verdicts.py judge)."""
from __future__ import annotations

__all__ = ["outcome"]


def outcome(doc, stderr, done: int | None = None) -> int:
    """The exit code of a report (report/verdicts.py judge), with one line on stderr for
    the outcomes that need one."""
    from ..report.verdicts import judge
    j = judge(doc)
    if j.outcome == "internal":
        where = sorted({r["message"].rsplit("traceback saved to ", 1)[-1].rstrip(")")
                        for r in doc["invariants"] if r["id"] in j.internal and "traceback saved to" in r["message"]})
        print(f"convwitness: internal error in {', '.join(j.internal)} (a bug in convwitness, not in "
              f"the adapter); traceback saved to {', '.join(where) or 'the report'}", file=stderr)
    elif j.outcome == "nothing-certified":
        print("convwitness: nothing certified: no applicable invariant was checked "
              f"({len(j.not_applicable)} not applicable, reasons above)", file=stderr)
    elif j.outcome == "partial" and not doc.get("shard") and done is not None:
        print(f"convwitness: interrupted after {done} invariant(s); the partial report "
              "is written (status partial)", file=stderr)
    return j.exit_code
