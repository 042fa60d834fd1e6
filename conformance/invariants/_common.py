"""Shared pieces of the invariants: references, bounds and judged comparisons."""
from __future__ import annotations

from dataclasses import replace
from functools import lru_cache

import numpy as np

from ..numerics import reference as ref
from ..numerics.bounds import Bound, derive
from .evidence import Evidence, compare
from ..geometry.formats import get_format
from ..geometry.capabilities import compiles_per_shape

__all__ = ["copies", "model_of", "pass_bound", "judge", "run_forward", "overflow_possible", "self_bound",
           "check_output_contract", "without_bias"]


def copies(case):
    """Fresh copies of x, w, b, grad_y (adapters may misbehave on the originals)."""
    c = lambda a: None if a is None else a.copy()   # noqa: E731
    return c(case.x), c(case.w), c(case.b), c(case.grad_y)


def without_bias(adapter, spec, b):
    """(spec, bias) of a call that adds no bias to the case's ``spec``: the spec without a
    bias and None; for a port that compiles per shape, where ``spec`` has a bias, the same
    spec with a bias of zeros (adding +0 changes no result and no rounding, and the call
    keeps the case's signature instead of making one of its own)."""
    if b is None or not spec.bias:
        return spec.replace(bias=False), None
    if compiles_per_shape(adapter.capabilities):
        return spec, np.zeros_like(b)
    return spec.replace(bias=False), None


def model_of(adapter, spec, pass_: str | None = None):
    """The declared error model for the spec's dtype (and pass, where one is declared)."""
    if pass_ is None:
        pass_ = "transposed" if spec.transposed else "forward"
    return adapter.capabilities.error_model_for(spec.dtype, pass_, spec.ndim)


def pass_bound(adapter, spec, pass_: str, arrays: dict) -> tuple[np.ndarray, Bound]:
    """(float64 reference, Bound) of one pass of ``spec`` on ``arrays`` (x, w, b, grad_y)."""
    x, w, b, g = arrays.get("x"), arrays.get("w"), arrays.get("b"), arrays.get("grad_y")
    if pass_ in ("forward", "transposed"):
        y = ref.forward(spec, x, w, b)
        mag = ref.forward_magnitude(spec, x, w, b)
        with_bias = b is not None
    elif pass_ == "grad_input":
        y, mag, with_bias = ref.grad_input(spec, w, g), ref.grad_input_magnitude(spec, w, g), False
    elif pass_ == "grad_weight":
        y, mag, with_bias = ref.grad_weight(spec, x, g), ref.grad_weight_magnitude(spec, x, g), False
    elif pass_ == "grad_bias":
        y, mag, with_bias = ref.grad_bias(spec, g), ref.grad_bias_magnitude(spec, g), False
    else:
        raise ValueError(pass_)
    return y, derive(spec, model_of(adapter, spec, pass_), pass_, mag, y, with_bias=with_bias,
                     arrays={"x": x, "w": w, "b": b} if pass_ in ("forward", "transposed") else None)


def overflow_possible(spec, adapter, bound: Bound) -> np.ndarray:
    """Mask of elements where an intermediate or final overflow is possible (not judged)."""
    top = _overflow_top(model_of(adapter, spec, bound.pass_), spec.dtype)
    mag = bound.magnitude
    if mag is None:
        return np.zeros(np.shape(bound.values), bool)
    with np.errstate(over="ignore", invalid="ignore"):
        free = ~(mag * (1 + bound.coefficient) + bound.values < top)
    if bound.overflow is not None:
        free = free | bound.overflow
    return free


@lru_cache(maxsize=256)
def _overflow_top(model, dtype: str) -> float:
    """The largest finite value of the accumulation and output formats of ``model`` on
    ``dtype`` (resolved once per model and dtype)."""
    m = model.resolve(dtype)
    return min(get_format(m.accumulate).max, get_format(m.output).max)


def judge(adapter, spec, actual, expected, bound: Bound, *, what: str, criterion: str,
          exact: bool = False) -> Evidence:
    """Compare ``actual`` with the reference within ``bound`` (elements that may overflow free)."""
    ev = compare(actual, expected, bound.values, what=what, criterion=criterion,
                 explanation=bound.explain(), exact=exact,
                 allow=overflow_possible(spec, adapter, bound))
    if bound.vacuous:
        ev.details["vacuous"] = bound.explain()
    return ev


def run_forward(adapter, spec, x, w, b):
    """The adapter's forward pass (transposed() for transposed specs) on copies."""
    c = lambda a: None if a is None else a.copy()   # noqa: E731
    return adapter.run(spec, c(x), c(w), c(b))


def self_bound(adapter, spec, x, w, b=None, y_hat=None) -> Bound:
    """The forward bound for comparisons of the adapter with itself.

    Derived as for the reference, but with magnitudes valid for the map the adapter
    actually computes as well: ``max(|x|*|w| by the reference, f_adapter(|x|, |w|)/(1-c))``
    (a sum of non-negative terms is computed with relative error at most c), and the
    output-rounding term on ``max(|y_ref|, |y_hat|)``. For a correct adapter this is the
    reference bound; for a wrong but consistent one (say, a swapped geometry) it keeps
    linearity and equivalence checks about their own property.
    """
    y_ref, bound = pass_bound(adapter, spec, "transposed" if spec.transposed else "forward",
                              {"x": x, "w": w, "b": b})
    own = run_forward(adapter, spec, np.abs(x), np.abs(w), None if b is None else np.abs(b))
    own = own.astype(np.float64)
    c = bound.coefficient
    with np.errstate(over="ignore", invalid="ignore"):
        own_mag = np.where(np.isfinite(own), own / max(1 - c, 1e-300), np.inf) if c < 1 else \
            np.full(own.shape, np.inf)
        mag = np.maximum(bound.magnitude, own_mag)
        big = np.abs(y_ref) if y_hat is None else np.maximum(np.abs(y_ref), np.abs(y_hat.astype(np.float64)))
        values = np.maximum(bound.values, bound.coefficient * mag + bound.u_out * big + bound.absolute)
    return replace(bound, values=values, magnitude=mag,
                   explanation=bound.explanation + "; magnitudes also from the adapter's own |x|,|w| pass")


def check_output_contract(adapter, case, *, label: str, shape: tuple | None = None):
    """The output contract of one pass (forward or transposed, after ``case.spec``): the
    expected ``shape`` when given, a fresh array (no memory shared with x, w, b or an
    earlier result), finite wherever the exact result is finite and far from overflow."""
    from ..errors import AdapterOutputError
    spec = case.spec
    call = adapter.transposed if spec.transposed else adapter.run
    x, w, b, _ = copies(case)
    try:
        y1 = call(spec, x, w, b)
        y2 = call(spec, x.copy(), w.copy(), None if b is None else b.copy())
    except AdapterOutputError as exc:
        return Evidence(False, share=np.inf, message=f"{label}: {exc}")
    if shape is not None and y1.shape != shape:
        return Evidence(False, share=np.inf, message=(
            f"{label}: y has shape {y1.shape}, expected {shape}"))
    for name, arr, other in (("x", x, y1), ("w", w, y1), ("b", b, y1), ("the previous call's y", y1, y2)):
        if arr is not None and np.shares_memory(other, arr):
            return Evidence(False, share=np.inf, message=(
                f"{label}: y shares memory with {name}; expected a fresh array "
                "(return a new array, not a view of an input or of a reused buffer)"))
    expected, bound = pass_bound(adapter, spec, "transposed" if spec.transposed else "forward",
                                 {"x": case.x, "w": case.w, "b": case.b})
    bad = np.isfinite(expected) & ~overflow_possible(spec, adapter, bound) & ~np.isfinite(y1.astype(np.float64))
    if bad.any():
        first = [int(i) for i in np.argwhere(bad)[0]]
        return Evidence(False, share=np.inf, where=tuple(first), message=(
            f"{label}: {int(bad.sum())} of {bad.size} elements of y are not finite where the "
            f"exact result is finite and far from overflow; first at {first}"))
    return Evidence(True, message=f"{label}: shape {y1.shape}, dtype {y1.dtype}, fresh, finite",
                    checked=y1.size)
