"""The adapter contract: one call signature in front of any implementation.

Arrays are numpy arrays, channels first unless ``layout="channels_last"`` is passed
(then x is ``(N, *S, C)`` and w ``(C_out, *K, C_in/G)``). Cross-correlation, no
kernel flip. ``stride`` and ``dilation`` are tuples of ints, ``padding`` a tuple of
``(before, after)`` pairs, ``groups`` an int.

* function form (forward only): ``f(x, w, b, *, stride, padding, dilation, groups) -> y``
* object form: an object with ``forward(...)`` as above and optionally
  ``backward(x, w, b, grad_y, *, stride, padding, dilation, groups) -> (gx, gw, gb)``
  and ``transposed(x, w, b, *, stride, padding, dilation, groups, output_padding) -> y``
  (w of shape ``(C_in, C_out/G, *K)``), plus optional ``name``, ``version``,
  ``capabilities``.

:class:`Adapter` wraps either form, passes the keywords, and checks what comes back:
type, shape and dtype, with one-line errors that say what was expected, what came and
how to fix it.
"""
from __future__ import annotations

import numpy as np

from ..geometry.capabilities import Capabilities
from ..errors import (AdapterCrashed, AdapterLoadError, AdapterOutputError, AdapterRaised,
                     AdapterTimeout)
from ..geometry.formats import numpy_dtype
from ..geometry.spec import ConvSpec

__all__ = ["Adapter", "wrap", "call_kwargs", "quant_kwargs"]


def call_kwargs(spec: ConvSpec, transposed: bool = False) -> dict:
    """The keyword arguments an adapter method receives for ``spec``."""
    kw = {"stride": spec.stride, "padding": spec.padding, "dilation": spec.dilation,
          "groups": spec.groups}
    if spec.layout != "channels_first":
        kw["layout"] = spec.layout
    if transposed:
        kw["output_padding"] = spec.output_padding
    return kw


def quant_kwargs(spec) -> dict:
    """The keyword arguments of ``quantized(x, w, b, ...)`` for a QuantSpec: the geometry's,
    then the quantization parameters (w_scale and w_zero_point as tuples of 1 or C_out
    entries; y_scale None and clamp None for int32 output; the bias kind is b's dtype). A
    transposed one adds ``output_padding`` and ``transposed=True`` (only then, so that a
    forward-only adapter's signature need not know them)."""
    kw = call_kwargs(spec.conv, transposed=spec.conv.transposed)
    if spec.conv.transposed:
        kw["transposed"] = True
    kw.update(x_scale=spec.x_scale, x_zero_point=spec.x_zero_point, w_scale=tuple(spec.w_scale),
              w_zero_point=tuple(spec.w_zero_point), y_scale=spec.y_scale,
              y_zero_point=spec.y_zero_point, output=spec.output, clamp=spec.clamp)
    return kw


def _describe(value) -> str:
    described = getattr(value, "__convwitness_describe__", None)
    if callable(described):
        return described()
    if isinstance(value, np.ndarray):
        return f"numpy.ndarray shape={value.shape} dtype={value.dtype}"
    if value is None:
        return "None"
    mod = type(value).__module__
    name = type(value).__qualname__
    shape = getattr(value, "shape", None)
    extra = f" shape={tuple(shape)}" if shape is not None else ""
    if isinstance(value, (list, tuple)):
        extra = f" of length {len(value)}"
    return f"{mod}.{name}{extra}" if mod != "builtins" else f"{name}{extra}"


class Adapter:
    """An implementation behind the call signature, with its identity and claims."""

    def __init__(self, target, *, name: str | None = None, source: str = ""):
        self.target = target
        self.source = source
        fwd = getattr(target, "forward", None)
        qnt = getattr(target, "quantized", None)
        # the quantized pass (geometry/quant.py): quantized(x, w, b, *, stride, padding,
        # dilation, groups, x_scale, x_zero_point, w_scale, w_zero_point, y_scale,
        # y_zero_point, output, clamp) -> y; an object may offer it alone
        self._quantized = qnt if callable(qnt) and not _is_plain_function(target) else None
        if callable(fwd) and not _is_plain_function(target):
            self._forward = fwd
            self._backward = getattr(target, "backward", None)
            self._transposed = getattr(target, "transposed", None)
        elif callable(target):
            self._forward, self._backward, self._transposed = target, None, None
        elif self._quantized is not None:
            self._forward, self._backward, self._transposed = None, None, None
        else:
            raise AdapterLoadError(
                f"adapter {source or target!r}: expected a forward function or an object with "
                f"a forward(x, w, b, *, stride, padding, dilation, groups) method, got "
                f"{_describe(target)}")
        for attr in ("_backward", "_transposed"):
            if getattr(self, attr) is not None and not callable(getattr(self, attr)):
                setattr(self, attr, None)
        self.name = str(name or getattr(target, "name", None)
                        or getattr(target, "__name__", None) or type(target).__name__)
        self.version = str(getattr(target, "version", "") or "")
        offered = {"forward"} if self._forward is not None else set()
        if self._quantized is not None:
            offered.add("quantized")
        if self._backward is not None:
            offered.add("backward")
        if self._transposed is not None:
            offered.add("transposed")
        caps = getattr(target, "capabilities", None)
        if callable(caps) and not isinstance(caps, Capabilities):
            caps = caps()
        if caps is None:
            caps = Capabilities()
        elif isinstance(caps, dict):
            caps = Capabilities.from_dict(caps)
        elif not isinstance(caps, Capabilities):
            raise AdapterLoadError(
                f"adapter {self.name}: capabilities must be a convwitness.Capabilities (or a dict "
                f"of its fields), got {_describe(caps)}; fix: build it with Capabilities(...)")
        caps = caps.for_methods(offered)     # passes=None: what the object implements
        missing = sorted(caps.passes - offered)
        if missing:
            raise AdapterLoadError(
                f"adapter {self.name}: capabilities claim passes {missing} but the object has no "
                f"{' / '.join(m + '()' for m in missing)} method; add the method or drop the claim")
        self.capabilities = caps
        #: distinct call signatures seen (method, array shapes and dtypes, keywords): what a
        #: port that compiles per shape pays for
        self.signatures: set = set()

    # -- identity ------------------------------------------------------------------
    @property
    def passes(self) -> frozenset:
        return self.capabilities.passes

    def identity(self) -> dict:
        return {"name": self.name, "version": self.version, "source": self.source}

    def __repr__(self) -> str:
        return f"<Adapter {self.name} {self.version} from {self.source or '?'}>"

    # -- calls ---------------------------------------------------------------------
    def forward(self, spec: ConvSpec, x, w, b=None) -> np.ndarray:
        """y = adapter(x, w, b) for a non-transposed spec, checked against the contract."""
        y = self._call("forward", self._forward, x, w, b, **call_kwargs(spec))
        return check_array(self.name, "forward", "y", y, spec.y_shape, spec.dtype)

    def backward(self, spec: ConvSpec, x, w, b, grad_y):
        """(gx, gw, gb); gb is None when b is None."""
        if self._backward is None:
            raise AdapterOutputError(f"adapter {self.name} offers no backward(); it cannot be "
                                     "asked for gradients")
        out = self._call("backward", self._backward, x, w, b, grad_y, **call_kwargs(spec))
        if not isinstance(out, (tuple, list)) or len(out) != 3:
            raise AdapterOutputError(
                f"adapter {self.name} backward: expected a tuple (grad_x, grad_w, grad_b), got "
                f"{_describe(out)}; fix: return all three, grad_b None when b is None")
        gx, gw, gb = out
        gx = check_array(self.name, "backward", "grad_x", gx, spec.x_shape, spec.dtype)
        gw = check_array(self.name, "backward", "grad_w", gw, spec.w_shape, spec.dtype)
        if b is None:
            if gb is not None:
                gb = check_array(self.name, "backward", "grad_b", gb, (spec.out_channels,), spec.dtype)
        else:
            gb = check_array(self.name, "backward", "grad_b", gb, (spec.out_channels,), spec.dtype)
        return gx, gw, gb

    def transposed(self, spec: ConvSpec, x, w, b=None) -> np.ndarray:
        if self._transposed is None:
            raise AdapterOutputError(f"adapter {self.name} offers no transposed(); it cannot be "
                                     "asked for a transposed convolution")
        y = self._call("transposed", self._transposed, x, w, b, **call_kwargs(spec, transposed=True))
        return check_array(self.name, "transposed", "y", y, spec.y_shape, spec.dtype)

    def quantized(self, spec, x, w, b=None) -> np.ndarray:
        """y of a quantized convolution (``spec`` a QuantSpec), checked against the contract:
        an array of the output shape and integer format (``spec.output``)."""
        if self._quantized is None:
            raise AdapterOutputError(f"adapter {self.name} offers no quantized(); it cannot be "
                                     "asked for a quantized convolution")
        y = self._call("quantized", self._quantized, x, w, b, **quant_kwargs(spec))
        expected = f"numpy.ndarray shape={tuple(spec.y_shape)} dtype={spec.output}"
        if not isinstance(y, np.ndarray) or y.shape != tuple(spec.y_shape) or y.dtype != np.dtype(spec.output):
            got = _describe(y)
            raise AdapterOutputError(
                f"adapter {self.name} quantized: y expected {expected}, got {got}; fix: return the "
                f"output format asked for (output={spec.output!r}) in the shape of the geometry")
        return y

    def _call(self, method: str, fn, *args, **kwargs):
        """Call the implementation; its own exceptions become AdapterRaised with the traceback."""
        # the dtype itself, not its name: equal exactly when the names are, and str(dtype)
        # cost more than the rest of the call's bookkeeping
        self.signatures.add((method, tuple(None if a is None else (np.shape(a), np.asarray(a).dtype)
                                           for a in args), tuple(sorted(kwargs.items()))))
        try:
            return fn(*args, **kwargs)
        except (AdapterCrashed, AdapterTimeout, AdapterRaised, AdapterOutputError):
            raise
        except Exception as exc:   # the adapter's own failure
            import traceback
            tb = "".join(traceback.format_exception(type(exc), exc, exc.__traceback__))
            raise AdapterRaised(f"adapter {self.name} {method} raised {type(exc).__name__}: {exc}",
                                tb) from exc

    def run(self, spec: ConvSpec, x, w, b=None) -> np.ndarray:
        """The spec's forward pass: forward() or transposed() by ``spec.transposed``."""
        if spec.transposed:
            return self.transposed(spec, x, w, b)
        return self.forward(spec, x, w, b)


def check_array(adapter: str, method: str, what: str, value, shape, dtype: str) -> np.ndarray:
    """Return ``value`` if it is an ndarray of ``shape`` and ``dtype``; else a one-line error."""
    expected = f"numpy.ndarray shape={tuple(shape)} dtype={dtype}"
    if not isinstance(value, np.ndarray):
        hint = "return numpy arrays (np.asarray(...), or tensor.numpy())"
        if value is None:
            hint = f"return the {what} array instead of None"
        raise AdapterOutputError(
            f"adapter {adapter} {method}: {what} expected {expected}, got {_describe(value)}; fix: {hint}")
    if value.shape != tuple(shape):
        raise AdapterOutputError(
            f"adapter {adapter} {method}: {what} expected {expected}, got shape={value.shape}; "
            "fix: check the output-size formula (floor((L+p_lo+p_hi-d(k-1)-1)/s)+1) and the layout")
    if value.dtype != numpy_dtype(dtype):
        raise AdapterOutputError(
            f"adapter {adapter} {method}: {what} expected {expected}, got dtype={value.dtype}; "
            f"fix: return the dtype of the inputs ({dtype})")
    return value


def _is_plain_function(obj) -> bool:
    import types
    return isinstance(obj, (types.FunctionType, types.BuiltinFunctionType, types.MethodType))


def wrap(target, *, name: str | None = None, source: str = "") -> Adapter:
    """An :class:`Adapter` around a forward function or an adapter object (idempotent)."""
    if isinstance(target, Adapter):
        return target
    return Adapter(target, name=name, source=source)
