"""Serve any adapter over cwire/1 on stdin/stdout.

    python -m convwitness.serve SPEC [--name NAME]

SPEC is any ``--adapter`` form (a built-in name, ``package.module:attr``,
``path/to/file.py:attr``). Then ``convwitness run --adapter "exec:python -m
convwitness.serve SPEC"`` certifies the same implementation across an interpreter
boundary, through exactly the path a foreign port takes.

The protocol channel is kept clean: before the adapter is loaded, the real stdout is
moved to a private descriptor and file descriptor 1 (and ``sys.stdout``) point at
stderr, so anything the adapter prints (from Python or from native code) lands on
stderr, where the client keeps it. Standard input is likewise taken over and replaced
by /dev/null.
"""
from __future__ import annotations

import argparse
import os
import sys
import traceback

import numpy as np

from .codec import (PROTOCOL, Reader, Region, WireEOF, WireFormatError, encode,
                         read_message, write_all)

__all__ = ["main", "serve"]


def _take_channel() -> tuple[int, int]:
    """(protocol in, protocol out): private copies of fds 0 and 1; 0 <- /dev/null, 1 <- 2."""
    sys.stdout.flush()
    proto_in, proto_out = os.dup(0), os.dup(1)
    null = os.open(os.devnull, os.O_RDONLY)
    os.dup2(null, 0)
    os.close(null)
    os.dup2(2, 1)
    sys.stdout = sys.stderr
    return proto_in, proto_out


def _kwargs(params: dict, method: str) -> dict:
    kw = {"stride": tuple(params["stride"]),
          "padding": tuple(tuple(p) for p in params["padding"]),
          "dilation": tuple(params["dilation"]), "groups": int(params["groups"])}
    if params.get("layout", "channels_first") != "channels_first":
        kw["layout"] = params["layout"]
    quant = params.get("quant") if method == "quantized" else None
    if method == "transposed" or (isinstance(quant, dict) and quant.get("transposed")):
        kw["output_padding"] = tuple(params.get("output_padding") or (0,) * len(kw["stride"]))
    if method == "quantized":
        kw.update(_quant_kwargs(quant))
        if quant.get("transposed"):
            kw["transposed"] = True
    return kw


def _quant_kwargs(q) -> dict:
    """``params["quant"]`` as the keywords of ``quantized()`` (boundary/contract.py
    ``quant_kwargs``: tuples for w_scale, w_zero_point and clamp)."""
    from .messages import QUANT_FIELDS
    q = q if isinstance(q, dict) else {}
    missing = [k for k in QUANT_FIELDS if k not in q]
    if missing:
        raise ValueError(f"params.quant lacks {', '.join(missing)}; a quantized call carries "
                         f"{', '.join(QUANT_FIELDS)} (docs/wire-protocol.md)")
    kw = {k: q[k] for k in QUANT_FIELDS}
    for k in ("w_scale", "w_zero_point", "clamp"):
        if kw[k] is not None:
            kw[k] = tuple(kw[k])
    return kw


def _kind(value) -> str:
    if value is None:
        return "None"
    if isinstance(value, (list, tuple)):
        return f"{type(value).__name__} of length {len(value)}"
    return f"{type(value).__module__}.{type(value).__qualname__}"


class _Unusable(Exception):
    """A result the protocol cannot carry (not a numpy array)."""


def _arrays(method: str, result) -> list:
    if method == "backward":
        if not isinstance(result, (tuple, list)) or len(result) != 3:
            raise _Unusable(f"backward: expected a tuple (grad_x, grad_w, grad_b), got {_kind(result)}")
        named = list(zip(("grad_x", "grad_w", "grad_b"), result))
        named = [(n, a) for n, a in named if not (n == "grad_b" and a is None)]
    else:
        named = [("y", result)]
    for name, a in named:
        if not isinstance(a, np.ndarray):
            raise _Unusable(f"{method}: {name} expected a numpy.ndarray, got {_kind(a)}")
    return named


def serve(adapter, proto_in: int = 0, proto_out: int = 1) -> int:
    """Answer requests until end of input; returns the exit status."""
    methods = {"forward": adapter._forward, "backward": adapter._backward,
               "transposed": adapter._transposed, "quantized": adapter._quantized}
    hello = {"type": "hello", "protocol": PROTOCOL, "name": adapter.name,
             "version": adapter.version, "capabilities": adapter.capabilities.to_dict(),
             "carriers": ["inline", "region"]}
    write_all(proto_out, encode(hello)[0])
    reader = Reader(proto_in, "the client")
    state = {"region": None}

    def map_region(header, no):
        region = state["region"]
        size = header.get("region_size")
        if region is not None and isinstance(size, int) and size:
            region.remap(size)
        return region

    while True:
        try:
            header, arrays, no = read_message(reader, copy_region=False, on_header=map_region)
        except WireEOF as exc:
            if exc.at_boundary:
                return 0
            print(f"convwitness.serve: {exc}", file=sys.stderr)
            return 1
        except WireFormatError as exc:
            print(f"convwitness.serve: the client broke the protocol: {exc}", file=sys.stderr)
            return 2
        kind = header.get("type")
        if kind == "region":
            try:
                state["region"] = Region.open(header["path"], int(header["size"]))
                reply = {"type": "region-ok"}
            except (KeyError, OSError, ValueError) as exc:
                reply = {"type": "error", "message": f"cannot map the region: {exc}"}
            write_all(proto_out, encode(reply)[0])
            continue
        call_id = header.get("id")
        method = header.get("method")
        fn = methods.get(method) if kind == "call" else None
        reply, out = {"type": "result", "id": call_id}, []
        if kind != "call":
            reply = {"type": "error", "id": call_id, "message": f"unknown message type {kind!r}"}
        elif fn is None:
            reply = {"type": "error", "id": call_id,
                     "message": f"{adapter.name} offers no {method}()"}
        else:
            try:
                args = [arrays.get("x"), arrays.get("w"), arrays.get("b")]
                if method == "backward":
                    args.append(arrays.get("grad_y"))
                out = _arrays(method, fn(*args, **_kwargs(header["params"], method)))
            except _Unusable as exc:
                reply = {"type": "error", "id": call_id, "kind": "output", "message": str(exc)}
            except Exception as exc:    # the adapter's own failure travels as an error reply
                reply = {"type": "error", "id": call_id,
                         "message": f"{type(exc).__name__}: {exc}",
                         "traceback": traceback.format_exc()}
        region = state["region"] if "region_free" in header else None
        try:
            bufs, _ = encode(reply, out if reply["type"] == "result" else (), region,
                             header.get("region_free", 0))
        except WireFormatError as exc:     # a dtype the wire cannot carry
            bufs, _ = encode({"type": "error", "id": call_id, "kind": "output",
                              "message": str(exc)})
        del arrays
        write_all(proto_out, bufs)


def _keep_freed_memory():
    """Let glibc reuse freed blocks instead of handing them back to the kernel.

    A server answering the same large request again and again otherwise pays a
    page fault per 4 KiB of every fresh result (about 1.5 ms per 6 MiB here).
    """
    try:
        import ctypes
        libc = ctypes.CDLL(None)
        libc.mallopt(-1, 1 << 30)      # M_TRIM_THRESHOLD
        libc.mallopt(-3, 1 << 25)      # M_MMAP_THRESHOLD (32 MiB, the most glibc takes)
    except (OSError, AttributeError):
        pass


def main(argv=None) -> int:
    p = argparse.ArgumentParser(prog="python -m convwitness.serve", description=(
        "Serve an adapter over the cwire/1 protocol on stdin/stdout (for exec: runs)."))
    p.add_argument("spec", help="any --adapter form: built-in name, package.module:attr, file.py:attr")
    p.add_argument("--name", default=None, help="the name to declare (default: the adapter's own)")
    args = p.parse_args(argv)
    proto_in, proto_out = _take_channel()
    _keep_freed_memory()
    from ...errors import ConvWitnessError
    from ..loading import load_adapter
    try:
        adapter = load_adapter(args.spec)
    except ConvWitnessError as exc:
        print(f"convwitness.serve: {exc}", file=sys.stderr)
        return 3
    if args.name:
        adapter.name = args.name
    try:
        return serve(adapter, proto_in, proto_out)
    except BrokenPipeError:
        return 0


if __name__ == "__main__":
    sys.exit(main())
