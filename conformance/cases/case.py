"""Case: a ConvSpec with concrete arrays, and its file form.

A case is saved as two files side by side: ``NAME.npz`` holds the arrays (loaded
with ``allow_pickle=False``; formats numpy cannot store natively, such as bfloat16
and float8, are stored as their raw bit patterns) and ``NAME.json`` holds the spec,
how the values were drawn and any extra fields (the invariant, the seed, ...).
"""
from __future__ import annotations

import json
import os
import zipfile
from dataclasses import dataclass, field

import numpy as np

from ..errors import CaseFileError, SpecError
from ..geometry.formats import FORMATS, numpy_dtype
from ..geometry.quant import QuantSpec
from ..geometry.spec import ConvSpec

__all__ = ["Case", "QCase", "CASE_FORMAT", "load_case", "load_qcase"]

CASE_FORMAT = "convwitness-case/1"
_ARRAYS = ("x", "w", "b", "grad_y")
_BITS = {1: np.uint8, 2: np.uint16, 4: np.uint32, 8: np.uint64}


@dataclass(frozen=True)
class Case:
    """A spec plus arrays: x, w, b (None without bias) and the upstream gradient."""

    spec: ConvSpec
    x: np.ndarray = field(repr=False)
    w: np.ndarray = field(repr=False)
    b: np.ndarray | None = field(repr=False, default=None)
    grad_y: np.ndarray | None = field(repr=False, default=None)
    kind: str = "uniform"
    seed: int = 0
    note: str = ""

    def __post_init__(self):
        spec = self.spec
        dt = numpy_dtype(spec.dtype)
        for name, shape in (("x", spec.x_shape), ("w", spec.w_shape), ("b", spec.b_shape),
                            ("grad_y", spec.y_shape)):
            a = getattr(self, name)
            if a is None:
                if name == "b" and spec.bias:
                    raise SpecError("Case: spec.bias is True but b is None; pass b or set bias=False")
                continue
            if name == "b" and not spec.bias:
                raise SpecError("Case: spec.bias is False but b was given; drop b or set bias=True")
            if not isinstance(a, np.ndarray) or a.shape != tuple(shape) or a.dtype != dt:
                got = (f"shape={getattr(a, 'shape', None)} dtype={getattr(a, 'dtype', type(a).__name__)}")
                raise SpecError(f"Case: {name} expected shape={tuple(shape)} dtype={spec.dtype}, got {got}")

    def arrays(self) -> dict:
        return {n: getattr(self, n) for n in _ARRAYS if getattr(self, n) is not None}

    def _repr_pretty_(self, p, cycle):
        """How hypothesis prints a case (each explicit example, a falsifying one): the
        dataclass repr (spec, kind, seed, note), not every array element. The seed refills
        the arrays and a witness file keeps them; printing them cost about 9 ms per
        explicit example, even under ``Verbosity.quiet``."""
        p.text(repr(self))

    # -- files -------------------------------------------------------------------------
    def save(self, base: str, **extra) -> tuple[str, str]:
        """Write ``base.npz`` and ``base.json``; returns both paths."""
        os.makedirs(os.path.dirname(os.path.abspath(base)), exist_ok=True)
        store = {}
        for name, a in self.arrays().items():
            if FORMATS[self.spec.dtype].module != "numpy":
                a = a.view(_BITS[a.dtype.itemsize])
            store[name] = np.ascontiguousarray(a)
        npz, meta = base + ".npz", base + ".json"
        tmp = npz + ".tmp"
        with open(tmp, "wb") as fh:
            np.savez(fh, **store)
        os.replace(tmp, npz)
        doc = {"format": CASE_FORMAT, "spec": self.spec.to_dict(), "kind": self.kind,
               "seed": self.seed, "note": self.note, "arrays": sorted(store)}
        doc.update(extra)
        with open(meta + ".tmp", "w", encoding="utf-8") as fh:
            json.dump(doc, fh, indent=2, sort_keys=True)
        os.replace(meta + ".tmp", meta)
        return npz, meta

    @classmethod
    def load(cls, path: str) -> tuple["Case", dict]:
        return load_case(path)


def load_case(path: str) -> tuple[Case, dict]:
    """Read a case from ``NAME.json`` / ``NAME.npz`` (either path, or NAME); returns (case, meta)."""
    base = path[:-5] if path.endswith(".json") else path[:-4] if path.endswith(".npz") else path
    meta_path, npz_path = base + ".json", base + ".npz"
    for p in (meta_path, npz_path):
        if not os.path.isfile(p):
            raise CaseFileError(f"witness file {p!r} does not exist; a witness is a NAME.json + "
                                "NAME.npz pair written by `convwitness run`")
    try:
        with open(meta_path, encoding="utf-8") as fh:
            meta = json.load(fh)
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise CaseFileError(f"witness file {meta_path!r} is not valid JSON ({exc}); it is corrupt, "
                            "regenerate it with `convwitness run`") from None
    if not isinstance(meta, dict) or meta.get("format") != CASE_FORMAT:
        got = meta.get("format") if isinstance(meta, dict) else type(meta).__name__
        raise CaseFileError(f"witness file {meta_path!r}: expected format {CASE_FORMAT!r}, got "
                            f"{got!r}; this is not a convwitness witness (or from another version)")
    try:
        spec = ConvSpec.from_dict(meta["spec"])
    except (KeyError, SpecError, TypeError) as exc:
        raise CaseFileError(f"witness file {meta_path!r}: its spec is invalid ({exc})") from None
    try:
        with np.load(npz_path, allow_pickle=False) as data:
            arrays = {k: data[k] for k in data.files}
    except (zipfile.BadZipFile, ValueError, OSError, EOFError) as exc:
        raise CaseFileError(f"witness file {npz_path!r} is not a readable .npz ({exc}); it is "
                            "corrupt, regenerate it with `convwitness run`") from None
    if meta.get("quant"):
        return load_qcase(meta, arrays, npz_path), meta     # a quantized case
    dt = numpy_dtype(spec.dtype)
    out = {}
    for name in _ARRAYS:
        if name in arrays:
            a = arrays[name]
            if FORMATS[spec.dtype].module != "numpy":
                if a.dtype != _BITS[dt.itemsize]:
                    raise CaseFileError(f"witness {npz_path!r}: array {name} has dtype {a.dtype}, "
                                        f"expected the raw {dt.itemsize}-byte bits of {spec.dtype}")
                a = a.view(dt)
            out[name] = a
    if "x" not in out or "w" not in out:
        raise CaseFileError(f"witness {npz_path!r}: arrays {sorted(arrays)} lack x or w")
    try:
        case = Case(spec, out["x"], out["w"], out.get("b"), out.get("grad_y"),
                    meta.get("kind", "uniform"), int(meta.get("seed", 0)), meta.get("note", ""))
    except SpecError as exc:
        raise CaseFileError(f"witness {npz_path!r} does not match its spec: {exc}") from None
    return case, meta


@dataclass(frozen=True)
class QCase:
    """A QuantSpec plus arrays x (int8/uint8), w (int8), b (int32 or float32, or None)."""

    spec: QuantSpec
    x: np.ndarray = field(repr=False)
    w: np.ndarray = field(repr=False)
    b: np.ndarray | None = field(repr=False, default=None)
    kind: str = "uniform"
    seed: int = 0
    note: str = ""
    grad_y = None

    def __post_init__(self):
        s = self.spec
        bdt = {"int32": "int32", "float": "float32"}.get(s.bias)
        for name, shape, dt in (("x", s.x_shape, s.x_dtype), ("w", s.w_shape, s.w_dtype),
                                ("b", (s.out_channels,), bdt)):
            a = getattr(self, name)
            if a is None and dt is None:
                continue
            if not isinstance(a, np.ndarray) or a.shape != tuple(shape) or a.dtype != np.dtype(dt):
                got = f"shape={getattr(a, 'shape', None)} dtype={getattr(a, 'dtype', type(a).__name__)}"
                raise SpecError(f"QCase: {name} expected shape={tuple(shape)} dtype={dt}, got {got}")

    def arrays(self) -> dict:
        return {n: getattr(self, n) for n in ("x", "w", "b") if getattr(self, n) is not None}

    def save(self, base: str, **extra) -> tuple[str, str]:
        """Write ``base.npz`` and ``base.json`` (the case format, with a ``quant`` field)."""
        os.makedirs(os.path.dirname(os.path.abspath(base)), exist_ok=True)
        npz, meta = base + ".npz", base + ".json"
        with open(npz + ".tmp", "wb") as fh:
            np.savez(fh, **self.arrays())
        os.replace(npz + ".tmp", npz)
        doc = {"format": CASE_FORMAT, "spec": self.spec.conv.to_dict(), "quant": self.spec.to_dict(),
               "kind": self.kind, "seed": self.seed, "note": self.note, "arrays": sorted(self.arrays())}
        doc.update(extra)
        with open(meta + ".tmp", "w", encoding="utf-8") as fh:
            json.dump(doc, fh, indent=2, sort_keys=True)
        os.replace(meta + ".tmp", meta)
        return npz, meta


def load_qcase(meta: dict, arrays: dict, where: str) -> QCase:
    """The QCase of a witness (``meta`` its JSON, ``arrays`` its .npz contents)."""
    try:
        spec = QuantSpec.from_dict(meta["quant"])
        return QCase(spec, arrays["x"], arrays["w"], arrays.get("b"), meta.get("kind", "uniform"),
                     int(meta.get("seed", 0)), meta.get("note", ""))
    except (KeyError, SpecError, TypeError) as exc:
        raise CaseFileError(f"witness {where!r}: its quantized case is invalid ({exc}); "
                            "regenerate it with `convwitness run`") from None
