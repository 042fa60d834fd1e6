"""Error bounds of fast convolution algorithms: Winograd F(m, 3) and FFT.

Their errors are not covered by the componentwise bound of direct summation, so an
adapter declares ``ErrorModel(algorithm="winograd", tile=m)`` or
``ErrorModel(algorithm="fft")`` and gets the bound of its algorithm instead.

Winograd (Lavin & Gray, "Fast Algorithms for Convolutional Neural Networks", CVPR
2016, arXiv:1509.09308): per tile, ``Y = A^T [ sum_c (G g_c G^T) ⊙ (B^T d_c B) ] A``
(one factor per spatial axis). Stage by stage, every elementary term passes through
at most ``N`` roundings: per axis and per transform, ``nnz(row) - 1`` additions plus
one rounding for a coefficient that is not a power of two and one more when the
coefficient itself is not representable (1/6, 1/12, ...); one for the product; ``Cg -
1`` additions over channels (and one for a bias). Hence (Higham 2002, Lemma 3.1)

    |y_hat - y| <= gamma_N(u) * M,   M = |A^T| [ sum_c (|G||g_c||G^T|) ⊙ (|B^T||d_c||B|) ] |A|,

the same algorithm run on absolute values with absolute transform matrices, computed
here in float64 on the very tiling the algorithm uses. Geometries Winograd does not
cover (stride or dilation > 1, kernels other than 3 per axis, transposed) are
computed directly by such implementations, and bounded as direct.

FFT: the convolution is ``z = F^-1 (F x ⊙ F w)`` on zero-padded operands of length
``n``. With a computed FFT of relative normwise error ``eps_F = log2(n) eta / (1 -
log2(n) eta)``, ``eta = mu + gamma_4 (sqrt(2) + mu)`` and twiddle error ``mu ≈ u``
(Higham 2002, §24.1, Theorem 24.2 [from memory]), the pieces give, per pair of input
and weight channel,

    ||z_hat - z||_2 <= (3 eps_F + 2 sqrt(2) gamma_2 + sqrt(n) eps_F^2) * (||x||_2 ||w||_1 + ||x||_1 ||w||_2),

a normwise bound that holds for every element; the channel sum adds ``gamma_{Cg-1}``
of the summed magnitudes. It is O(log n) u, and far from componentwise.
"""
from __future__ import annotations

import math

import numpy as np

from ..errors import FormatError
from ..geometry.formats import get_format
from .gamma import gamma
from .winograd import WINOGRAD, to_channels_first, winograd_conv, winograd_eligible

__all__ = ["winograd_roundings", "fast_bound"]

def _coefficient_roundings(c: float) -> int:
    if c == 0 or abs(c) == 1:
        return 0
    m, _ = math.frexp(abs(c))
    if m == 0.5:                     # a power of two: exact scaling
        return 0
    # representable in any binary format with >= 8 bits? (5, 3/4 ...) one rounding; else two
    f = abs(c)
    for _ in range(8):
        if f == int(f):
            return 1
        f *= 2
    return 2


def _stage(M: np.ndarray) -> int:
    worst = 0
    for row in M:
        nz = [c for c in row if c != 0]
        worst = max(worst, len(nz) - 1 + max((_coefficient_roundings(c) for c in nz), default=0))
    return worst


def winograd_roundings(m: int, ndim: int, cg: int, bias: bool) -> int:
    """N: roundings an elementary term of F(m, 3) passes through (see the module doc)."""
    AT, G, BT = WINOGRAD[m]
    per_axis = _stage(BT) + _stage(G) + _stage(AT)
    return ndim * per_axis + 1 + max(cg - 1, 0) + (1 if bias else 0)


def _fft_eps(n: int, u: float) -> float:
    eta = u + gamma(4, u) * (math.sqrt(2) + u)
    lg = max(1, math.ceil(math.log2(max(n, 2))))
    if lg * eta >= 1:
        return math.inf
    return lg * eta / (1 - lg * eta)


def fast_bound(spec, model, pass_: str, x, w, b, reference):
    """(values, coefficient, magnitude, overflow mask, underflow term, explanation)."""
    with np.errstate(over="ignore", invalid="ignore"):
        return _fast_bound(spec, model, pass_, x, w, b, reference)


def _fast_bound(spec, model, pass_: str, x, w, b, reference):
    m = model.resolve(spec.dtype)
    if pass_ not in ("forward",):
        raise FormatError(f"the {m.algorithm} error model covers the forward pass only; pass "
                          f"{pass_!r} needs a direct model (declare it in Capabilities.error_models "
                          "or offer no such pass)")
    u = get_format(m.accumulate).u
    if m.algorithm == "winograd":
        tile = model.tile or 2
        if tile not in WINOGRAD:
            raise FormatError(f"ErrorModel: tile={tile} has no transform matrices; use 2 or 4")
        if not winograd_eligible(spec):
            return None
        M, peak = winograd_conv(spec, x, w, tile, absolute=True, peaks=True)
        if b is not None:
            M = M + _bias_shape(spec, np.abs(np.asarray(b, dtype=np.float64)))
        if spec.layout == "channels_last":
            M, peak = np.moveaxis(M, 1, -1), np.moveaxis(peak, 1, -1)
        N = winograd_roundings(tile, spec.ndim, spec.in_channels // spec.groups, b is not None)
        c = gamma(N, u) * (1 + gamma(N + 4, 2.0 ** -53))
        top = get_format(m.accumulate).max
        # the transformed operands are products of |data| and coefficients; an intermediate
        # value of the tile may overflow where its magnitude reaches the top of the range
        overflow = np.maximum(peak, M) * (1 + c) * 8 >= top
        # underflow: each of the N roundings may err by one smallest subnormal, carried
        # through the later stages with at most the coefficients' and weights' magnitudes
        wmax = max(1.0, float(np.abs(np.asarray(w, dtype=np.float64)).max(initial=0.0)))
        unit = _unit_batch_channels_first(spec)
        ones = winograd_conv(unit, np.ones(unit.x_shape), np.full(unit.w_shape, wmax), tile,
                             absolute=True)
        under = N * get_format(m.accumulate).smallest_subnormal * float(ones.max(initial=0.0))
        return (c * M, c, M, overflow, under, f"Winograd F({tile},3): γ_{N} at u=2^{int(math.log2(u))} on the "
                f"transformed magnitudes |Aᵀ|(|G||g||Gᵀ| ⊙ |Bᵀ||d||B|)|A|")
    # fft
    from . import reference as ref
    xf = to_channels_first(spec, np.asarray(x)).astype(np.float64)
    wf = to_channels_first(spec, np.asarray(w)).astype(np.float64)
    n = math.prod(L + lo + hi + e - 1 for L, (lo, hi), e in
                  zip(spec.input_size, spec.padding, spec.effective_kernel))
    eps = _fft_eps(n, u)
    E = 3 * eps + 2 * math.sqrt(2) * gamma(2, u) + math.sqrt(n) * eps ** 2
    axes_x = tuple(range(2, 2 + spec.ndim))
    x2, x1 = np.sqrt((xf ** 2).sum(axis=axes_x)), np.abs(xf).sum(axis=axes_x)        # (N, C)
    w2, w1 = np.sqrt((wf ** 2).sum(axis=axes_x)), np.abs(wf).sum(axis=axes_x)        # (O, Cg)
    G = spec.groups
    Cg, Og = spec.in_channels // G, spec.out_channels // G
    S = np.zeros((spec.batch, spec.out_channels))
    for g in range(G):
        xs2, xs1 = x2[:, g * Cg:(g + 1) * Cg], x1[:, g * Cg:(g + 1) * Cg]
        ws2, ws1 = w2[g * Og:(g + 1) * Og], w1[g * Og:(g + 1) * Og]
        S[:, g * Og:(g + 1) * Og] = xs2 @ ws1.T + xs1 @ ws2.T
    mag = ref.forward_magnitude(spec, x, w, b)
    per_map = E * S
    shape = (spec.batch, spec.out_channels) + (1,) * spec.ndim
    pair = per_map.reshape(shape)
    if spec.layout == "channels_last":
        pair = np.moveaxis(pair, 1, -1)
    sum_err = gamma(max(Cg - 1 + (b is not None), 0), u) * (mag + pair)
    values = pair + sum_err
    top = get_format(m.accumulate).max
    overflow = (x1.max(initial=0.0) * w1.max(initial=0.0) * max(n, 1) * 4 >= top) | np.zeros(values.shape, bool)
    under = 4 * n * get_format(m.accumulate).smallest_subnormal * (1 + float(w1.max(initial=0.0)))
    return (values, 0.0, mag, overflow, under, f"FFT (n={n}): normwise {E / u:.3g}·u·(‖x‖₂‖w‖₁+‖x‖₁‖w‖₂) per channel "
            f"pair, plus γ_{Cg - 1} over channels")


def _unit_batch_channels_first(spec):
    """The spec with batch 1, channels first and no bias (all channels and groups kept):
    the geometry on which the underflow carry of one tile is measured."""
    return spec.replace(batch=1, layout="channels_first", bias=False)


def _bias_shape(spec, b):
    return b.reshape((1, -1) + (1,) * spec.ndim)
