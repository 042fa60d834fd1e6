"""The machine a report was made on: CPU model, the instruction-set features numpy
detects, and the build of the library under test where it tells.

A real library's behaviour can depend on all three (torch's oneDNN kernels are
chosen by the CPU's instruction sets and the thread count), so a finding is only
reproducible together with them. Nothing here imports a library that is not
already imported or named by the adapter: ``import convwitness`` stays light.
"""
from __future__ import annotations

import os
import platform
import sys

__all__ = ["cpu_info", "library_builds", "THREAD_VARIABLES"]

THREAD_VARIABLES = ("OMP_NUM_THREADS", "MKL_NUM_THREADS", "OPENBLAS_NUM_THREADS",
                    "ATEN_CPU_CAPABILITY", "ONEDNN_MAX_CPU_ISA", "XLA_FLAGS")


def _cpu_model() -> str:
    """The CPU's model name ("model name" of /proc/cpuinfo on Linux, else platform)."""
    try:
        with open("/proc/cpuinfo", encoding="utf-8", errors="replace") as fh:
            for line in fh:
                key, _, value = line.partition(":")
                if key.strip() in ("model name", "Model", "cpu model") and value.strip():
                    return value.strip()
    except OSError:
        pass
    return platform.processor() or platform.machine() or "unknown"


def _numpy_cpu_features() -> list[str]:
    """The instruction-set features numpy's runtime dispatch detected (sorted)."""
    for mod in ("numpy._core._multiarray_umath", "numpy.core._multiarray_umath"):
        try:
            m = __import__(mod, fromlist=["__cpu_features__"])
            return sorted(k for k, v in m.__cpu_features__.items() if v)
        except (ImportError, AttributeError):
            continue
    return []


def cpu_info() -> dict:
    """{"model", "features", "logical_cpus", "threads_env"} of this machine."""
    return {"model": _cpu_model(), "features": _numpy_cpu_features(),
            "logical_cpus": int(os.cpu_count() or 0),
            "threads_env": {k: os.environ[k] for k in THREAD_VARIABLES if k in os.environ}}


def _torch_build() -> dict:
    import torch
    out = {"version": torch.__version__, "threads": int(torch.get_num_threads())}
    try:
        out["cpu_capability"] = str(torch.backends.cpu.get_cpu_capability())
    except AttributeError:
        pass
    keep = ("MKL-DNN", "oneDNN", "Math Kernel", "OpenMP", "CPU capability", "NNPACK")
    lines = [ln.strip(" -") for ln in torch.__config__.show().splitlines()]
    out["config"] = [ln for ln in lines if ln and not ln.startswith("Build settings")
                     and any(k in ln for k in keep)]
    for ln in lines:
        if ln.startswith("Build settings:"):
            flags = dict(p.strip().partition("=")[::2] for p in ln[len("Build settings:"):].split(","))
            out["build"] = {k: flags[k] for k in ("BLAS_INFO", "USE_MKLDNN", "USE_OPENMP",
                                                   "USE_NNPACK", "USE_CUDA", "COMMIT_SHA") if k in flags}
    return out


def _jax_build() -> dict:
    import jax
    import jaxlib
    out = {"version": jax.__version__, "jaxlib": jaxlib.__version__}
    try:
        out["backend"] = jax.default_backend()
    except RuntimeError:
        pass
    return out


def _onnxruntime_build() -> dict:
    import onnxruntime as ort
    return {"version": ort.__version__, "providers": list(ort.get_available_providers()),
            "device": str(ort.get_device())}


_BUILDS = {"torch": _torch_build, "jax": _jax_build, "onnxruntime": _onnxruntime_build}


def library_builds(*hints: str) -> dict:
    """Build information of torch / jax / onnxruntime, for each one that is already
    imported here or whose name appears in one of ``hints`` (the adapter's name and
    source). A library that is missing or fails to tell is left out."""
    text = " ".join(h for h in hints if h).lower()
    out = {}
    for name, gather in _BUILDS.items():
        if name not in sys.modules and name not in text:
            continue
        try:
            out[name] = gather()
        except Exception:           # noqa: BLE001 -- a build that cannot tell is left out
            continue
    return out
