"""CI-facing run behaviour: a heartbeat while an invariant runs (so a slow invariant can
be told from a hung one on a non-terminal output), and no stale witnesses after a
passing rerun.

Source: convwitness's own progress contract (run/heartbeat.py, run/certify.py); the
adapter is the float64 reference itself, gated so that the heartbeat is seen without
depending on how fast this machine is.
"""
from __future__ import annotations

import io
import os
import threading

from convwitness.adapters.reference import ReferenceAdapter
from convwitness.boundary.loading import load_adapter
from convwitness.report.console import Progress
from convwitness.run.certify import certify


class _WaitsForHeartbeat(ReferenceAdapter):
    """Its first forward call waits until a heartbeat has been seen (at most 120 s)."""
    name = "waits-for-heartbeat"

    def __init__(self, seen: threading.Event):
        super().__init__()
        self.seen = seen

    def forward(self, x, w, b, **kw):
        self.seen.wait(120)
        return super().forward(x, w, b, **kw)


def test_heartbeat_names_invariant_and_count_on_non_terminal_output():
    seen = threading.Event()
    stream = io.StringIO()                       # not a terminal
    console = Progress(stream)
    events = []

    def progress(event, payload):
        events.append((event, dict(payload)))
        console(event, payload)
        if event == "heartbeat":
            seen.set()

    adapter = load_adapter(_WaitsForHeartbeat(seen))
    doc, results = certify(adapter, profile="quick", only="forward.reference", progress=progress,
                           heartbeat_s=0.05)
    assert seen.is_set()
    beats = [p for e, p in events if e == "heartbeat"]
    assert beats and all(p["id"] == "forward.reference" for p in beats)
    assert all(p["examples"] >= 0 for p in beats)
    assert "... forward.reference: " in stream.getvalue() and "examples so far" in stream.getvalue()
    assert results[0].verdict == "pass"


def test_passing_rerun_leaves_no_stale_witness(tmp_path):
    folder = tmp_path / "witnesses"
    folder.mkdir()
    for ext in (".json", ".npz"):
        (folder / f"forward.reference{ext}").write_text("from an earlier, failing run")
    (folder / f"forward.contract.json").write_text("kept: not rerun this time")
    certify(load_adapter("reference"), profile="quick", only="forward.reference",
            report_dir=str(tmp_path))
    assert not os.path.exists(folder / "forward.reference.json")
    assert not os.path.exists(folder / "forward.reference.npz")
    assert os.path.exists(folder / "forward.contract.json")
