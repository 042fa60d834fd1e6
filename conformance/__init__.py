"""convwitness: certify convolution-layer implementations.

The public face. Optional backends (torch, jax, onnxruntime, scipy, ml_dtypes) are
never imported here; built-in adapters import their library when they are loaded.
"""
from __future__ import annotations

from .numerics.bounds import Bound, ErrorModel, derive
from .numerics.gamma import gamma
from .geometry.capabilities import Capabilities
from .boundary.contract import Adapter, wrap
from .errors import (AdapterLoadError, AdapterOutputError, AdapterUnavailable, CaseFileError,
                     ConvWitnessError, FormatError, SpecError)
from .geometry.formats import unit_roundoff
from .boundary.loading import load_adapter
from .geometry.spec import ConvSpec

__version__ = "0.1.0"

#: Public names loaded on first use, so that ``import convwitness`` stays light
#: (hypothesis and the runner load only when a suite or a strategy is used).
_LAZY = {
    "Suite": ("convwitness.run.generate", "Suite"),
    "Needs": ("convwitness.cases.strategies", "Needs"),
    "specs": ("convwitness.cases.strategies", "specs"),
    "cases": ("convwitness.cases.strategies", "cases"),
    "examples": ("convwitness.cases.strategies", "examples"),
    "load_case": ("convwitness.cases.case", "load_case"),
    "certify": ("convwitness.api", "certify"),
    "Report": ("convwitness.api", "Report"),
    "NotConformant": ("convwitness.api", "NotConformant"),
}


def __getattr__(name: str):
    if name in _LAZY:
        import importlib
        module, attr = _LAZY[name]
        value = getattr(importlib.import_module(module), attr)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'convwitness' has no attribute {name!r}")


__all__ = [
    "certify", "Report", "NotConformant",
    "Suite", "Needs", "specs", "cases", "examples", "load_case",
    "Adapter", "AdapterLoadError", "AdapterOutputError", "AdapterUnavailable", "Bound",
    "Capabilities", "CaseFileError", "ConvSpec", "ConvWitnessError", "ErrorModel", "FormatError",
    "SpecError", "derive", "gamma", "load_adapter", "unit_roundoff", "wrap", "__version__",
]
