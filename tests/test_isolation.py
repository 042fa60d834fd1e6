"""Process isolation, the journal and interrupted runs, through the real CLI.

Each faulty adapter must give its verdict, the run must finish within its bounds,
the report must validate against the shipped schema (convwitness.report.document), and the
exit code must be 1 — 0 for the adapter that only prints.
"""
from __future__ import annotations

import json
import os
import re
import signal
import subprocess
import sys
import time

import pytest

from convwitness.report.document import load_report

FIXTURE = os.path.join(os.path.dirname(__file__), "fixtures", "faulty_adapters.py")
BASE = ["--profile", "quick", "--only", "forward.reference,forward.contract",
        "--call-timeout", "2", "--first-call-allowance", "1", "--invariant-budget", "12",
        "--memory-limit", "1GiB", "--quiet"]


def _run(args, cwd, timeout=240):
    t0 = time.monotonic()
    proc = subprocess.run([sys.executable, "-m", "convwitness.cli.main", *args], cwd=cwd,
                          capture_output=True, text=True, timeout=timeout)
    return proc, time.monotonic() - t0


CASES = [
    ("Segfaulting", "crash", "SIGSEGV"),
    ("Exiting", "crash", "exit code 3"),
    ("MemoryHungry", "crash", "memory limit"),
    ("Hanging", "timeout", "did not answer within 2 s"),
    ("ReturnsList", "fail", "got list"),
    ("ReturnsNone", "fail", "got None"),
    ("WrongShape", "fail", "got shape="),
    ("WrongDtype", "fail", "got dtype="),
    ("Raising", "error", "RuntimeError: this port has no kernel"),
]


@pytest.mark.parametrize("cls,verdict,words", CASES, ids=[c[0] for c in CASES])
def test_faulty_adapter_gets_its_verdict(tmp_path, cls, verdict, words):
    report = tmp_path / "r"
    proc, took = _run(["run", "--adapter", f"{FIXTURE}:{cls}", "--report", str(report), *BASE], tmp_path)
    assert proc.returncode == 1, proc.stderr
    doc = load_report(str(report / "report.json"))          # validates against the schema
    ref = next(r for r in doc["invariants"] if r["id"] == "forward.reference")
    assert ref["verdict"] == verdict, ref["message"]
    # a timeout or crash found by forward.contract is replayed first by forward.reference
    # ("same cause as"); the words are in the message of the invariant that found it
    first = next(r for r in doc["invariants"] if r["id"] == (ref.get("same_cause_as") or ref["id"]))
    assert first["verdict"] == verdict and words in first["message"]
    assert ref["witness"] is not None and os.path.isfile(report / ref["witness"]["path"])
    if verdict == "error":
        assert "RuntimeError" in ref["traceback"]


def test_printing_adapter_passes_and_its_output_is_kept(tmp_path):
    report = tmp_path / "r"
    proc, _ = _run(["run", "--adapter", f"{FIXTURE}:Printing", "--report", str(report), *BASE], tmp_path)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    doc = load_report(str(report / "report.json"))
    ref = next(r for r in doc["invariants"] if r["id"] == "forward.reference")
    assert ref["verdict"] == "pass"
    assert "debug: forward" in ref["output"] and "raw bytes on fd 2" in ref["output"]


def test_crashing_worker_is_replaced_and_witness_replays(tmp_path):
    report = tmp_path / "r"
    _run(["run", "--adapter", f"{FIXTURE}:Segfaulting", "--report", str(report), *BASE], tmp_path)
    doc = load_report(str(report / "report.json"))
    ref = next(r for r in doc["invariants"] if r["id"] == "forward.reference")
    assert ref["same_cause_as"] == "forward.contract"      # the known crash, replayed first
    found = next(r for r in doc["invariants"] if r["id"] == "forward.contract")
    # the search went on after the first crash (hypothesis's shrinking, or the local pass
    # that makes the witness 1-minimal when a scheduled example found it): several more
    # calls, each crash in a fresh worker
    replays = re.search(r"(\d+) neighbours replayed", found["witness"].get("minimization", "")) if found["witness"] else None
    assert found["verdict"] == "crash" and (found["examples"] > 2 or (replays and int(replays.group(1)) >= 2)), found
    proc, _ = _run(["replay", str(report / ref["witness"]["path"]), "--adapter",
                    f"{FIXTURE}:Segfaulting", "--call-timeout", "5"], tmp_path)
    assert proc.returncode == 1 and "crash" in proc.stdout
    proc, _ = _run(["replay", str(report / ref["witness"]["path"]), "--adapter", "reference"], tmp_path)
    assert proc.returncode == 0, proc.stdout


def _journal_results(path):
    """The ids in the journal's complete lines (the run may be writing the last one)."""
    if not os.path.exists(path):
        return []
    with open(path) as fh:
        return [json.loads(l)["result"]["id"] for l in fh if l.endswith("\n") and '"result"' in l]


def test_sigkill_midway_rebuilds_every_finished_invariant(tmp_path):
    report = tmp_path / "r"
    proc = subprocess.Popen([sys.executable, "-m", "convwitness.cli.main", "run", "--adapter",
                             f"{FIXTURE}:Printing", "--report", str(report), "--profile", "standard",
                             "--quiet"], cwd=tmp_path, stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL)
    journal = report / "journal.jsonl"
    deadline = time.monotonic() + 120
    while len(_journal_results(journal)) < 3 and time.monotonic() < deadline:
        time.sleep(0.2)
    proc.kill()
    proc.wait()
    finished = _journal_results(journal)
    assert len(finished) >= 3
    out, _ = _run(["rebuild", str(report)], tmp_path)
    doc = load_report(str(report / "report.json"))
    assert doc["status"] == "partial" and doc["conformant"] is False
    assert [r["id"] for r in doc["invariants"]] == finished
    assert out.returncode == 6          # PARTIAL (README, exit codes): interrupted, no failure in it


@pytest.mark.parametrize("sig", [signal.SIGINT, signal.SIGTERM, signal.SIGHUP],
                         ids=["SIGINT", "SIGTERM", "SIGHUP"])
def test_interrupt_writes_a_partial_report(tmp_path, sig):
    """Ctrl-C, a CI job's timeout (SIGTERM) and a lost terminal (SIGHUP) all leave a valid
    partial report (SIGTERM as the CI timeout signal: common practice, no source)."""
    report = tmp_path / "r"
    proc = subprocess.Popen([sys.executable, "-m", "convwitness.cli.main", "run", "--adapter",
                             f"{FIXTURE}:Printing", "--report", str(report), "--profile", "standard",
                             "--quiet"], cwd=tmp_path, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    journal = report / "journal.jsonl"
    deadline = time.monotonic() + 120
    while len(_journal_results(journal)) < 2 and time.monotonic() < deadline:
        time.sleep(0.2)
    proc.send_signal(sig)
    out, err = proc.communicate(timeout=120)
    assert proc.returncode == 6, err    # PARTIAL (README, exit codes): interrupted, no failure in it
    doc = load_report(str(report / "report.json"))
    assert doc["status"] == "partial"
    assert len(doc["invariants"]) >= 2
    assert "interrupted" in err


def test_isolation_none_runs_in_process(tmp_path):
    report = tmp_path / "r"
    proc, _ = _run(["run", "--adapter", "reference", "--report", str(report), "--isolation", "none",
                    "--only", "forward.reference", "--quiet"], tmp_path)
    assert proc.returncode == 0, proc.stderr
    assert load_report(str(report / "report.json"))["conformant"] is True


def test_views_cross_the_worker_boundary_with_their_strides():
    # numpy's documented ndarray.strides/ndarray(buffer=..., strides=...) semantics: a
    # step-slice view is not C-contiguous; the worker must see such a view, not a packed
    # copy, or a defect that reads views as packed (BUG-CLASSES C11) would hide there
    import numpy as np
    from convwitness.boundary.isolation.arena import Arena, copy_keeping_strides, pack, unpack
    base = np.arange(2 * 3 * 8, dtype=np.float32).reshape(2, 3, 8)
    view = base[:, 1:, ::2]
    arena = Arena.create(size=1 << 16)
    try:
        (back,) = unpack(arena, pack(arena, [view]), copy=True)
    finally:
        arena.close()
    assert not back.flags.c_contiguous and back.strides == view.strides
    assert np.array_equal(back, view)
    kept = copy_keeping_strides(view)
    assert kept.strides == view.strides and np.array_equal(kept, view)
    assert not np.shares_memory(kept, base)


@pytest.mark.parametrize("adapter, code", [
    ("convwitness.adapters.zoo_state:ViewReadAsPacked", 1), ("reference", 0)])
def test_views_invariant_under_process_isolation(tmp_path, adapter, code):
    # the planted C11 defect is caught through the worker process, the reference is not flagged
    proc, _ = _run(["run", "--adapter", adapter, "--only", "call.strided_views", "--isolation", "process",
                    "--quiet", "--report", str(tmp_path / "r")], cwd=tmp_path)
    assert proc.returncode == code, proc.stdout + proc.stderr
    doc = load_report(str(tmp_path / "r" / "report.json"))
    assert doc["invariants"][0]["verdict"] == ("fail" if code else "pass")


def test_closing_an_arena_twice_leaves_later_files_alone(tmp_path):
    # POSIX close(2): a descriptor number is reused by the next open(); closing it a second
    # time closes that other file. A ProcessAdapter closed by hand and then collected
    # (__del__) closed its arenas twice, which closed a run's journal (EBADF on fsync) when
    # two certifications ran in one process (the Python API).
    import os
    from convwitness.boundary.isolation.arena import Arena
    arena = Arena.create(prefix="twice")
    try:
        arena.close()
        with open(tmp_path / "later.txt", "w") as fh:       # likely takes the arena's number
            arena.close()
            fh.write("still open")
            fh.flush()
            os.fsync(fh.fileno())
    finally:
        Arena.remove(arena.name)


def test_an_allocation_refused_inside_the_port_names_the_memory_limit():
    """Under isolation the worker has a memory limit; a port that reports ENOMEM ("Cannot
    allocate memory", ENOMEM: errno.ENOMEM is 12 on Linux) is told that the limit may be the cause, and how to
    raise it (the error stays the port's: a raise, not a crash)."""
    import numpy as np
    from convwitness.boundary.isolation.client import load_isolated
    from convwitness.errors import AdapterRaised
    from fixtures.faulty_adapters import BIG
    a = load_isolated(f"{FIXTURE}:ThreadsExhausted", memory_limit=1 << 30)
    try:
        from convwitness import ConvSpec
        spec = ConvSpec(batch=1, in_channels=1, out_channels=1, input_size=(BIG + 1,),
                        kernel_size=(1,), dtype="float64", bias=False)
        with pytest.raises(AdapterRaised, match=r"Cannot allocate memory \(the worker runs under a "
                                                r"memory limit of 1\.00 GiB.*raise --memory-limit\)"):
            a.forward(spec, np.ones(spec.x_shape), np.ones(spec.w_shape))
    finally:
        a.close()
