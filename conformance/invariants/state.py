"""State and hygiene: repeatable results, no state kept between calls, inputs untouched."""
from __future__ import annotations

import numpy as np

from ..errors import SpecError
from .evidence import Evidence, compare, combine
from ..cases.strategies import Needs
from ..cases.values import SALTS, geometry_rng
from . import invariant
from ._common import copies, overflow_possible, pass_bound, run_forward


def _other_geometry(spec, caps, salt: str):
    """Spec B: the same x and w shapes with another stride, dilation or padding (admitted),
    chosen from the geometry alone: the stride-1 geometry where the case is strided (the
    stride check calls it as well: no call signature of its own for a port that compiles
    per shape), otherwise one change drawn by cases/values.geometry_rng."""
    if any(s > 1 for s in spec.stride):
        try:
            unit = spec.replace(stride=1)
        except SpecError:
            unit = None
        if unit is not None and caps.admits(unit):
            return unit
    rng = geometry_rng(spec, SALTS[salt])
    tries = []
    for _ in range(12):
        choice = int(rng.integers(0, 3))
        a = int(rng.integers(0, spec.ndim))
        if choice == 0:
            stride = list(spec.stride)
            stride[a] = stride[a] % 3 + 1
            changes = {"stride": tuple(stride)}
        elif choice == 1:
            dil = list(spec.dilation)
            dil[a] = dil[a] % 2 + 1
            changes = {"dilation": tuple(dil)}
        else:
            pad = [list(p) for p in spec.padding]
            pad[a][int(rng.integers(0, 2))] += 1
            changes = {"padding": tuple(tuple(p) for p in pad)}
        try:
            other = spec.replace(**changes)
        except SpecError:
            continue
        if other != spec and caps.admits(other):
            return other
        tries.append(changes)
    return None


def _repeat_check(adapter, spec, first, again, bound, what):
    deterministic = adapter.capabilities.deterministic
    tol = 0.0 if deterministic else 2 * bound.values
    return compare(again, first.astype(np.float64), tol, exact=deterministic, what="y",
                   allow=overflow_possible(spec, adapter, bound) if not deterministic else None,
                   criterion=f"{what}: " + ("bit-for-bit identical (deterministic claimed)"
                                             if deterministic else "within twice the bound"),
                   explanation=bound.explain())


@invariant("forward.repeatability",
           derives=lambda spec, caps: [("forward", _other_geometry(spec, caps, "state_forward"))],
           passes=("forward",),
           statement="the same call gives the same result, and a call with other parameters "
                     "in between leaves no state behind (A, B, A)")
def repeatability(adapter, case, ctx):
    """y_1 = y_2 = ... = y_R for R identical calls (bit for bit when deterministic is claimed);
    f_A, then f_B (same array shapes, other stride/dilation/padding), then f_A again: equal;
    the first result is not altered by later calls (no reused output buffer)."""
    spec = case.spec
    x, w, b, _ = copies(case)
    y_first = run_forward(adapter, spec, x, w, b)
    kept = y_first.copy()
    _, bound = pass_bound(adapter, spec, "forward", {"x": case.x, "w": case.w, "b": case.b})
    results = []
    for r in range(max(1, ctx.profile.repeats - 1)):
        y_r = run_forward(adapter, spec, case.x, case.w, case.b)
        results.append(_repeat_check(adapter, spec, kept, y_r, bound, f"repeat {r + 2}"))
    other = _other_geometry(spec, adapter.capabilities, "state_forward")
    if other is not None:
        run_forward(adapter, other, case.x, case.w, case.b)
        y_again = run_forward(adapter, spec, case.x, case.w, case.b)
        results.append(_repeat_check(adapter, spec, kept, y_again, bound,
                                     f"A, B, A with B = {other.describe()}"))
    untouched = compare(y_first, kept.astype(np.float64), 0.0, exact=True, what="y",
                        criterion="the first result is unchanged by later calls (fresh output arrays)")
    return combine(untouched, *results)


@invariant("backward.repeatability",
           derives=lambda spec, caps: [("backward", _other_geometry(spec, caps, "state_backward"))],
           passes=("backward",),
           statement="the same backward call gives the same gradients, also after a call with "
                     "other parameters (A, B, A)")
def backward_repeatability(adapter, case, ctx):
    """(gx, gw, gb)_1 = (gx, gw, gb)_2 = ... (bit for bit when deterministic is claimed),
    also after a backward call of another geometry with the same array shapes."""
    spec = case.spec
    if spec.transposed:
        return Evidence.skip("transposed spec: not a backward case")
    arrays = {"x": case.x, "w": case.w, "b": case.b, "grad_y": case.grad_y}
    bounds = {p: pass_bound(adapter, spec, p, arrays)[1] for p in ("grad_input", "grad_weight")}
    if case.b is not None:
        bounds["grad_bias"] = pass_bound(adapter, spec, "grad_bias", arrays)[1]
    first = [None if g is None else g.copy() for g in adapter.backward(spec, *copies(case))]
    results = []
    other = _other_geometry(spec, adapter.capabilities, "state_backward")
    runs = max(1, ctx.profile.repeats - 1)
    for r in range(runs + (1 if other is not None else 0)):
        if other is not None and r == runs:
            og = np.zeros(other.y_shape, dtype=case.grad_y.dtype)
            adapter.backward(other, case.x.copy(), case.w.copy(),
                             None if case.b is None else case.b.copy(), og)
            label = f"A, B, A with B = {other.describe()}"
        else:
            label = f"repeat {r + 2}"
        again = adapter.backward(spec, *copies(case))
        for name, pass_, a, b in zip(("grad_x", "grad_w", "grad_b"),
                                     ("grad_input", "grad_weight", "grad_bias"), first, again):
            if a is None or pass_ not in bounds:
                continue
            results.append(_repeat_check(adapter, spec, a, b, bounds[pass_], f"{label} ({name})"))
    return combine(*results)      # no result: skipped, "nothing to compare"


def _same_bits(a, b) -> bool:
    return a.shape == b.shape and a.dtype == b.dtype and a.tobytes() == b.tobytes()


@invariant("call.inputs_untouched", passes=("forward",), needs=Needs(),
           statement="no pass modifies its inputs (x, w, b, upstream gradient)")
def inputs_untouched(adapter, case, ctx):
    """After forward, backward and transposed calls, x, w, b and g hold the same bytes as before."""
    spec = case.spec
    x, w, b, g = copies(case)
    calls = [("forward", lambda: adapter.run(spec, x, w, b))]
    if "backward" in adapter.passes and not spec.transposed:
        calls.append(("backward", lambda: adapter.backward(spec, x, w, b, g)))
    for name, call in calls:
        call()
        for label, arr, orig in (("x", x, case.x), ("w", w, case.w), ("b", b, case.b),
                                 ("grad_y", g, case.grad_y)):
            if arr is None or orig is None:
                continue
            if not _same_bits(arr, orig):
                changed = int(np.sum(arr.view(np.uint8).reshape(arr.size, -1) !=
                                     orig.view(np.uint8).reshape(orig.size, -1)).any(axis=-1)) \
                    if arr.size else 0
                return Evidence(False, share=np.inf, message=(
                    f"inputs untouched: {name} modified its input {label}: {changed} of {arr.size} "
                    "elements changed; an implementation must not write to its inputs "
                    "(copy before in-place work)"))
    return Evidence(True, message=f"inputs unchanged after {', '.join(n for n, _ in calls)}",
                    checked=sum(a.size for a in (case.x, case.w)))
