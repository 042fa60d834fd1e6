"""The run journal: results appended as each invariant finishes, so nothing is lost.

``DIR/journal.jsonl`` starts with one header line (adapter identity and
capabilities, profile, seed, the planned invariants) and gets one line per finished
invariant, flushed and synced to disk at once. A run killed with SIGKILL leaves it
behind; ``convwitness rebuild DIR`` turns it into a valid report (``status:
partial`` when invariants are missing).
"""
from __future__ import annotations

import json
import os
import time
from types import SimpleNamespace

from ..geometry.capabilities import Capabilities
from ..errors import ConvWitnessError
from ..cases.profiles import Profile
from ..report.document import build_report, result_to_dict, write_report

__all__ = ["Journal", "JOURNAL_FORMAT", "rebuild", "JournalError"]

JOURNAL_FORMAT = "convwitness-journal/1"
NAME = "journal.jsonl"


class JournalError(ConvWitnessError):
    """A journal that is missing, corrupt or of another format."""


class Journal:
    def __init__(self, path: str, fh):
        self.path, self._fh = path, fh

    @classmethod
    def open(cls, report_dir: str, adapter, profile: Profile, seed, planned=None,
             shard: str | None = None) -> "Journal":
        os.makedirs(report_dir, exist_ok=True)
        path = os.path.join(report_dir, NAME)
        fh = open(path, "w", encoding="utf-8")
        head = {"format": JOURNAL_FORMAT, "adapter": {"name": adapter.name, "version": adapter.version,
                                                      "source": adapter.source,
                                                      "capabilities": adapter.capabilities.to_dict()},
                "profile": profile.to_dict(), "seed": seed, "started": time.time(),
                "planned": list(planned or []), "shard": shard}
        j = cls(path, fh)
        j._write(head)
        return j

    def _write(self, obj: dict):
        self._fh.write(json.dumps(obj) + "\n")
        self._fh.flush()
        os.fsync(self._fh.fileno())

    def append(self, result) -> None:
        self._write({"result": result_to_dict(result)})

    def close(self):
        if not self._fh.closed:
            self._fh.close()


def read(report_dir: str) -> tuple[dict, list[dict]]:
    path = os.path.join(report_dir, NAME)
    if not os.path.isfile(path):
        raise JournalError(f"no journal at {path!r}; `convwitness run --report DIR` writes "
                           "DIR/journal.jsonl as it goes")
    head, results = None, []
    with open(path, encoding="utf-8") as fh:
        for n, line in enumerate(fh, 1):
            line = line.strip()
            if not line:
                continue
            try:
                obj = json.loads(line)
            except json.JSONDecodeError:
                # a line cut short by the kill: everything before it is intact
                break
            if n == 1:
                if not isinstance(obj, dict) or obj.get("format") != JOURNAL_FORMAT:
                    raise JournalError(f"{path!r}: line 1 is not a {JOURNAL_FORMAT} header "
                                       f"(got {str(obj)[:80]!r}); this is not a convwitness journal")
                head = obj
            elif isinstance(obj, dict) and "result" in obj:
                results.append(obj["result"])
    if head is None:
        raise JournalError(f"{path!r} is empty; the run was killed before it started")
    return head, results


def rebuild(report_dir: str) -> dict:
    """Write DIR/report.json from DIR/journal.jsonl; returns the report."""
    head, results = read(report_dir)
    a = head["adapter"]
    adapter = SimpleNamespace(name=a["name"], version=a["version"], source=a["source"],
                              capabilities=Capabilities.from_dict(a["capabilities"]))
    profile = Profile(**{**head["profile"], "max_spatial": tuple(head["profile"]["max_spatial"])})
    done = {r["id"] for r in results}
    planned = head.get("planned") or []
    # in the planned order: a cluster run (run/cluster.py) journals results as they finish
    rank = {inv_id: i for i, inv_id in enumerate(planned)}
    results.sort(key=lambda r: rank.get(r["id"], len(rank)))
    complete = bool(planned) and set(planned) <= done and not head.get("shard")
    end = os.path.getmtime(os.path.join(report_dir, NAME))
    doc = build_report(adapter, results, profile=profile, seed=head["seed"],
                       started=head["started"], duration_s=max(0.0, end - head["started"]),
                       shard=head.get("shard"), status="complete" if complete else "partial")
    write_report(doc, report_dir)
    return doc
