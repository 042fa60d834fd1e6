"""``import convwitness`` stays light: optional backends load only with their adapter.

Project rule (DESIGN.md): optional backends are never imported by ``import convwitness``.
Checked in a fresh interpreter, since this test process may already hold them.
"""
from __future__ import annotations

import json
import subprocess
import sys

import pytest

HEAVY = ("torch", "jax", "jaxlib", "onnxruntime", "onnx", "scipy", "ml_dtypes")

PROBE = """
import json, sys
{imports}
heavy = {heavy!r}
print(json.dumps(sorted(m for m in sys.modules if m.split(".")[0] in heavy)))
"""


@pytest.mark.parametrize("imports", [
    "import convwitness",
    "import convwitness.adapters",
    "import convwitness, convwitness.adapters\nfrom convwitness.numerics import reference, bounds\n"
    "from convwitness.geometry import formats, capabilities, spec\n"
    "from convwitness.boundary import contract, loading",
    "from convwitness.report import diff, outputs, html, markdown, junit",
])
def test_import_pulls_in_no_optional_backend(imports):
    out = subprocess.run([sys.executable, "-c", PROBE.format(imports=imports, heavy=HEAVY)],
                         capture_output=True, text=True, timeout=60)
    assert out.returncode == 0, out.stderr
    loaded = json.loads(out.stdout.strip().splitlines()[-1])
    assert loaded == [], f"{imports!r} imported {loaded}"


def test_loading_the_reference_adapter_pulls_in_no_framework():
    # the reference adapter may import ml_dtypes (to claim the low-precision dtypes it
    # can store), but no framework: it is the known-good control
    frameworks = ("torch", "jax", "jaxlib", "onnxruntime", "onnx", "scipy")
    code = PROBE.format(imports="import convwitness\nconvwitness.load_adapter('reference')",
                        heavy=frameworks)
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60)
    assert out.returncode == 0, out.stderr
    assert json.loads(out.stdout.strip().splitlines()[-1]) == []


def test_probe_detects_a_heavy_import():
    # control: the probe really sees a backend when one is imported
    pytest.importorskip("scipy")
    out = subprocess.run([sys.executable, "-c", PROBE.format(imports="import convwitness, scipy.signal",
                                                             heavy=HEAVY)],
                         capture_output=True, text=True, timeout=60)
    assert out.returncode == 0, out.stderr
    assert "scipy" in json.loads(out.stdout.strip().splitlines()[-1])


def test_reading_and_comparing_reports_needs_no_hypothesis():
    # comparing two reports (``convwitness diff``) classifies geometries with
    # convwitness.cases.features, which lives apart from the hypothesis strategies
    code = PROBE.format(imports="from convwitness.report import diff, document", heavy=("hypothesis",))
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60)
    assert out.returncode == 0, out.stderr
    assert json.loads(out.stdout.strip().splitlines()[-1]) == []
