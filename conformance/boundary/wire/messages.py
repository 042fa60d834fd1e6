"""The messages of cwire/1 as the client checks them: hello and reply headers, the
request parameters, and the size of a reply (docs/wire-protocol.md)."""
from __future__ import annotations

import math

from ...errors import AdapterOutputError, AdapterRaised, ConvWitnessError
from ...geometry.capabilities import Capabilities
from .codec import PROTOCOL

__all__ = ["check_hello", "check_reply", "params", "output_bytes"]

_OUTPUTS = {"forward": (("y",), ()), "transposed": (("y",), ()),
            "backward": (("grad_x", "grad_w"), ("grad_b",))}


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


def output_bytes(method: str, arrays: dict, p: dict) -> int:
    """Bytes of the reply's arrays (to size the region); 0 where it cannot be told."""
    try:
        x, w = arrays["x"], arrays["w"]
        if method == "backward":
            return sum(a.nbytes + 64 for a in arrays.values())
        cl = p["layout"] == "channels_last"
        size, kernel = (x.shape[1:-1], w.shape[1:-1]) if cl else (x.shape[2:], w.shape[2:])
        out = []
        for i, (L, k) in enumerate(zip(size, kernel)):
            s, d, (lo, hi) = p["stride"][i], p["dilation"][i], p["padding"][i]
            e = d * (k - 1) + 1
            if method == "forward":
                out.append((L + lo + hi - e) // s + 1)
            else:
                out.append(s * (L - 1) + e + p["output_padding"][i] - lo - hi)
        if method == "forward":
            channels = w.shape[0]
        else:
            channels = (w.shape[-1] if cl else w.shape[1]) * p["groups"]
        return x.shape[0] * channels * math.prod(max(o, 0) for o in out) * x.dtype.itemsize + 64
    except (KeyError, IndexError, TypeError, ZeroDivisionError):
        return 0
