"""report.json's environment: the CPU and the build of the library under test.

Outside sources: numpy's own runtime-dispatch table (``__cpu_features__``), Linux's
/proc/cpuinfo, torch's own ``torch.__version__`` / ``torch.get_num_threads()`` /
``torch.backends.cpu.get_cpu_capability()``, and the shipped JSON Schema (draft 2020-12).
"""
from __future__ import annotations

import os

import jsonschema
import pytest

from convwitness.report.document import environment, schema
from convwitness.report.machine import cpu_info, library_builds


def test_cpu_features_are_numpys():
    try:
        from numpy._core._multiarray_umath import __cpu_features__ as feats
    except ImportError:                                  # numpy < 2
        from numpy.core._multiarray_umath import __cpu_features__ as feats
    assert cpu_info()["features"] == sorted(k for k, v in feats.items() if v)


@pytest.mark.skipif(not os.path.exists("/proc/cpuinfo"), reason="needs Linux /proc/cpuinfo")
def test_cpu_model_is_the_kernels():
    with open("/proc/cpuinfo", encoding="utf-8") as fh:
        models = {ln.partition(":")[2].strip() for ln in fh if ln.startswith("model name")}
    if models:
        assert cpu_info()["model"] in models
    assert cpu_info()["logical_cpus"] == os.cpu_count()


def test_torch_build_is_torchs_own():
    torch = pytest.importorskip("torch")
    got = library_builds("torch")["torch"]
    assert got["version"] == torch.__version__
    assert got["threads"] == torch.get_num_threads()
    assert got["cpu_capability"] == torch.backends.cpu.get_cpu_capability()
    assert got["build"]["USE_MKLDNN"] in ("ON", "OFF", "1", "0")


def test_onnxruntime_build_lists_its_providers():
    ort = pytest.importorskip("onnxruntime")
    got = library_builds("onnxruntime")["onnxruntime"]
    assert got == {"version": ort.__version__, "providers": ort.get_available_providers(),
                   "device": ort.get_device()}


def test_environment_satisfies_the_schema():
    class Named:
        name, source = "onnxruntime", "onnxruntime"
    env = environment(Named())
    sub = schema()["properties"]["environment"]
    jsonschema.Draft202012Validator(sub).validate(env)
    assert set(env) >= {"python", "platform", "libraries", "cpu", "builds"}
