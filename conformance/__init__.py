"""convwitness: certify convolution-layer implementations.

The public face. Optional backends (torch, jax, onnxruntime, scipy, ml_dtypes) are
never imported here; built-in adapters import their library when they are loaded.
"""
from __future__ import annotations

from .bounds import Bound, ErrorModel, derive, gamma
from .capabilities import Capabilities
from .contract import Adapter, wrap
from .errors import (AdapterLoadError, AdapterOutputError, AdapterUnavailable, CaseFileError,
                     ConvWitnessError, FormatError, SpecError)
from .formats import unit_roundoff
from .loading import load_adapter
from .spec import ConvSpec

__version__ = "0.1.0"

__all__ = [
    "Adapter", "AdapterLoadError", "AdapterOutputError", "AdapterUnavailable", "Bound",
    "Capabilities", "CaseFileError", "ConvSpec", "ConvWitnessError", "ErrorModel", "FormatError",
    "SpecError", "derive", "gamma", "load_adapter", "unit_roundoff", "wrap", "__version__",
]
