"""Backward identities that use the adapter's own results, no reference value.

* the dot-product (adjoint) test of Claerbout: <f(x), g> = <x, GI(g)> = <w, GW(g)>;
* the weight gradient as a correlation of x with g, computed by the adapter's forward
  (batch and channels swapped, stride and dilation swapped);
* the input gradient as a transposed convolution, computed by the adapter's forward on
  the zero-inserted, padded upstream gradient with the flipped kernel;
* central differences of the forward along random directions (exact in exact
  arithmetic: the convolution is linear, so the truncation error is zero).

Each comparison is between two computed values of the same exact quantity, so its
tolerance is the sum of both derived bounds (convwitness.numerics.bounds), plus the float64
rounding of any inner product formed here: gamma_m(2^-53) sum |a_i b_i| for m terms
(Higham 2002, §3.1).
"""
from __future__ import annotations

import numpy as np

from ..numerics.gamma import U64, gamma
from .evidence import Evidence, compare, combine
from ..geometry.formats import get_format, to_format
from ..geometry.spec import ConvSpec
from ..cases.strategies import Needs
from ..cases.values import NUMERIC_KINDS, SALTS, aux_rng
from . import invariant
from ._common import overflow_possible, pass_bound, run_forward, without_bias
from .backward import _backward, _two_sum

# near_max data make the float64 inner products (or the weight gradient's N*prod(L_out)
# sums) overflow, so the scalar identities cannot be formed; forward.reference covers them.
SCALAR_KINDS = tuple(k for k in NUMERIC_KINDS if k != "near_max")


def _skip(why: str) -> Evidence:
    return Evidence.skip(why)


def _cf(a: np.ndarray, layout: str) -> np.ndarray:
    """x, y, g or w of ``layout`` as channels first (a view)."""
    return np.moveaxis(a, -1, 1) if layout == "channels_last" else a


def _from_cf(a: np.ndarray, layout: str) -> np.ndarray:
    return np.ascontiguousarray(np.moveaxis(a, 1, -1) if layout == "channels_last" else a)


def _derived_layout(caps) -> str:
    return "channels_first" if "channels_first" in caps.layouts else "channels_last"


def _sum_bound(weights, values) -> float:
    """An upper bound on sum |weights_i| * values_i (values >= 0) despite float64 rounding."""
    a = np.abs(np.asarray(weights, dtype=np.float64)).ravel()
    s = float(a @ np.asarray(values, dtype=np.float64).ravel())
    return s * (1 + 2 * gamma(a.size + 1, U64))


def _dot(a, b) -> tuple[float, float]:
    """float64 <a, b> and a bound on its rounding: gamma_m sum |a_i b_i| (+ underflow)."""
    a = np.asarray(a, dtype=np.float64).ravel()
    b = np.asarray(b, dtype=np.float64).ravel()
    return float(a @ b), gamma(max(a.size, 1), U64) * _sum_bound(a, np.abs(b)) + a.size * 2.0 ** -1074


def _overflow(spec, adapter, *bounds) -> bool:
    return any(bool(overflow_possible(spec, adapter, b).any()) for b in bounds)


def _no_bias_call(adapter, spec, x, w, b):
    """(spec, x, w, bias) of the forward call without bias (a zero bias for a port that
    compiles per shape: the case's own signature, :func:`without_bias`)."""
    spec, zb = without_bias(adapter, spec, b)
    return spec, x, w, zb


def _scalar(actual, expected, tol, *, what, criterion, explanation):
    return compare(np.array([actual]), np.array([expected]), np.array([tol]), what=what,
                   criterion=criterion, explanation=explanation)


@invariant("backward.adjoint_identity", steer=True, passes=("forward", "backward"), needs=Needs(kinds=SCALAR_KINDS),
           statement="dot-product test: <f(x) - b, g> = <x, grad_x> = <w, grad_w> for the "
                     "adapter's own forward and backward")
def adjoint(adapter, case, ctx):
    """<f_0(x), g> = <x, GI(g)> and <f_0(x), g> = <w, GW(g)> (f_0 = f - b, the linear part,
    computed without bias), inner products in float64; tolerance
    sum_j |g_j| B_y[j] + sum_i |x_i| B_GI[i] (w: |w_i| B_GW[i]) + gamma_m(2^-53) sum |terms|."""
    spec = case.spec
    nb = spec.replace(bias=False)
    y = run_forward(adapter, *_no_bias_call(adapter, spec, case.x, case.w, case.b))
    gx, gw, _ = _backward(adapter, spec, case.x, case.w, case.b, case.grad_y)
    arrays = {"x": case.x, "w": case.w, "grad_y": case.grad_y}
    _, by = pass_bound(adapter, nb, "forward", arrays)
    _, bgx = pass_bound(adapter, spec, "grad_input", arrays)
    _, bgw = pass_bound(adapter, spec, "grad_weight", arrays)
    if _overflow(nb, adapter, by) or _overflow(spec, adapter, bgx, bgw):
        return _skip("a result may overflow its format, the inner products are not formed")
    lhs, r_lhs = _dot(y, case.grad_y)
    tol_y = _sum_bound(case.grad_y, by.values) + r_lhs
    results = []
    for name, a, ga, bound in (("x", case.x, gx, bgx), ("w", case.w, gw, bgw)):
        rhs, r_rhs = _dot(a, ga)
        tol = tol_y + _sum_bound(a, bound.values) + r_rhs
        results.append(_scalar(lhs, rhs, tol, what=f"<f(x), g> against <{name}, grad_{name}>",
                               criterion=f"adjoint: |<f(x) - b, g> - <{name}, grad_{name}>| <= "
                                         f"sum|g| B_y + sum|{name}| B_grad_{name} + float64 rounding",
                               explanation=f"forward: {by.explain()}; gradient: {bound.explain()}"))
    return combine(*results)


def _wc_adjust(caps, needs: Needs) -> Needs:
    """Only strides the adapter can run as a dilation, and dilations it can run as a stride."""
    from dataclasses import replace
    return replace(needs, stride=False if not caps.dilation else needs.stride,
                   dilation=False if not caps.stride else needs.dilation)


def _correlation_spec(spec: ConvSpec, caps) -> ConvSpec:
    """The forward geometry of the weight gradient as a correlation (one group's)."""
    G = spec.groups
    return ConvSpec(batch=spec.in_channels // G, in_channels=spec.batch,
                    out_channels=spec.out_channels // G, input_size=spec.input_size,
                    kernel_size=spec.output_size, stride=spec.dilation, padding=spec.padding,
                    dilation=spec.stride, groups=1, bias=False, dtype=spec.dtype,
                    layout=_derived_layout(caps))


@invariant("grad_weight.forward_correlation",
           derives=lambda spec, caps: [("forward", _correlation_spec(spec, caps))],
           passes=("forward", "backward"), adjust=_wc_adjust,
           statement="the weight gradient equals the correlation of the input with the upstream "
                     "gradient, computed by the adapter's own forward")
def weight_correlation(adapter, case, ctx):
    """GW[gO + o, c, t] = sum_{n,h} g[n, gO + o, h] x_p[n, gC + c, h s + t d]
    = f(X', W'; stride d, dilation s, padding p)[c, o, t] per group g, with
    X'[c, n] = x[n, gC + c], W'[o, n] = g[n, gO + o] (kernel size L_out), keeping the
    first k outputs per axis; within B_GW + B_f' (n = N prod(L_out) for both)."""
    spec = case.spec
    G = spec.groups
    Cg, Og = spec.in_channels // G, spec.out_channels // G
    derived = _correlation_spec(spec, adapter.capabilities)
    layout = derived.layout
    if not adapter.capabilities.admits(derived):
        return _skip(f"derived correlation not admitted: {adapter.capabilities.refusal(derived)}")
    xcf, gcf = _cf(case.x, spec.layout), _cf(case.grad_y, spec.layout)
    crop = (slice(None), slice(None)) + tuple(slice(0, k) for k in spec.kernel_size)
    arrange = lambda a: np.swapaxes(_cf(a, layout)[crop], 0, 1)   # noqa: E731  (Og, Cg, *k)
    got, tol, free = [], [], []
    for g in range(G):
        xd = _from_cf(np.swapaxes(xcf[:, g * Cg:(g + 1) * Cg], 0, 1), layout)
        wd = _from_cf(np.swapaxes(gcf[:, g * Og:(g + 1) * Og], 0, 1), layout)
        y = run_forward(adapter, derived, xd, wd, None)
        _, bound = pass_bound(adapter, derived, "forward", {"x": xd, "w": wd})
        got.append(arrange(y).astype(np.float64))
        tol.append(arrange(bound.values))
        free.append(arrange(overflow_possible(derived, adapter, bound)))
    corr = _from_cf(np.concatenate(got), spec.layout)
    gw = _backward(adapter, spec, case.x, case.w, case.b, case.grad_y)[1]
    _, bgw = pass_bound(adapter, spec, "grad_weight", {"x": case.x, "grad_y": case.grad_y})
    return compare(gw, corr, bgw.values + _from_cf(np.concatenate(tol), spec.layout), what="grad_w",
                   allow=overflow_possible(spec, adapter, bgw) | _from_cf(np.concatenate(free), spec.layout),
                   criterion=f"weight correlation: grad_w == own forward of x with g (stride "
                             f"{spec.dilation}, dilation {spec.stride}) within B_GW + B_f'",
                   explanation=bgw.explain())


def _crop_input(z: np.ndarray, spec: ConvSpec) -> np.ndarray:
    """gx[..., i] = z[..., i + p_lo] where 0 <= i + p_lo < L_p, else 0 (input cropped away)."""
    out = np.zeros(z.shape[:2] + spec.input_size, dtype=z.dtype)
    src, dst = [slice(None)] * 2, [slice(None)] * 2
    for L, (lo, _), Lp in zip(spec.input_size, spec.padding, z.shape[2:]):
        i0, i1 = max(0, -lo), max(max(0, -lo), min(L, Lp - lo))
        dst.append(slice(i0, i1))
        src.append(slice(i0 + lo, i1 + lo))
    out[tuple(dst)] = z[tuple(src)]
    return out


def _flipped_spec(spec: ConvSpec, caps) -> ConvSpec:
    """The forward geometry of the input gradient as a convolution of the zero-inserted,
    padded upstream gradient with the flipped kernel."""
    size = tuple(s * (o - 1) + 1 + d * (k - 1) * 2 + r for s, o, d, k, r in
                 zip(spec.stride, spec.output_size, spec.dilation, spec.kernel_size, spec.remainder))
    return ConvSpec(batch=spec.batch, in_channels=spec.out_channels, out_channels=spec.in_channels,
                    input_size=size, kernel_size=spec.kernel_size, stride=1, padding=0,
                    dilation=spec.dilation, groups=spec.groups, bias=False, dtype=spec.dtype,
                    layout=_derived_layout(caps))


@invariant("grad_input.forward_flipped_kernel",
           derives=lambda spec, caps: [("forward", _flipped_spec(spec, caps))],
           passes=("forward", "backward"),
           statement="the input gradient equals the adapter's own forward of the zero-inserted, "
                     "padded upstream gradient with the flipped kernel")
def input_transposed(adapter, case, ctx):
    """GI = crop_{p_lo}( f(pad(dilate_s(g), d(k-1), d(k-1) + r), flip(w)^T; stride 1, dilation d) ),
    flip(w)^T[gC + c, o, t] = w[gO + o, c, k-1-t]; dilate_s puts s-1 zeros between samples,
    r = (L + p_lo + p_hi - e) mod s; crop takes positions p_lo..p_lo+L (0 where negative
    padding cropped the input); within B_GI + B_f' (n = C_out/G prod(k) for both)."""
    spec = case.spec
    G, nd = spec.groups, spec.ndim
    Cg, Og = spec.in_channels // G, spec.out_channels // G
    gcf = _cf(case.grad_y, spec.layout).astype(np.float64)
    size = tuple(s * (o - 1) + 1 for s, o in zip(spec.stride, spec.output_size))
    gd = np.zeros(gcf.shape[:2] + size)
    gd[(slice(None), slice(None)) + tuple(slice(None, None, s) for s in spec.stride)] = gcf
    gp = np.pad(gd, [(0, 0), (0, 0)] + [(d * (k - 1), d * (k - 1) + r) for d, k, r
                                        in zip(spec.dilation, spec.kernel_size, spec.remainder)])
    wcf = _cf(case.w, spec.layout).astype(np.float64)
    wf = wcf.reshape((G, Og, Cg) + spec.kernel_size).swapaxes(1, 2)
    wf = np.flip(wf.reshape((spec.in_channels, Og) + spec.kernel_size), axis=tuple(range(2, 2 + nd)))
    derived = _flipped_spec(spec, adapter.capabilities)
    layout = derived.layout
    assert derived.input_size == gp.shape[2:]
    if not adapter.capabilities.admits(derived):
        return _skip(f"derived transposed convolution not admitted: {adapter.capabilities.refusal(derived)}")
    xd = to_format(_from_cf(gp, layout), spec.dtype)
    wd = to_format(_from_cf(wf, layout), spec.dtype)
    z = run_forward(adapter, derived, xd, wd, None)
    _, bz = pass_bound(adapter, derived, "forward", {"x": xd, "w": wd})
    back = lambda a: _from_cf(_crop_input(_cf(a, layout), spec), spec.layout)   # noqa: E731
    gx = _backward(adapter, spec, case.x, case.w, case.b, case.grad_y)[0]
    _, bgi = pass_bound(adapter, spec, "grad_input", {"w": case.w, "grad_y": case.grad_y})
    return compare(gx, back(z.astype(np.float64)), bgi.values + back(bz.values), what="grad_x",
                   allow=overflow_possible(spec, adapter, bgi) | back(overflow_possible(derived, adapter, bz)),
                   criterion="input gradient as a transposed convolution by the own forward: "
                             "|grad_x - crop(f(dilated, padded g, flipped w))| <= B_GI + B_f'",
                   explanation=bgi.explain())


# -- finite differences ----------------------------------------------------------------
def _exact_in(values: np.ndarray, dtype: str) -> np.ndarray:
    r = to_format(values, dtype).astype(np.float64)
    return np.isfinite(values) & (r == values)


def _direction(case, a: np.ndarray, salt: int):
    """(h, v): v small nonzero integers (from aux_rng), h a power of two, a +- h v exact in the dtype.

    The largest h for which at least half of the components stay exact is taken (else the
    h that keeps the most); v is zeroed where a +- h v would round (any direction will do).
    None when no component can move exactly.
    """
    rng = aux_rng(case.seed, salt)
    v = rng.choice([-2.0, -1.0, 1.0, 2.0], size=a.shape)
    a64 = a.astype(np.float64)
    top = float(np.abs(a64).max(initial=0.0))
    e = int(np.frexp(top)[1]) if top > 0 else 0
    nz = v != 0
    best = (0, None)
    for j in range(e + 2, e - get_format(case.spec.dtype).precision - 4, -1):
        h = 2.0 ** j
        ok = nz.copy()
        for sign in (1.0, -1.0):
            s, err = _two_sum(a64, sign * h * v)
            ok &= (err == 0) & _exact_in(s, case.spec.dtype)
        kept = int(ok.sum())
        if kept > best[0]:
            best = (kept, (h, np.where(ok, v, 0.0)))
        if kept and 2 * kept >= nz.sum():
            break
    return best[1]


def _fd(adapter, case, name: str, grad, grad_bound, salt: int):
    spec = case.spec
    nb = spec.replace(bias=False)
    a = getattr(case, name)
    hv = _direction(case, a, salt)
    if hv is None:
        return _skip(f"no power-of-two step keeps {name} +- h v exact in {spec.dtype}")
    h, v = hv
    ys, bounds = [], []
    for sign in (1.0, -1.0):
        pert = to_format(a.astype(np.float64) + sign * h * v, spec.dtype)
        arrays = {"x": case.x, "w": case.w, name: pert}
        ys.append(run_forward(adapter, *_no_bias_call(adapter, spec, arrays["x"], arrays["w"], case.b)))
        bounds.append(pass_bound(adapter, nb, "forward", arrays)[1])
    if _overflow(nb, adapter, *bounds) or _overflow(spec, adapter, grad_bound):
        return _skip("a result may overflow its format, the inner products are not formed")
    g = case.grad_y
    (lp, rp), (lm, rm) = _dot(ys[0], g), _dot(ys[1], g)
    diff = lp - lm
    fd = diff / (2 * h)
    tol_fd = (_sum_bound(g, bounds[0].values) + _sum_bound(g, bounds[1].values) + rp + rm
              + 2 * U64 * abs(diff)) / (2 * h)
    rhs, rr = _dot(v, grad)
    tol = tol_fd + _sum_bound(v, grad_bound.values) + rr
    return _scalar(fd, rhs, tol, what=f"central difference along v against <v, grad_{name}>",
                   criterion=f"finite difference in {name} (h = 2^{int(np.log2(h))}, "
                             f"{int((v != 0).sum())} components): |(L({name}+hv) - L({name}-hv))/2h "
                             f"- <v, grad_{name}>| <= (sum|g|(B+ + B-) + rounding)/2h + sum|v| B",
                   explanation=f"L = <f, g> in float64; forward: {bounds[0].explain()}; "
                               f"gradient: {grad_bound.explain()}")


@invariant("backward.finite_differences", passes=("forward", "backward"), needs=Needs(kinds=SCALAR_KINDS),
           statement="central differences of the adapter's own forward along random directions "
                     "equal the gradients' directional derivatives")
def finite_difference(adapter, case, ctx):
    """With L(x) = <f_0(x, w), g> (f_0 without bias, linear in x and in w), h = 2^j and v
    small integers with x +- h v exact: (L(x + h v) - L(x - h v)) / 2h = <v, GI(g)> exactly
    in exact arithmetic (no truncation error); likewise in w with GW(g). Tolerance:
    (sum|g| (B_+ + B_-) + float64 rounding of both L) / 2h + sum |v| B_grad + rounding."""
    spec = case.spec
    gx, gw, _ = _backward(adapter, spec, case.x, case.w, case.b, case.grad_y)
    arrays = {"x": case.x, "w": case.w, "grad_y": case.grad_y}
    _, bgx = pass_bound(adapter, spec, "grad_input", arrays)
    _, bgw = pass_bound(adapter, spec, "grad_weight", arrays)
    return combine(_fd(adapter, case, "x", gx, bgx, SALTS["fd_input"]),
                   _fd(adapter, case, "w", gw, bgw, SALTS["fd_weight"]))
