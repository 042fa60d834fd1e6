"""Winograd F(m, 3) convolution (Lavin & Gray, "Fast Algorithms for Convolutional Neural
Networks", CVPR 2016, arXiv:1509.09308): the transform matrices and the tiled algorithm.

One place for both users: the Winograd error bound (fastbounds.py) runs it on absolute
values to get the magnitude of its bound, and the numpy Winograd adapter runs it in the
working precision.
"""
from __future__ import annotations

import numpy as np

__all__ = ["WINOGRAD", "winograd_eligible", "winograd_conv", "to_channels_first"]

# Transform matrices (A^T, G, B^T) of F(m, 3), Lavin & Gray 2016.
WINOGRAD = {
    2: (np.array([[1, 1, 1, 0], [0, 1, -1, 1]], float),
        np.array([[1, 0, 0], [0.5, 0.5, 0.5], [0.5, -0.5, 0.5], [0, 0, 1]]),
        np.array([[1, 0, -1, 0], [0, 1, 1, 0], [0, -1, 1, 0], [0, -1, 0, 1]], float)),
    4: (np.array([[1, 1, 1, 1, 1, 0], [0, 1, -1, 2, -2, 0], [0, 1, 1, 4, 4, 0], [0, 1, -1, 8, -8, 1]], float),
        np.array([[1 / 4, 0, 0], [-1 / 6, -1 / 6, -1 / 6], [-1 / 6, 1 / 6, -1 / 6],
                  [1 / 24, 1 / 12, 1 / 6], [1 / 24, -1 / 12, 1 / 6], [0, 0, 1]]),
        np.array([[4, 0, -5, 0, 1, 0], [0, -4, -4, 1, 1, 0], [0, 4, -4, -1, 1, 0],
                  [0, -2, -1, 2, 1, 0], [0, 2, -1, -2, 1, 0], [0, 4, 0, -5, 0, 1]], float)),
}


def winograd_eligible(spec) -> bool:
    return (not spec.transposed and all(k == 3 for k in spec.kernel_size)
            and all(s == 1 for s in spec.stride) and all(d == 1 for d in spec.dilation))


def to_channels_first(spec, a):
    if spec.layout == "channels_last":
        return np.moveaxis(a, -1, 1)
    return a


def winograd_conv(spec, x, w, m: int, *, dtype=np.float64, absolute: bool = False,
                  peaks: bool = False):
    """Winograd F(m, 3) forward pass (no bias) in ``dtype``, channels first out.

    With ``absolute=True`` the transforms and data are replaced by their absolute
    values (in float64): the magnitude M of the bound. With ``peaks=True`` also the
    largest intermediate magnitude each output's tile goes through (transformed
    input, transformed kernel, channel sums), for the overflow guard.
    """
    AT, G, BT = (np.abs(t) if absolute else t for t in WINOGRAD[m])
    AT, G, BT = (t.astype(dtype) for t in (AT, G, BT))
    x = to_channels_first(spec, np.asarray(x)).astype(dtype)
    w = to_channels_first(spec, np.asarray(w)).astype(dtype)
    if absolute:
        x, w = np.abs(x), np.abs(w)
    nd = spec.ndim
    Ho = spec.output_size
    tiles = [-(-h // m) for h in Ho]
    a = m + 2
    # explicit padding (cropping where negative), then extend to whole tiles
    pads, crop = [], []
    for (lo, hi), L, t in zip(spec.padding, spec.input_size, tiles):
        start = max(0, -lo)
        kept = L - start - max(0, -hi)
        before = max(0, lo)
        crop.append(slice(start, start + kept))
        pads.append((before, t * m + 2 - kept - before))
    xp = np.pad(x[(slice(None), slice(None)) + tuple(crop)], [(0, 0), (0, 0)] + pads)
    view = xp
    for i in range(nd):
        view = np.lib.stride_tricks.sliding_window_view(view, a, axis=2 + i)
        sl = [slice(None)] * view.ndim
        sl[2 + i] = slice(0, None, m)
        view = view[tuple(sl)]
    # view: (N, C, T1..Tn, a1..an); transform the tile axes with B^T
    V = view
    for i in range(nd):
        V = np.moveaxis(np.tensordot(V, BT, axes=([2 + nd + i], [1])), -1, 2 + nd + i)
    U = w
    for i in range(nd):
        U = np.moveaxis(np.tensordot(U, G, axes=([2 + i], [1])), -1, 2 + i)
    Gs, O = spec.groups, spec.out_channels
    Cg, Og = spec.in_channels // Gs, O // Gs
    N = spec.batch
    outs = []
    letters = "ijkl"[:nd]
    tl = "tuvw"[:nd]
    expr = f"nc{tl}{letters},oc{letters}->no{tl}{letters}"
    for g in range(Gs):
        outs.append(np.einsum(expr, V[:, g * Cg:(g + 1) * Cg], U[g * Og:(g + 1) * Og]))
    Mt = np.concatenate(outs, axis=1) if outs else np.zeros((N, 0) + tuple(tiles) + (a,) * nd, dtype)
    Y = Mt
    for i in range(nd):
        Y = np.moveaxis(np.tensordot(Y, AT, axes=([2 + nd + i], [1])), -1, 2 + nd + i)
    # (N, O, T1..Tn, m1..mn) -> (N, O, T1*m, ..., Tn*m), cropped
    perm = [0, 1]
    for i in range(nd):
        perm += [2 + i, 2 + nd + i]
    crop = (slice(None), slice(None)) + tuple(slice(0, h) for h in Ho)
    Y = np.ascontiguousarray(Y.transpose(perm).reshape((N, O) + tuple(t * m for t in tiles))[crop])
    if not peaks:
        return Y
    tile_axes = tuple(range(2 + nd, 2 + 2 * nd))
    vpeak = np.abs(V).max(axis=tile_axes, initial=0.0)                  # (N, C, T..)
    upeak = float(np.abs(U).max(initial=0.0))
    peak = np.abs(Mt).max(axis=tile_axes, initial=0.0)                  # (N, O, T..)
    for g in range(Gs):
        vg = vpeak[:, g * Cg:(g + 1) * Cg].max(axis=1, initial=0.0)
        peak[:, g * Og:(g + 1) * Og] = np.maximum(peak[:, g * Og:(g + 1) * Og], vg[:, None])
    peak = np.maximum(peak, upeak)
    for i in range(nd):
        peak = np.repeat(peak, m, axis=2 + i)
    return Y, np.ascontiguousarray(peak[crop])
