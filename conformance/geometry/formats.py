"""Number formats: their parameters, unit roundoff and conversion.

The parameters are those of IEEE 754-2019 (binary16/32/64), of bfloat16, and of the
OCP 8-bit Floating Point Specification (OFP8) Rev. 1.0, Table 1 (E4M3, E5M2). The
unit roundoff of a format with ``p`` significant bits (``nmant = p - 1`` stored) is
``u = 2**-p = 2**-(nmant + 1)``; note that ``numpy.finfo(t).eps`` is ``2u``.

Storage formats are numpy dtypes (float16/32/64) or ml_dtypes dtypes (bfloat16,
float8_e4m3fn, float8_e5m2; the ``lowp`` extra). ``tf32`` is an operand-reading mode,
not a storage format: it may appear in an error model, never as a ConvSpec dtype.
"""
from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

import numpy as np

from ..errors import FormatError

__all__ = [
    "Format", "FORMATS", "STORAGE_FORMATS", "get_format", "unit_roundoff",
    "numpy_dtype", "to_format", "available", "dtype_name",
]


@dataclass(frozen=True)
class Format:
    """Parameters of one binary floating-point format."""

    name: str
    nmant: int            # stored mantissa bits (precision p = nmant + 1)
    nexp: int             # exponent bits
    max: float            # largest finite value
    tiny: float           # smallest positive normal
    smallest_subnormal: float
    has_inf: bool
    storage: bool         # usable as a ConvSpec dtype
    module: str           # "numpy", "ml_dtypes" or "" (no storage type)

    @property
    def precision(self) -> int:
        """Significant bits p, the implicit bit included."""
        return self.nmant + 1

    @property
    def u(self) -> float:
        """Unit roundoff 2**-p of round-to-nearest."""
        return 2.0 ** -(self.nmant + 1)


FORMATS: dict[str, Format] = {
    f.name: f
    for f in (
        Format("float64", 52, 11, 1.7976931348623157e308, 2.0**-1022, 2.0**-1074, True, True, "numpy"),
        Format("float32", 23, 8, 3.4028234663852886e38, 2.0**-126, 2.0**-149, True, True, "numpy"),
        Format("float16", 10, 5, 65504.0, 2.0**-14, 2.0**-24, True, True, "numpy"),
        Format("bfloat16", 7, 8, 3.3895313892515355e38, 2.0**-126, 2.0**-133, True, True, "ml_dtypes"),
        Format("float8_e4m3fn", 3, 4, 448.0, 2.0**-6, 2.0**-9, False, True, "ml_dtypes"),
        Format("float8_e5m2", 2, 5, 57344.0, 2.0**-14, 2.0**-16, True, True, "ml_dtypes"),
        Format("tf32", 10, 8, 3.4011621342146535e38, 2.0**-126, 2.0**-136, True, False, ""),
    )
}
STORAGE_FORMATS = tuple(n for n, f in FORMATS.items() if f.storage)


def get_format(name: str) -> Format:
    """The Format called ``name``; a clear error naming the known ones otherwise."""
    try:
        return FORMATS[name]
    except (KeyError, TypeError):
        raise FormatError(
            f"unknown number format {name!r}; expected one of {', '.join(FORMATS)}"
        ) from None


def unit_roundoff(name: str) -> float:
    """u = 2**-(nmant+1) of the named format (``finfo.eps`` is 2u)."""
    return get_format(name).u


@lru_cache(maxsize=None)
def numpy_dtype(name: str) -> np.dtype:
    """The numpy dtype that stores the named format."""
    fmt = get_format(name)
    if not fmt.storage:
        raise FormatError(
            f"format {name!r} is an operand-reading mode, not a storage dtype; "
            f"use one of {', '.join(STORAGE_FORMATS)} as a dtype"
        )
    if fmt.module == "numpy":
        return np.dtype(name)
    try:
        import ml_dtypes
    except ImportError:
        raise FormatError(
            f"dtype {name!r} needs the ml_dtypes package, which is not installed; "
            "fix: pip install 'convwitness[lowp]'"
        ) from None
    return np.dtype(getattr(ml_dtypes, name))


def dtype_by_name(name: str) -> np.dtype:
    """The numpy dtype called ``name``: numpy's own names, then ml_dtypes' (bfloat16,
    float8_e4m3fn, ...). TypeError when neither knows the name."""
    try:
        return np.dtype(name)
    except TypeError:
        try:
            import ml_dtypes
            return np.dtype(getattr(ml_dtypes, name))
        except (ImportError, AttributeError, TypeError):
            raise TypeError(f"no numpy or ml_dtypes dtype is called {name!r}") from None


def available(name: str) -> bool:
    """Whether the named storage format can be used on this machine."""
    try:
        numpy_dtype(name)
    except FormatError:
        return False
    return True


def dtype_name(dtype) -> str:
    """The format name of a numpy dtype (inverse of numpy_dtype)."""
    dt = np.dtype(dtype)
    for name in STORAGE_FORMATS:
        if FORMATS[name].module == "numpy" and dt == np.dtype(name):
            return name
    if dt.name in FORMATS:
        return dt.name
    return str(dt)


def to_format(values, name: str) -> np.ndarray:
    """Round float64 ``values`` to the named storage format (round to nearest even).

    Overflow follows the format's own conversion: inf where the format has one; for
    E4M3 (no infinity) NaN, the non-saturating conversion of OFP8 Rev. 1.0.
    """
    return np.asarray(values, dtype=np.float64).astype(numpy_dtype(name))


def round_operand(values, name: str) -> np.ndarray:
    """Round float64 ``values`` to the named format and back to float64.

    Works for operand-reading modes too: ``tf32`` keeps 10 stored mantissa bits of a
    float32 value (round to nearest even on the bit pattern).
    """
    fmt = get_format(name)
    v = np.asarray(values, dtype=np.float64)
    if fmt.storage:
        return v.astype(numpy_dtype(name)).astype(np.float64)
    # tf32: round a float32 to 10 stored mantissa bits.
    bits = v.astype(np.float32).view(np.uint32).astype(np.uint64)
    drop = 23 - fmt.nmant
    half = np.uint64(1 << (drop - 1))
    lsb = (bits >> np.uint64(drop)) & np.uint64(1)
    finite = np.isfinite(v)
    rounded = ((bits + half - np.uint64(1) + lsb) >> np.uint64(drop)) << np.uint64(drop)
    out = np.where(finite, rounded, bits).astype(np.uint32).view(np.float32)
    return out.astype(np.float64)
