"""Backward-pass invariants: each gradient against the float64 reference, the empty
batch, linearity in the upstream gradient, and independence of the bias argument.

Notation: g is the upstream gradient dL/dy; GI(g), GW(g), GB(g) the input, weight and
bias gradients an adapter returns for it; B_GI, B_GW, B_GB their derived bounds
(convwitness.numerics.bounds: gamma_n of Higham 2002 §3.1 with n = C_out/G prod(k) for GI and
n = N prod(L_out) for GW and GB).
"""
from __future__ import annotations

import numpy as np

from ..numerics.gamma import U64, gamma
from .evidence import Evidence, compare, combine
from ..geometry.formats import get_format, to_format
from ..cases.strategies import Needs
from ..cases.values import SALTS, aux_rng
from . import invariant
from ._linear import near_underflow, power_of_two, products_stay_normal, second_operand
from ._common import judge, model_of, overflow_possible, pass_bound, without_bias

GRADS = (("grad_x", "grad_input"), ("grad_w", "grad_weight"), ("grad_b", "grad_bias"))


def _needs_bias(caps):
    return None if caps.bias else "adapter does not claim bias"


def _backward(adapter, spec, x, w, b, g):
    """The adapter's (gx, gw, gb) on copies of the arrays."""
    c = lambda a: None if a is None else a.copy()   # noqa: E731
    return adapter.backward(spec, c(x), c(w), c(b), c(g))


def _bounds(adapter, spec, x, w, g, with_bias: bool):
    """{pass: (float64 reference, Bound)} of the gradients for upstream gradient g."""
    arrays = {"x": x, "w": w, "grad_y": g}
    passes = ("grad_input", "grad_weight") + (("grad_bias",) if with_bias else ())
    return {p: pass_bound(adapter, spec, p, arrays) for p in passes}


def _reference_check(adapter, case, index: int, pass_: str):
    spec = case.spec
    grads = _backward(adapter, spec, case.x, case.w, case.b, case.grad_y)
    name = GRADS[index][0]
    expected, bound = pass_bound(adapter, spec, pass_, {"x": case.x, "w": case.w, "grad_y": case.grad_y})
    return judge(adapter, spec, grads[index], expected, bound, what=name,
                 criterion=f"backward.{pass_}: |{name} - {name}_ref| <= bound")


@invariant("grad_input.reference", steer=True, passes=("backward",),
           statement="the input gradient agrees with the float64 reference within the derived bound")
def grad_input_reference(adapter, case, ctx):
    """|GI(g) - GI_ref(g)| <= c |g| *^T |w| + u_out |GI_ref| elementwise, with c from the
    declared error model (gamma_n, n = C_out/G prod(k)); *^T is the adjoint of the convolution."""
    return _reference_check(adapter, case, 0, "grad_input")


@invariant("grad_weight.reference", steer=True, passes=("backward",),
           statement="the weight gradient agrees with the float64 reference within the derived bound")
def grad_weight_reference(adapter, case, ctx):
    """|GW(g) - GW_ref(g)| <= c (|x| * |g|) + u_out |GW_ref| elementwise, with
    GW[o,c,t] = sum_{n,h} x_p[n, c, h s + t d] g[n, o, h] and n = N prod(L_out) terms."""
    return _reference_check(adapter, case, 1, "grad_weight")


@invariant("grad_bias.reference", steer=True, passes=("backward",), needs=Needs(bias=True), requires=_needs_bias,
           statement="the bias gradient is the sum of the upstream gradient over batch and space")
def grad_bias_reference(adapter, case, ctx):
    """GB[o] = sum_{n, h} g[n, o, h] within gamma_{n-1}(u_acc) sum |g| + u_out |GB_ref|,
    n = N prod(L_out)."""
    return _reference_check(adapter, case, 2, "grad_bias")


def _nonzero_bits(a: np.ndarray) -> np.ndarray:
    """Mask of elements whose bit pattern is not all zeros (+0.0 is the only zero allowed)."""
    raw = np.ascontiguousarray(a).view(f"u{a.dtype.itemsize}")
    return raw != 0


@invariant("backward.zero_batch", derives=lambda spec, caps: [("backward", spec.replace(batch=1))],
           sources=lambda spec, caps: [spec.replace(batch=0)] if spec.batch == 1 else [],
           passes=("backward",), needs=Needs(zero_batch=True, batch_min=0),
           requires=lambda caps: None if caps.zero_batch else "adapter does not claim zero_batch",
           adjust=lambda caps, needs: Needs(zero_batch=True, batch_min=0, bias=True if caps.bias else False),
           statement="for an empty batch the input gradient is empty and the weight and bias "
                     "gradients are exactly +0")
def zero_batch(adapter, case, ctx):
    """N = 0: GI has shape (0, C_in, *S); GW = +0 and GB = +0 bit for bit (empty sums),
    also right after a backward call with N = 1 of the same geometry (no stale buffer)."""
    spec = case.spec
    one = spec.replace(batch=1)
    if adapter.capabilities.admits(one):         # leave values in any reused buffer
        rng = aux_rng(case.seed, SALTS["zero_batch_warmup"])
        fill = lambda shape: to_format(rng.uniform(1, 2, size=shape), spec.dtype)   # noqa: E731
        _backward(adapter, one, fill(one.x_shape), case.w, case.b, fill(one.y_shape))
    gx, gw, gb = _backward(adapter, spec, case.x, case.w, case.b, case.grad_y)
    if gx.shape != spec.x_shape or gx.size:
        return Evidence(False, share=np.inf, message=(
            f"zero batch: grad_x has shape {gx.shape}, expected the empty {spec.x_shape}"))
    checked = 0
    for name, a in (("grad_w", gw), ("grad_b", gb)):
        if a is None:
            continue
        bad = _nonzero_bits(a)
        checked += a.size
        if bad.any():
            first = tuple(int(i) for i in np.argwhere(bad)[0])
            return Evidence(False, share=np.inf, where=first, message=(
                f"zero batch: {name} must be exactly +0 (an empty sum) for N = 0, but "
                f"{int(bad.sum())} of {a.size} elements are not; first at {list(first)} = "
                f"{a[first]!r} (uninitialised or stale output buffer?)"))
    return Evidence(True, checked=checked, message=(
        f"zero batch: grad_x empty {gx.shape}, grad_w{' and grad_b' if gb is not None else ''} "
        "exactly +0"))


# -- linearity in the upstream gradient ------------------------------------------------
def _two_sum(a, b):
    """s = fl(a + b) and the exact error e: a + b = s + e (Knuth; float64, no overflow)."""
    s = a + b
    bb = s - a
    e = (a - (s - bb)) + (b - bb)
    return s, e


def _free(adapter, spec, *bounds):
    out = None
    for bd in bounds:
        m = overflow_possible(spec, adapter, bd)
        out = m if out is None else out | m
    return out


def _additivity(adapter, case, g1):
    """GI(g3) = GI(g1) + GI(g2) + GI(g3 - g1 - g2) exactly (and GW, GB), with g3 = fl(g1 + g2)."""
    spec, x, w, b = case.spec, case.x, case.w, case.b
    dt = g1.dtype
    g2 = second_operand(case, g1, SALTS["upstream_second"])
    s, e = _two_sum(g1.astype(np.float64), g2.astype(np.float64))
    g3 = to_format(s, spec.dtype).astype(dt)
    # g3 - (g1 + g2) = (g3 - s) - e, both parts exact in float64 (the rounding error of a
    # conversion, and the TwoSum error).
    parts = [p for p in (g3.astype(np.float64) - s, -e) if p.any()]
    with_bias = b is not None
    runs = {"g1": g1, "g2": g2, "g3": g3}
    corrections = []                  # (float64 array, run by the adapter?)
    for i, p in enumerate(parts):
        pd = to_format(p, spec.dtype)
        if np.array_equal(pd.astype(np.float64), p):
            runs[f"d{i}"] = pd.astype(dt)
            corrections.append((f"d{i}", True))
        else:
            corrections.append((p, False))
    got = {k: _backward(adapter, spec, x, w, b, v) for k, v in runs.items()}
    bnd = {k: _bounds(adapter, spec, x, w, v, with_bias) for k, v in runs.items()}
    results = []
    for index, (name, pass_) in enumerate(GRADS):
        if pass_ == "grad_bias" and not with_bias:
            continue
        f = lambda k: got[k][index].astype(np.float64)   # noqa: E731
        terms = [f("g1"), f("g2")]
        tol = bnd["g1"][pass_][1].values + bnd["g2"][pass_][1].values + bnd["g3"][pass_][1].values
        free = _free(adapter, spec, *(bnd[k][pass_][1] for k in runs))
        for item, by_adapter in corrections:
            if by_adapter:
                terms.append(f(item))
                tol = tol + bnd[item][pass_][1].values
            else:      # not representable: its (tiny) effect from the float64 reference
                r, rb = pass_bound(adapter, spec, pass_, {"x": x, "w": w, "grad_y": item})
                terms.append(r)
                tol = tol + gamma(max(rb.n, 1), U64) * rb.magnitude
        rhs = terms[0]
        for t in terms[1:]:
            rhs = rhs + t
        tol = tol + gamma(len(terms) - 1, U64) * sum(np.abs(t) for t in terms)
        results.append(compare(got["g3"][index], rhs, tol, what=name, allow=free,
                               criterion=f"additivity in g: |{name}(g1+g2) - {name}(g1) - {name}(g2) "
                                         "- correction| <= sum of the bounds",
                               explanation=bnd["g1"][pass_][1].explain()))
    return results


def _homogeneity(adapter, case, g1, base):
    """GI(2^k g) == 2^k GI(g) (and GW, GB) bit for bit when no product or result leaves the
    normal range; within B(2^k g) + 2^k B(g) for an adapter not claiming determinism."""
    spec, x, w, b = case.spec, case.x, case.w, case.b
    fmt = get_format(spec.dtype)
    k = power_of_two(case, SALTS["upstream_scale"])
    m = model_of(adapter, spec).resolve(spec.dtype)
    top = min(get_format(m.accumulate).max, get_format(m.output).max, fmt.max)
    biggest = max((bd[1].magnitude.max(initial=0) for bd in base.values()), default=0.0)
    if biggest >= top / 2.0 ** (max(k, 0) + 1) or \
            np.abs(g1.astype(np.float64)).max(initial=0) * 2.0 ** k >= fmt.max:
        k = -1
    exact = g1.astype(np.float64) * 2.0 ** k
    gs = to_format(exact, spec.dtype)
    if not np.array_equal(gs.astype(np.float64), exact):
        return [Evidence.skip(f"homogeneity: 2^{k}·g is not exact in {spec.dtype}")]
    if not (products_stay_normal(adapter, spec, w, g1, k) and products_stay_normal(adapter, spec, x, g1, k)):
        return [Evidence.skip(f"homogeneity: products of 2^{k}·g would be subnormal")]
    got1 = _backward(adapter, spec, x, w, b, g1)
    gots = _backward(adapter, spec, x, w, b, gs.astype(g1.dtype))
    deterministic = adapter.capabilities.deterministic
    scaled_bounds = None if deterministic else _bounds(adapter, spec, x, w, gs, b is not None)
    tiny = max(fmt.tiny, get_format(m.output).tiny)
    results = []
    for index, (name, pass_) in enumerate(GRADS):
        if pass_ not in base:
            continue
        y1 = got1[index].astype(np.float64)
        free = near_underflow(y1, gots[index], k, tiny) | ~np.isfinite(y1) | \
            overflow_possible(spec, adapter, base[pass_][1])
        tol = 0.0 if deterministic else scaled_bounds[pass_][1].values + 2.0 ** k * base[pass_][1].values
        results.append(compare(gots[index], y1 * 2.0 ** k, tol, what=name, allow=free, exact=deterministic,
                               criterion=f"homogeneity in g: {name}(2^{k}·g) == 2^{k}·{name}(g)"
                                         + (" bit for bit" if deterministic else " within both bounds"),
                               explanation="power-of-two scaling commutes with every rounding "
                                           "(no under/overflow)"))
    return results


@invariant("backward.upstream_linearity", passes=("backward",),
           statement="the gradients are linear in the upstream gradient: additive within the "
                     "bounds, homogeneous under 2^k bit for bit")
def linearity(adapter, case, ctx):
    """For P in {GI, GW, GB}: P(g1 + g2) = P(g1) + P(g2) within B(g1) + B(g2) + B(g1+g2)
    (the rounding of g1 + g2 corrected exactly); P(2^k g) = 2^k P(g) bit for bit
    (deterministic adapters, no under/overflow)."""
    g1 = case.grad_y
    base = _bounds(adapter, case.spec, case.x, case.w, g1, case.b is not None)
    return combine(*_additivity(adapter, case, g1), *_homogeneity(adapter, case, g1, base))


@invariant("backward.bias_independence", passes=("backward",), needs=Needs(bias=True),
           requires=_needs_bias,
           statement="the input and weight gradients do not depend on whether a bias is passed")
def bias_independence(adapter, case, ctx):
    """GI and GW of backward(x, w, b, g) equal those of backward(x, w, None, g)
    within B + B (both approximate the same exact gradient)."""
    spec = case.spec
    nb, zb = without_bias(adapter, spec, case.b)        # no bias (or a zero one)
    with_b = _backward(adapter, spec, case.x, case.w, case.b, case.grad_y)
    without = _backward(adapter, nb, case.x, case.w, zb, case.grad_y)
    bnd = _bounds(adapter, nb, case.x, case.w, case.grad_y, False)
    results = []
    for index, (name, pass_) in enumerate(GRADS[:2]):
        bound = bnd[pass_][1]
        results.append(compare(with_b[index], without[index].astype(np.float64), 2 * bound.values,
                               what=name, allow=overflow_possible(nb, adapter, bound),
                               criterion=f"bias independence: {name} with b == {name} with b=None "
                                         "within twice the bound",
                               explanation=bound.explain()))
    return combine(*results)
