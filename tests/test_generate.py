"""Generated pytest suites agree with `convwitness run` for the same seed.

Each suite is written by `convwitness generate`, run by pytest in a subprocess
(plain and with pytest-xdist's `-n 2`), and its per-test outcomes, read from
pytest's own JUnit XML, are compared with the verdicts of `run` for the same
adapter, invariants, profile and seed.
"""
from __future__ import annotations

import io
import json
import os
import subprocess
import sys
import xml.etree.ElementTree as ET

import pytest

from convwitness.cli.main import parse_args, run
from convwitness.report.document import load_report

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
DEMO = os.path.join(ROOT, "reports", "_demo", "brindlemoss_port.py")
CORRECT_ONLY = ("forward.reference,forward.group_split,forward.stride_subsampling,grad_input.reference,"
                "grad_weight.reference,transposed.reference,call.inputs_untouched")
BUGGY_ONLY = "forward.contract,forward.reference,forward.bias_shift,forward.explicit_padding,forward.special_values"


def cli(*argv):
    out, err = io.StringIO(), io.StringIO()
    rc = run(parse_args(list(argv)), out, err)
    return rc, out.getvalue(), err.getvalue()


def generate(tmp_path, adapter, only, seed=0):
    path = tmp_path / "tests" / "test_conv_conformance.py"
    rc, out, err = cli("generate", "--adapter", adapter, "-o", str(path), "--only", only,
                       "--seed", str(seed))
    assert rc == 0, err
    return path


def pytest_outcomes(path, *extra):
    """{invariant id: passed | failed | xfailed | xpassed | skipped}, and the failure texts."""
    xml = path.parent / f"junit{len(extra)}.xml"
    res = subprocess.run([sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider",
                          f"--junitxml={xml}", "-o", "junit_family=xunit2", *extra, str(path)],
                         capture_output=True, text=True, cwd=str(path.parent.parent), timeout=300)
    outcomes, texts = {}, {}
    for case in ET.parse(xml).getroot().iter("testcase"):
        name = case.get("name").removeprefix("test_")
        if case.find("failure") is not None:
            outcomes[name], texts[name] = "failed", case.find("failure").text or ""
        elif case.find("error") is not None:
            outcomes[name], texts[name] = "error", case.find("error").text or ""
        elif case.find("skipped") is not None:
            s = case.find("skipped")
            outcomes[name] = "xfailed" if s.get("type") == "pytest.xfail" else "skipped"
        else:
            outcomes[name] = "passed"
    return res, outcomes, texts


def run_report(tmp_path, adapter, only, seed=0):
    folder = tmp_path / "run"
    cli("run", "--adapter", adapter, "--only", only, "--seed", str(seed), "--report", str(folder),
        "--quiet", "--isolation", "none")
    return load_report(str(folder / "report.json"))


def _key(inv_id):
    return "".join(c if c.isalnum() else "_" for c in inv_id)


def expected_outcomes(doc):
    """What pytest should say for each verdict of `run` (information-only failures are xfail)."""
    out = {}
    for r in doc["invariants"]:
        if r["verdict"] in ("not-applicable", "unavailable"):
            continue
        if r["informational"]:
            out[_key(r["id"])] = "xfailed" if r["verdict"] != "pass" else "passed"
        else:
            out[_key(r["id"])] = {"pass": "passed", "fail": "failed"}.get(r["verdict"], "error")
    return out


def test_generated_module_is_readable_and_self_contained(tmp_path):
    path = generate(tmp_path, "reference", "forward.reference,grad_input.reference")
    text = path.read_text()
    assert "from convwitness import Suite" in text
    assert "@given(suite.examples('forward.reference'))" in text
    assert "def test_forward_reference(cases):" in text and "def test_grad_input_reference(cases):" in text
    imports = {ln.split()[1] for ln in text.splitlines() if ln.startswith(("import ", "from "))}
    # the only imports: pytest, hypothesis and the public top-level package (no internal module)
    assert imports <= {"pytest", "hypothesis", "convwitness"}


def test_reference_suite_passes_under_xdist_like_run(tmp_path):
    doc = run_report(tmp_path, "reference", CORRECT_ONLY)
    path = generate(tmp_path, "reference", CORRECT_ONLY)
    res, outcomes, _ = pytest_outcomes(path, "-n", "2")
    assert res.returncode == 0, res.stdout[-3000:]
    assert outcomes == expected_outcomes(doc) and set(outcomes.values()) == {"passed"}


def test_torch_suite_passes_under_xdist_like_run(tmp_path):
    from convwitness import load_adapter
    from convwitness.errors import AdapterUnavailable
    try:
        load_adapter("torch")
    except AdapterUnavailable as exc:
        pytest.skip(f"torch adapter unavailable: {exc}")
    doc = run_report(tmp_path, "torch", CORRECT_ONLY)
    path = generate(tmp_path, "torch", CORRECT_ONLY)
    res, outcomes, _ = pytest_outcomes(path, "-n", "2")
    assert res.returncode == 0, res.stdout[-3000:]
    assert outcomes == expected_outcomes(doc) and set(outcomes.values()) == {"passed"}


@pytest.mark.parametrize("workers", [(), ("-n", "2")], ids=["plain", "xdist"])
def test_planted_bug_suite_fails_where_run_fails_with_the_same_anatomy(tmp_path, workers):
    adapter = f"{DEMO}:BrindlemossPort"
    doc = run_report(tmp_path, adapter, BUGGY_ONLY)
    path = generate(tmp_path, adapter, BUGGY_ONLY)
    res, outcomes, texts = pytest_outcomes(path, *workers)
    assert res.returncode == 1
    assert outcomes == expected_outcomes(doc)
    failing = [r for r in doc["invariants"] if r["verdict"] == "fail" and not r["informational"]]
    assert {_key(r["id"]) for r in failing} == {k for k, v in outcomes.items() if v == "failed"}
    assert {"forward_reference", "forward_bias_shift"} <= {_key(r["id"]) for r in failing}
    for r in failing:
        # the failure text (pytest.fail without a traceback) carries the report's anatomy
        shown = texts[_key(r["id"])]
        for line in r["message"].splitlines():
            assert line.strip() in shown, (r["id"], line)


def test_generated_suite_with_another_seed_still_agrees(tmp_path):
    adapter = f"{DEMO}:BrindlemossPort"
    doc = run_report(tmp_path, adapter, "forward.group_split,forward.contract", seed=7)
    path = generate(tmp_path, adapter, "forward.group_split,forward.contract", seed=7)
    assert "seed=7" in path.read_text()
    _, outcomes, _ = pytest_outcomes(path)
    assert outcomes == expected_outcomes(doc)


def test_generate_rejects_an_empty_selection(tmp_path):
    rc, _, err = cli("generate", "--adapter", "reference", "-o", str(tmp_path / "t.py"),
                     "--only", "no.such.invariant")
    assert rc == 2 and "matches no invariant" in err and len(err.strip().splitlines()) == 1


# -- one execution path: the same geometries, verdicts and witnesses ----------------------
def _import_module(path):
    import importlib.util
    spec = importlib.util.spec_from_file_location(f"generated_{abs(hash(str(path)))}", path)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


def _recording(monkeypatch):
    """Record (invariant, geometry, value kind, value seed) of every check, on either path."""
    from convwitness.invariants import Invariant
    seen = []
    real = Invariant.check

    def check(self, adapter, case, context=None):
        seen.append((self.id, case.spec.to_json(), case.kind, case.seed))
        return real(self, adapter, case, context)

    monkeypatch.setattr(Invariant, "check", check)
    return seen


def test_run_and_generated_suite_draw_the_same_geometries_for_every_invariant(tmp_path, monkeypatch):
    """For seed 3, every invariant that applies to the reference adapter (long
    accumulations included) is checked on the same sequence of geometries and values by
    `run`'s runner and by the generated module's test (source of the sequence: hypothesis
    itself, recorded at the one call both paths make, Invariant.check)."""
    from convwitness import load_adapter
    from convwitness.cases.profiles import get_profile
    from convwitness.run.runner import run_invariant, select
    adapter = load_adapter("reference")
    chosen = [inv for inv, why in select(adapter.capabilities) if not why]
    assert any(inv.id.startswith("long_sum.") for inv in chosen)
    path = generate(tmp_path, "reference", ",".join(inv.id for inv in chosen), seed=3)
    module = _import_module(path)
    seen = _recording(monkeypatch)
    drawn = {}
    for inv in chosen:
        seen.clear()
        res = run_invariant(adapter, inv, get_profile("quick"), seed=3)
        from_run = list(seen)
        seen.clear()
        getattr(module, "test_" + _key(inv.id))()
        from_suite = list(seen)
        assert res.verdict == "pass", (inv.id, res.message)
        assert from_run and from_run == from_suite, inv.id
        drawn[inv.id] = from_run
    # the long accumulations draw their long channel counts (256 or 512 in quick) on both
    channels = {ConvSpec_from(s).in_channels for _, s, _, _ in drawn["long_sum.forward"]}
    assert channels and min(channels) >= 256, channels


def ConvSpec_from(text):
    from convwitness.geometry.spec import ConvSpec
    return ConvSpec.from_json(text)


def test_failing_generated_test_gives_the_witness_run_gives(tmp_path, monkeypatch):
    """A planted bug: the generated test fails with the whole geometry, the same verdict
    and witness geometry as `run`, a witness file and its replay command, and no
    traceback through convwitness's own files."""
    import convwitness
    adapter = f"{DEMO}:BrindlemossPort"
    only = "forward.reference,forward.bias_shift"
    doc = run_report(tmp_path, adapter, only)
    path = generate(tmp_path, adapter, only)
    res, outcomes, texts = pytest_outcomes(path)
    assert res.returncode == 1
    internal = os.path.dirname(os.path.abspath(convwitness.__file__))
    for r in doc["invariants"]:
        text = texts[_key(r["id"])]
        assert r["verdict"] == "fail" and outcomes[_key(r["id"])] == "failed"
        spec = ConvSpec_from(json.dumps(r["witness"]["spec"]))
        assert f"{r['id']}: fail on {spec.describe()}" in text
        assert f"geometry: {spec!r}" in text and "output_padding=" in text
        assert "replay: convwitness replay " in text and internal not in text
        for line in r["message"].splitlines():
            assert line.strip() in text, (r["id"], line)
        meta = json.loads((path.parent / "convwitness-witnesses" / "witnesses" / f"{r['id']}.json").read_text())
        assert meta["spec"] == r["witness"]["spec"] and meta["verdict"] == r["verdict"]
