"""The cwire/1 codec: framing, array descriptors and the shared region.

A message (either direction; docs/wire-protocol.md has the full text) is the magic
b"CW/1", a u32 little-endian header length H, H bytes of UTF-8 JSON (an object with
"type" and "arrays"), then the raw little-endian bytes of each listed array that has no
"offset" (those lie in the shared region), in order. A descriptor is {"name", "dtype",
"shape", "nbytes"[, "offset"]}, nbytes = prod(shape) * itemsize. Errors name the byte
offset or field: WireFormatError (malformed), WireEOF (the stream ended), WireTimeout.
"""
from __future__ import annotations

import json
import math
import struct
from functools import lru_cache

import numpy as np

from ...geometry.formats import dtype_by_name
from .transport import Reader, Region, WireEOF, WireFormatError, WireTimeout, a_bytes, write_all

__all__ = ["PROTOCOL", "MAGIC", "PREFIX", "MAX_HEADER", "WireFormatError", "WireEOF",
           "WireTimeout", "Reader", "encode", "write_all", "dtype_of", "dtype_name",
           "read_message", "Region"]

PROTOCOL = "cwire/1"
MAGIC = b"CW/1"
PREFIX = struct.Struct("<4sI")
MAX_HEADER = 16 << 20          # a header longer than 16 MiB is taken for garbage


# -- dtypes ---------------------------------------------------------------------------
@lru_cache(maxsize=None)
def dtype_of(name: str) -> np.dtype:
    """The little-endian numpy dtype called ``name`` on the wire (KeyError if unknown)."""
    try:
        dt = dtype_by_name(name) if isinstance(name, str) and name else None
    except TypeError:
        dt = None
    if dt is None or dt.name != name or dt.kind not in "biufcV" or dt.fields or dt.subdtype:
        raise KeyError(name)
    return dt.newbyteorder("<") if dt.itemsize > 1 else dt


def dtype_name(dt: np.dtype) -> str:
    """The wire name of a dtype: numpy's own name (float32, int64, bool, bfloat16, ...)."""
    dt = np.dtype(dt)
    try:
        return dtype_of(dt.name).name
    except KeyError:
        raise WireFormatError(f"cwire cannot carry dtype {dt!r}: only plain numeric dtypes "
                              "(bool, ints, floats, complex, ml_dtypes floats) travel") from None


def _le(a: np.ndarray) -> np.ndarray:
    a = np.asarray(a)
    if a.dtype.itemsize > 1 and a.dtype.byteorder == ">":
        a = a.astype(a.dtype.newbyteorder("<"))
    if not a.flags.c_contiguous:
        a = np.ascontiguousarray(a).reshape(a.shape)   # (ascontiguousarray makes 0-d 1-d)
    return a


def _bytes_view(a: np.ndarray) -> memoryview:
    """A flat byte view of a C-contiguous array of any dtype (ml_dtypes included)."""
    return memoryview(a.reshape(-1).view(np.uint8))


def encode(header: dict, arrays=(), region=None, region_from: int = 0):
    """(buffers of one message, first free region byte) for (name, ndarray) ``arrays``.

    With a :class:`Region`, arrays of ``region.threshold`` bytes or more are copied into
    it from ``region_from`` on, 64-byte aligned, and described with ``"offset"``.
    """
    descs, tail, end = [], [], region_from
    for name, a in arrays:
        a = _le(a)
        d = {"name": name, "dtype": dtype_name(a.dtype), "shape": list(a.shape),
             "nbytes": int(a.nbytes)}
        if region is not None and a.nbytes >= region.threshold and end + a.nbytes <= region.size:
            region.put(end, a)
            d["offset"] = end
            end = _align(end + a.nbytes)
        elif a.nbytes:
            tail.append(_bytes_view(a))
        descs.append(d)
    header = dict(header, arrays=descs)
    if region is not None:
        header["region_size"], header["region_free"] = region.size, _align(end)
    raw = json.dumps(header, separators=(",", ":"), allow_nan=False).encode("utf-8")
    return [PREFIX.pack(MAGIC, len(raw)), raw, *tail], _align(end)


def _align(n: int, to: int = 64) -> int:
    return (n + to - 1) // to * to


def _fail(msg_no: int, text: str):
    raise WireFormatError(f"message {msg_no}: {text}")


def read_header(reader: Reader) -> tuple[dict, int]:
    """The header of the next message (magic, length and JSON checked) and its number."""
    reader.msg_start = reader.consumed
    no = reader.messages + 1
    start = reader.consumed
    reader._fill(len(MAGIC))
    got = reader.peek(len(MAGIC))
    if got != MAGIC[:len(got)] or (len(got) == len(MAGIC) and got != MAGIC):
        raise WireFormatError(f"expected magic {MAGIC!r} at byte 0 of message {no} (stream byte "
                              f"{start}), got {got!r} (the stream there reads {reader.peek(32)!r}); "
                              "the program must write nothing but cwire messages on stdout "
                              "(send logs to stderr)")
    magic, length = PREFIX.unpack(reader._take(PREFIX.size, "the length prefix"))
    if length > MAX_HEADER:
        _fail(no, f"header length {length} at bytes 4-7 exceeds the {MAX_HEADER >> 20} MiB limit; "
                  "expected a u32 little-endian length of the JSON header")
    raw = reader._take(length, f"the {length}-byte header")
    try:
        text = raw.decode("utf-8")
        header = json.loads(text)
    except UnicodeDecodeError as exc:
        _fail(no, f"header is not UTF-8: byte {PREFIX.size + exc.start} of the message is "
                  f"{raw[exc.start:exc.start + 1]!r}")
    except json.JSONDecodeError as exc:
        _fail(no, f"header is not JSON: {exc.msg} at header char {exc.pos} (message byte "
                  f"~{PREFIX.size + exc.pos}): {text[max(0, exc.pos - 20):exc.pos + 20]!r}")
    if not isinstance(header, dict):
        _fail(no, f"header must be a JSON object, got {type(header).__name__}")
    return header, no


def _nonneg_int(v) -> bool:
    return isinstance(v, int) and not isinstance(v, bool) and v >= 0


def check_descs(header: dict, no: int, max_bytes: int) -> list:
    """The validated array descriptors of a header: (name, dtype, shape, offset)."""
    descs = header.get("arrays", [])
    if not isinstance(descs, list):
        _fail(no, f"header field 'arrays' must be a list, got {type(descs).__name__}")
    out, seen, total = [], set(), 0
    for i, d in enumerate(descs):
        f = f"header field arrays[{i}]"
        if not isinstance(d, dict):
            _fail(no, f"{f} must be an object {{name, dtype, shape, nbytes}}, got {d!r}")
        name, shape, nbytes, offset = (d.get(k) for k in ("name", "shape", "nbytes", "offset"))
        if not isinstance(name, str) or not name or name in seen:
            _fail(no, f"{f}.name must be a non-empty string, not repeated; got {name!r}")
        seen.add(name)
        try:
            dt = dtype_of(d.get("dtype"))
        except (KeyError, TypeError):
            _fail(no, f"{f}.dtype {d.get('dtype')!r} ({name}) is not a dtype name numpy knows "
                      "(float32, float64, int64, ...)")
        if not isinstance(shape, list) or not all(_nonneg_int(n) for n in shape):
            _fail(no, f"{f}.shape ({name}) must be a list of non-negative ints, got {shape!r}")
        need = math.prod(shape) * dt.itemsize
        if nbytes != need or isinstance(nbytes, bool):
            _fail(no, f"{f}.nbytes ({name}) is {nbytes!r}, but shape {shape} of {dt.name} needs "
                      f"{need} bytes")
        total += need
        if total > max_bytes:
            _fail(no, f"{f} ({name}): the arrays add up to {total} bytes, over the limit {max_bytes}")
        if offset is not None and not _nonneg_int(offset):
            _fail(no, f"{f}.offset ({name}) must be a non-negative int, got {offset!r}")
        out.append((name, dt, tuple(shape), offset))
    return out


def read_message(reader: Reader, region: Region | None = None, *, region_free: int = 0,
                 max_bytes: int = 1 << 40, copy_region: bool = True, on_header=None):
    """(header, {name: ndarray}, message number) of the next message.

    Inline arrays are read straight into fresh arrays; region arrays are copied out
    (``copy_region``) or returned as views into the region. ``on_header(header, no)``
    runs before the arrays are read (the serving side maps the region there).
    """
    header, no = read_header(reader)
    descs = check_descs(header, no, max_bytes)
    if on_header is not None:
        region = on_header(header, no)
    arrays, spans = {}, []
    for i, (name, dt, shape, offset) in enumerate(descs):
        if offset is None:
            a = np.empty(shape, dt)
            if a.nbytes:
                reader._into(_bytes_view(a), f"array {name!r} (arrays[{i}])")
        else:
            end, f = offset + a_bytes(dt, shape), f"header field arrays[{i}].offset ({name})"
            if region is None or region.map is None:
                _fail(no, f"{f} refers to the shared region, but none was set up")
            if offset < region_free or end > region.size:
                _fail(no, f"{f}: bytes {offset}..{end} lie outside the free part "
                          f"{region_free}..{region.size} of the region")
            if any(offset < hi and lo < end for lo, hi in spans):
                _fail(no, f"{f} overlaps another array of the reply")
            spans.append((offset, end))
            a = region.view(offset, dt, shape)
            a = a.copy() if copy_region else a
        arrays[name] = a
    reader.messages += 1
    return header, arrays, no

