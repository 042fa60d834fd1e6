"""The messages of cwire/1 as the client checks them: hello and reply headers, the
request parameters, and the size of a reply (docs/wire-protocol.md)."""
from __future__ import annotations

import math

import numpy as np

from ...errors import AdapterOutputError, AdapterRaised, ConvWitnessError
from ...geometry.capabilities import Capabilities
from .codec import PROTOCOL

__all__ = ["check_hello", "check_reply", "params", "quant_params", "output_bytes", "QUANT_FIELDS"]

_OUTPUTS = {"forward": (("y",), ()), "transposed": (("y",), ()), "quantized": (("y",), ()),
            "backward": (("grad_x", "grad_w"), ("grad_b",))}
#: the fields of a quantized call's ``params["quant"]`` (docs/wire-protocol.md), in the
#: order of the call signature's keywords (boundary/contract.py ``quant_kwargs``)
QUANT_FIELDS = ("x_scale", "x_zero_point", "w_scale", "w_zero_point", "y_scale",
                "y_zero_point", "output", "clamp")


class _Failure(Exception):
    """A protocol failure before it is given its adapter error class."""

    def __init__(self, cls, message, traceback_text=""):
        super().__init__(message)
        self.cls, self.traceback_text = cls, traceback_text


def check_hello(h: dict) -> Capabilities:
    """The program's hello, checked; returns its declared capabilities."""
    where = "hello (message 1)"
    if h.get("type") != "hello":
        raise _Failure(AdapterOutputError, f"{where}: header field type is {h.get('type')!r}; "
                       "expected 'hello' as the program's first message")
    if h.get("protocol") != PROTOCOL:
        raise _Failure(AdapterOutputError, f"{where}: header field protocol is "
                       f"{h.get('protocol')!r}; this client speaks {PROTOCOL!r}")
    if not isinstance(h.get("name"), str) or not h["name"]:
        raise _Failure(AdapterOutputError, f"{where}: header field name must be a non-empty "
                       f"string, got {h.get('name')!r}")
    h["version"] = str(h.get("version", "") or "")
    carriers = h.get("carriers", ["inline"])
    if not isinstance(carriers, list):
        raise _Failure(AdapterOutputError, f"{where}: header field carriers must be a list, "
                       f"got {carriers!r}")
    caps = h.get("capabilities")
    if not isinstance(caps, dict):
        raise _Failure(AdapterOutputError, f"{where}: header field capabilities must be an "
                       f"object of Capabilities fields, got {caps!r}")
    try:
        declared = Capabilities.from_dict(caps)
        # a foreign program has no methods to look at: without `passes` it claims forward only
        return declared if declared.passes is not None else declared.replace(passes={"forward"})
    except (ConvWitnessError, TypeError, ValueError) as exc:
        raise _Failure(AdapterOutputError, f"{where}: header field capabilities: {exc}") from None


def check_reply(reply: dict, out: dict, no: int, method: str, expected_id, stop) -> dict:
    """A reply's header, checked (``stop`` ends the program on a protocol violation)."""
    where = f"reply (message {no})"

    def bad(text):
        stop()
        raise _Failure(AdapterOutputError, f"{where}: {text}; the program was stopped and is "
                       "restarted for the next call")

    if reply.get("id") != expected_id:
        bad(f"header field id is {reply.get('id')!r}, expected {expected_id} (the id of the request)")
    kind = reply.get("type")
    if kind == "error":
        message = reply.get("message")
        if not isinstance(message, str):
            bad(f"header field message of an error reply must be a string, got {message!r}")
        if reply.get("kind", "raised") == "output":
            raise _Failure(AdapterOutputError, f"the program reports an unusable result: {message}")
        tb = reply.get("traceback", "")
        raise _Failure(AdapterRaised, f"the program replied with an error: {message}",
                       tb if isinstance(tb, str) else "")
    if kind != "result":
        bad(f"header field type is {kind!r}; expected 'result' or 'error'")
    required, optional = _OUTPUTS[method]
    for i, name in enumerate(out):
        if name not in required and name not in optional:
            bad(f"header field arrays[{i}].name is {name!r}; a {method} reply carries "
                f"{', '.join(required + optional)}")
    missing = [n for n in required if n not in out]
    if missing:
        bad(f"header field arrays lacks {', '.join(missing)}; a {method} reply carries "
            f"{', '.join(required)}{' (and ' + ', '.join(optional) + ')' if optional else ''}")
    return out


def params(stride, padding, dilation, groups, layout, output_padding) -> dict:
    nd = len(stride)
    return {"stride": [int(s) for s in stride],
            "padding": [[int(lo), int(hi)] for lo, hi in padding],
            "dilation": [int(d) for d in dilation], "groups": int(groups), "layout": layout,
            "output_padding": [int(o) for o in (output_padding or (0,) * nd)]}


def quant_params(geometry: dict, kw: dict, b, transposed: bool = False) -> dict:
    """A quantized call's params: the geometry's, plus ``quant`` (QUANT_FIELDS as JSON:
    lists for w_scale, w_zero_point and clamp; null for y_scale and clamp where absent),
    ``bias``, the bias kind (none, int32 or float: the kind b's dtype says), and
    ``transposed`` (true for a transposed convolution; the geometry then carries its
    output_padding)."""
    q = {}
    for k in QUANT_FIELDS:
        v = kw[k]
        if k in ("x_scale", "y_scale"):
            v = None if v is None else float(v)
        elif k == "w_scale":
            v = [float(s) for s in v]
        elif k in ("w_zero_point", "clamp"):
            v = None if v is None else [int(z) for z in v]
        elif k != "output":
            v = int(v)
        q[k] = v
    q["bias"] = "none" if b is None else ("int32" if np.asarray(b).dtype == np.int32 else "float")
    q["transposed"] = bool(transposed)
    return dict(geometry, quant=q)


def output_bytes(method: str, arrays: dict, p: dict) -> int:
    """Bytes of the reply's arrays (to size the region); 0 where it cannot be told."""
    try:
        x, w = arrays["x"], arrays["w"]
        if method == "backward":
            return sum(a.nbytes + 64 for a in arrays.values())
        cl = p["layout"] == "channels_last"
        tr = method == "transposed" or (method == "quantized" and p["quant"].get("transposed"))
        size, kernel = (x.shape[1:-1], w.shape[1:-1]) if cl else (x.shape[2:], w.shape[2:])
        out = []
        for i, (L, k) in enumerate(zip(size, kernel)):
            s, d, (lo, hi) = p["stride"][i], p["dilation"][i], p["padding"][i]
            e = d * (k - 1) + 1
            if not tr:
                out.append((L + lo + hi - e) // s + 1)
            else:
                out.append(s * (L - 1) + e + p["output_padding"][i] - lo - hi)
        if not tr:
            channels = w.shape[0]
        else:
            channels = (w.shape[-1] if cl else w.shape[1]) * p["groups"]
        item = np.dtype(p["quant"]["output"]).itemsize if method == "quantized" else x.dtype.itemsize
        return x.shape[0] * channels * math.prod(max(o, 0) for o in out) * item + 64
    except (KeyError, IndexError, TypeError, ZeroDivisionError):
        return 0
