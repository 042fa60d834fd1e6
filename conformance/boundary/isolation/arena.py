"""Shared-memory arenas: how arrays cross between the runner and its worker.

An arena is a file in ``/dev/shm`` (a temporary folder elsewhere) mapped by both
processes. ``pack`` writes numpy arrays into it (64-byte aligned) and returns a small
header; ``unpack`` rebuilds them. A non-contiguous view (a step slice, a channel
slice, permuted storage) keeps its strides on the way, so an implementation in the
worker sees the same kind of array the invariant passed. Values that are not arrays (None, lists, an
adapter's mistaken return value) travel in the header: small built-in values as
themselves, anything else as a description, so the contract check can still say
exactly what came.
"""
from __future__ import annotations

import mmap
import os
import pickle
import tempfile
import uuid

import numpy as np

from ...geometry.formats import dtype_by_name

__all__ = ["Arena", "pack", "unpack", "Foreign", "describe_foreign", "copy_keeping_strides"]

_ALIGN = 64
_DIR = "/dev/shm" if os.path.isdir("/dev/shm") and os.access("/dev/shm", os.W_OK) else tempfile.gettempdir()


class Arena:
    """A growable shared-memory region identified by its file name."""

    def __init__(self, name: str, size: int, fd: int, owner: bool):
        self.name, self.size, self._fd, self.owner = name, size, fd, owner
        self.map = mmap.mmap(fd, max(size, 1))

    @classmethod
    def create(cls, prefix: str = "arena", size: int = 1 << 16) -> "Arena":
        name = os.path.join(_DIR, f"convwitness-{prefix}-{os.getpid()}-{uuid.uuid4().hex[:8]}")
        fd = os.open(name, os.O_CREAT | os.O_EXCL | os.O_RDWR, 0o600)
        os.ftruncate(fd, size)
        return cls(name, size, fd, owner=True)

    @classmethod
    def attach(cls, name: str, size: int) -> "Arena":
        fd = os.open(name, os.O_RDWR)
        return cls(name, size, fd, owner=False)

    def ensure(self, size: int) -> None:
        """Grow (owner only) to at least ``size`` bytes, under a new name."""
        if size <= self.size:
            return
        new = max(size, 2 * self.size)
        old = self.name
        self.close()
        os.unlink(old)
        self.name = os.path.join(_DIR, f"convwitness-grow-{os.getpid()}-{uuid.uuid4().hex[:8]}")
        self._fd = os.open(self.name, os.O_CREAT | os.O_EXCL | os.O_RDWR, 0o600)
        os.ftruncate(self._fd, new)
        self.size = new
        self.map = mmap.mmap(self._fd, new)

    def close(self):
        """Idempotent: a second close must not close a descriptor number the process has
        since given to someone else (a socket of a Dask worker, say)."""
        try:
            self.map.close()
        except (BufferError, ValueError):
            pass
        # once only: a second os.close() on the same number would close whatever file
        # the process opened with it since (a ProcessAdapter closed, then collected)
        fd, self._fd = self._fd, -1
        if fd < 0:
            return
        try:
            os.close(fd)
        except OSError:
            pass

    def unlink(self):
        self.close()
        if self.owner:
            Arena.remove(self.name)

    @staticmethod
    def remove(name: str):
        try:
            os.unlink(name)
        except OSError:
            pass


class Foreign:
    """Stands for a non-array value the worker could not send as itself."""

    def __init__(self, text: str):
        self.text = text

    def __convwitness_describe__(self) -> str:
        return self.text

    def __repr__(self) -> str:
        return f"<{self.text}>"


def describe_foreign(value) -> str:
    mod, name = type(value).__module__, type(value).__qualname__
    shape = getattr(value, "shape", None)
    extra = f" shape={tuple(shape)}" if shape is not None else ""
    if hasattr(value, "dtype"):
        extra += f" dtype={value.dtype}"
    return (f"{mod}.{name}" if mod != "builtins" else name) + extra


def _plain(value) -> bool:
    if value is None or isinstance(value, (bool, int, float, str)):
        return True
    if isinstance(value, (list, tuple)) and len(value) <= 64:
        return all(_plain(v) for v in value)
    return False


def _view_strides(a: np.ndarray):
    """The strides of a non-contiguous, non-overlapping view with positive strides (and
    the bytes it spans), or None where a packed copy is all that can travel."""
    if a.flags.c_contiguous or a.size == 0 or any(s <= 0 for s in a.strides):
        return None
    extent = a.itemsize
    for stride, n in sorted(zip(a.strides, a.shape)):
        if n == 1:
            continue
        if stride < extent:                      # elements overlap (a broadcast-like view)
            return None
        extent = stride * n
    span = sum((n - 1) * s for n, s in zip(a.shape, a.strides)) + a.itemsize
    return tuple(a.strides), span


def copy_keeping_strides(a: np.ndarray) -> np.ndarray:
    """A fresh copy of ``a``; a non-contiguous view is copied into a view with the same
    strides over a zeroed buffer of its own (``ndarray.copy`` would pack it)."""
    kept = _view_strides(a)
    if kept is None:
        return a.copy()
    strides, span = kept
    base = np.zeros(span, dtype=np.uint8)
    out = np.ndarray(a.shape, dtype=a.dtype, buffer=base, strides=strides)
    np.copyto(out, a, casting="no")
    return out


def pack(arena: Arena, items) -> list:
    """Write the arrays among ``items`` into ``arena``; returns the header."""
    kept = [_view_strides(it) if isinstance(it, np.ndarray) else None for it in items]
    sizes = [(_ALIGN + (k[1] if k else it.nbytes)) if isinstance(it, np.ndarray) else 0
             for it, k in zip(items, kept)]
    arena.ensure(sum(sizes) + _ALIGN)
    header, offset = [], 0
    for it, k in zip(items, kept):
        if isinstance(it, np.ndarray):
            offset = -(-offset // _ALIGN) * _ALIGN
            view = np.ndarray(it.shape, dtype=it.dtype, buffer=arena.map, offset=offset,
                              strides=k[0] if k else None)
            np.copyto(view, it, casting="no")
            header.append(("array", offset, _code(it.dtype), it.shape) + ((k[0],) if k else ()))
            offset += k[1] if k else it.nbytes
        elif _plain(it):
            header.append(("value", pickle.dumps(it)))
        else:
            header.append(("foreign", describe_foreign(it)))
    return header


def _code(dt: np.dtype) -> str:
    """A dtype's name where numpy cannot rebuild it from its str (ml_dtypes formats)."""
    try:
        if np.dtype(dt.str) == dt:
            return dt.str
    except TypeError:
        pass
    return dt.name


def _dtype(code: str) -> np.dtype:
    return dtype_by_name(code)


def unpack(arena: Arena, header, copy: bool = True) -> list:
    out = []
    for entry in header:
        kind = entry[0]
        if kind == "array":
            offset, code, shape = entry[1:4]
            strides = tuple(entry[4]) if len(entry) > 4 else None
            a = np.ndarray(tuple(shape), dtype=_dtype(code), buffer=arena.map, offset=offset,
                           strides=strides)
            out.append(copy_keeping_strides(a) if copy else a)
        elif kind == "value":
            out.append(pickle.loads(entry[1]))
        else:
            out.append(Foreign(entry[1]))
    return out
