"""Bounded runs on misbehaving ports: the call clock, known causes replayed first,
failures grouped by cause.

Sources: the call signature a compile-per-shape port keys on (method, shapes, dtypes,
geometry) is common practice, no source; the rest checks convwitness's own contract
(boundary/calls.py, run/causes.py) on ports whose faults are known by construction
(tests/fixtures/misbehaving_ports.py), through the real CLI and the report's JSON Schema.
"""
from __future__ import annotations

import os
import subprocess
import sys

import numpy as np
import pytest

from convwitness.boundary.calls import PROBE_FLOOR_S, CallClock, call_signature
from convwitness.errors import AdapterTimeout
from convwitness.geometry.spec import ConvSpec
from convwitness.report.document import load_report
from convwitness.run.causes import group_causes, signature, spec_meets

PORTS = os.path.join(os.path.dirname(__file__), "fixtures", "misbehaving_ports.py")


def test_call_signature_keys_on_method_shapes_dtypes_and_keywords():
    a, b = np.zeros((1, 2, 5)), np.zeros((3, 2, 2))
    same = call_signature("forward", (a, b, None), {"stride": (1,), "groups": 1})
    assert same == call_signature("forward", (np.ones((1, 2, 5)), b, None), {"groups": 1, "stride": (1,)})
    assert same != call_signature("backward", (a, b, None), {"stride": (1,), "groups": 1})
    assert same != call_signature("forward", (a.astype(np.float32), b, None), {"stride": (1,), "groups": 1})
    assert same != call_signature("forward", (a, b, None), {"stride": (2,), "groups": 1})


def test_clock_gives_a_first_call_allowance_and_never_reruns_a_hang():
    clock = CallClock(10.0, first_call_allowance=3.0)
    new, old = ("forward", (1,), ()), ("forward", (2,), ())
    assert clock.limit(new) == 30.0                 # a new signature may compile
    clock.answered(old, 0.5)
    assert clock.limit(old) == 10.0                 # a repeated one may not
    msg = clock.hung(new, "adapter p forward", 30.0)
    assert "30 s" in msg and "first-call" in msg
    with pytest.raises(AdapterTimeout, match="not run again"):
        clock.limit(new)
    # once the port has hung, a new signature gets the probe limit, not the allowance
    assert clock.limit(("forward", (3,), ())) == max(PROBE_FLOOR_S, 1.5)
    with clock.probing():
        assert clock.limit(old) == max(PROBE_FLOOR_S, 1.5)
        clock.answered(old, 4.0)                    # a slow port gets slow probes
        assert clock.limit(old) == 10.0             # 3 x 4 s, capped at the call timeout
    with pytest.raises(ValueError, match="factor >= 1"):
        CallClock(10.0, first_call_allowance=0.5)


def test_spec_meets_needs_and_signature_names_the_features():
    from convwitness.cases.strategies import Needs
    strided = ConvSpec(2, 2, 2, (7, 7), (3, 3), stride=(2, 2), bias=False)
    assert spec_meets(Needs(), strided)
    assert not spec_meets(Needs(stride=False), strided)
    assert not spec_meets(Needs(bias=True), strided)
    assert not spec_meets(Needs(transposed=True), strided)
    assert not spec_meets(Needs(batch_min=3), strided)
    sig = signature("timeout", strided)
    assert sig.startswith("timeout: ") and "stride=strided" in sig and "batch=many" in sig


def test_group_causes_follows_same_cause_links_and_signatures():
    spec = ConvSpec(2, 2, 2, (7,), (3,), stride=(2,)).to_dict()
    invs = [
        {"id": "a.one", "verdict": "timeout", "informational": False,
         "witness": {"spec": spec, "path": "witnesses/a.one.json", "geometry": "g"}},
        {"id": "a.two", "verdict": "timeout", "informational": False, "same_cause_as": "a.one",
         "witness": {"spec": spec, "path": "witnesses/a.one.json", "geometry": "g"}},
        {"id": "a.three", "verdict": "pass", "informational": False, "witness": None},
        {"id": "a.four", "verdict": "fail", "informational": False, "witness": None},
    ]
    groups = group_causes(invs)
    assert [g["invariants"] for g in groups] == [["a.one", "a.two"], ["a.four"]]
    assert groups[0]["witness"] == "witnesses/a.one.json"


def _run(args, cwd, timeout=900):
    return subprocess.run([sys.executable, "-m", "convwitness", *args], cwd=cwd,
                          capture_output=True, text=True, timeout=timeout)


def test_port_that_hangs_on_every_strided_call_is_judged_once_per_cause(tmp_path):
    report = tmp_path / "r"
    proc = _run(["run", "--adapter", f"{PORTS}:HangsOnStride", "--report", str(report),
                 "--profile", "quick", "--only", "forward.*", "--call-timeout", "10",
                 "--first-call-allowance", "1", "--quiet"], tmp_path)
    assert proc.returncode == 1, proc.stderr
    doc = load_report(str(report / "report.json"))          # validates against the schema
    by_id = {r["id"]: r for r in doc["invariants"]}
    timeouts = [r for r in doc["invariants"] if r["verdict"] == "timeout"]
    # every forward invariant that admits a strided geometry hangs on it
    assert by_id["forward.reference"]["verdict"] == "timeout"
    assert by_id["forward.stride_subsampling"]["verdict"] == "timeout"
    linked = [r for r in timeouts if r.get("same_cause_as")]
    assert linked, "no invariant reused a known cause"
    for r in linked:
        assert by_id[r["same_cause_as"]]["verdict"] == "timeout"
        assert r["message"].startswith(f"same cause as {r['same_cause_as']}")
        assert r["witness"] and os.path.isfile(report / r["witness"]["path"])
    # the search stops at the first hang instead of shrinking it
    first = [r for r in timeouts if not r.get("same_cause_as")]
    assert all("not shrunk" in r["reason"] for r in first)
    # grouped: fewer causes than timed-out invariants, and every one accounted for
    causes = [c for c in doc["causes"] if c["verdict"] == "timeout"]
    assert len(causes) < len(timeouts)
    assert sorted(i for c in causes for i in c["invariants"]) == sorted(r["id"] for r in timeouts)
    for c in causes:
        assert "stride=strided" in c["signature"]


def test_two_bugs_in_one_pass_are_both_reported_in_standard(tmp_path):
    """Two planted bugs in the forward pass (grouped channels mixed; dilation ignored when
    strided, zoo classes C03 and C04 of BUG-CLASSES.md): the search goes on after the first
    with its region excluded, and both come out, each with its own replayable witness."""
    report = tmp_path / "r"
    proc = _run(["run", "--adapter", f"{PORTS}:TwoForwardBugs", "--report", str(report),
                 "--profile", "standard", "--only", "forward.reference", "--isolation", "none",
                 "--quiet"], tmp_path)
    assert proc.returncode == 1, proc.stderr
    doc = load_report(str(report / "report.json"))
    r = doc["invariants"][0]
    specs = [r["witness"]["spec"]] + [f["witness"]["spec"] for f in r.get("further_causes", [])]
    grouped = any(s["groups"] > 1 for s in specs)
    dilated = any(s["groups"] == 1 and max(s["stride"]) > 1 and max(s["dilation"]) > 1 for s in specs)
    assert grouped and dilated, specs
    for extra in r["further_causes"]:
        assert os.path.isfile(report / extra["witness"]["path"])
        # each further witness lies outside every region excluded before it
        feats = extra["witness"]["spec"]
        assert extra["excluded"] and extra["region"] not in extra["excluded"], feats
    assert len(doc["causes"]) == 1 + len(r["further_causes"])
    assert "cause 2" in proc.stdout


def test_quick_profile_stops_at_the_first_cause(tmp_path):
    report = tmp_path / "r"
    _run(["run", "--adapter", f"{PORTS}:TwoForwardBugs", "--report", str(report), "--profile",
          "quick", "--only", "forward.reference", "--isolation", "none", "--quiet"], tmp_path)
    doc = load_report(str(report / "report.json"))
    assert doc["invariants"][0]["verdict"] == "fail"
    assert "further_causes" not in doc["invariants"][0]
