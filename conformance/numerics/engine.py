"""Internal: the phase-grid engine behind the float64 reference.

Notation per spatial axis: padded input ``x_p`` (zeros outside, cropped where the
padding is negative), stride ``s``, dilation ``d``. The forward pass is

    y[n, o, h] = sum_{c, t} w[o, c, t] * x_p[n, g(o)*Cg + c, h*s + t*d].

Write ``t*d = q*s + a`` (``0 <= a < s``) and split ``x_p`` into ``s`` *phases*
``P_a[m] = x_p[m*s + a]``. Then ``x_p[h*s + t*d] = P_{a}[h + q]``: every tap reads
one phase at a constant offset. With each phase stored as a matrix (channels x
positions, the positions flattened over ``N x Q_0 x Q_1 ...``), a tap is a slice of
columns at a constant offset, so

    Y[:, cols] += W_t @ P_a[:, cols + offset(q)]      (one BLAS GEMM per tap)

computes the output on the phase grid; columns outside ``h < L_out`` are garbage and
cropped. The input gradient scatters ``W_t^T @ G`` back the same way, and the weight
gradient is ``G @ P_a[:, cols + offset]^T``. Where a kernel is large next to the output,
the "gather" mode copies the windows once (im2col) and does a single GEMM instead.
No Python loop ever runs over output positions; loops run over taps and phases.
"""
from __future__ import annotations

import itertools
import math

import numpy as np

_GATHER_BYTES = 256 << 20   # largest im2col buffer the gather mode may allocate


class Plan:
    """Geometry of one (non-transposed) convolution on the phase grid."""

    def __init__(self, spec):
        self.spec = spec
        self.nd = spec.ndim
        self.N = spec.batch
        self.G = spec.groups
        self.C = spec.in_channels
        self.O = spec.out_channels
        self.Cg = self.C // self.G
        self.Og = self.O // self.G
        self.S = spec.input_size
        self.K = spec.kernel_size
        self.s = spec.stride
        self.d = spec.dilation
        self.lo = tuple(p[0] for p in spec.padding)
        self.hi = tuple(p[1] for p in spec.padding)
        self.Ho = spec.output_size
        Sp = tuple(L + lo + hi for L, lo, hi in zip(self.S, self.lo, self.hi))
        self.Q = tuple(-(-p // s) for p, s in zip(Sp, self.s))          # ceil(Sp / s)
        self.P = math.prod(self.s)
        self.T = math.prod(self.K)
        qstride = [math.prod(self.Q[i + 1:]) for i in range(self.nd)]
        sstride = [math.prod(self.s[i + 1:]) for i in range(self.nd)]
        self.taps = []          # (tap index, phase index, flat offset, q per axis)
        for t_idx, t in enumerate(itertools.product(*(range(k) for k in self.K))):
            q = tuple(ti * di // si for ti, di, si in zip(t, self.d, self.s))
            a = tuple(ti * di % si for ti, di, si in zip(t, self.d, self.s))
            ph = sum(ai * st for ai, st in zip(a, sstride))
            off = sum(qi * st for qi, st in zip(q, qstride))
            self.taps.append((t_idx, ph, off, q))
        self.Mq = math.prod(self.Q)
        self.M = self.N * self.Mq
        self.Mo = self.N * math.prod(self.Ho)
        if self.Mo:
            self.Mv = (self.N - 1) * self.Mq + sum((h - 1) * st for h, st in zip(self.Ho, qstride)) + 1
        else:
            self.Mv = 0
        # Mode. Shift wastes the garbage columns (Mv vs Mo) and, with few channels per
        # group, runs GEMMs with a tiny inner dimension; gather copies T*Cg values per
        # output position once and runs one long GEMM.
        eff = min(max(self.Cg, 1), 32) / 32          # BLAS efficiency of a short inner dim
        shift_cost = self.T * self.Mv * (self.Cg * self.Og / eff + 2 * self.Og)
        gather_cost = self.T * self.Mo * self.Cg * (20 + self.Og)   # a copy costs ~20 GEMM multiply-adds
        gather_bytes = 8 * self.G * self.Mo * self.T * max(self.Cg, 1)
        self.gather = self.Cg > 1 and gather_bytes <= _GATHER_BYTES and gather_cost < shift_cost
        # Groups per chunk: keep a chunk's accumulator within the L2 cache when the
        # per-tap work is elementwise (depthwise) or small.
        per_group = 8 * max(self.Og, self.Cg, 1) * max(self.Mv, 1)
        self.chunk = max(1, min(self.G, (1 << 19) // per_group)) if per_group < (1 << 19) else 1
        if self.G == 1 or self.Cg * self.Og >= 64:
            self.chunk = self.G

    # -- layout helpers ----------------------------------------------------------
    def _split_channels(self, arr, layout, C):
        """(N, C, *S) or (N, *S, C) -> a view with axes (N, G, C/G, *S)."""
        G = self.G
        if layout == "channels_last":
            v = arr.reshape(arr.shape[:-1] + (G, C // G))
            nd = self.nd
            return v.transpose((0, nd + 1, nd + 2) + tuple(range(1, nd + 1)))
        return arr.reshape((arr.shape[0], G, C // G) + arr.shape[2:])

    def _phase_slices(self):
        """For each phase: (source slices over S, destination slices over Q) or None."""
        cached = getattr(self, "_slices", None)
        if cached is not None:
            return cached
        result = []
        for a in itertools.product(*(range(s) for s in self.s)):
            src, dst = [], []
            for ai, s, L, lo, hi in zip(a, self.s, self.S, self.lo, self.hi):
                start, stop = max(0, -lo), L - max(0, -hi)     # kept part of the input
                shift = max(0, lo) - start                       # padded position = i + shift
                first = start + (ai - (start + shift)) % s
                if first >= stop:
                    break
                count = -(-(stop - first) // s)
                q0 = (first + shift) // s
                src.append(slice(first, first + (count - 1) * s + 1, s))
                dst.append(slice(q0, q0 + count))
            else:
                result.append((tuple(src), tuple(dst)))
                continue
            result.append(None)
        self._slices = result
        return result

    # -- data movement -----------------------------------------------------------
    # Internal layouts: phases X (P, G, Cg, M); outputs Y (G, Og, M) on the phase
    # grid; output columns (G, Og, Mo) on the output grid. M flattens (N, *Q).
    def to_phases(self, x, layout):
        """x (input layout) -> X of shape (P, G, Cg, M), zero where padded."""
        X = np.zeros((self.P, self.G, self.Cg, self.N) + self.Q)
        xs = self._split_channels(x, layout, self.C)         # (N, G, Cg, *S)
        perm = (1, 2, 0) + tuple(range(3, 3 + self.nd))       # -> (G, Cg, N, *S)
        for ph, sl in enumerate(self._phase_slices()):
            if sl is not None:
                src, dst = sl
                X[(ph, slice(None), slice(None), slice(None)) + dst] = \
                    xs[(slice(None),) * 3 + src].transpose(perm)
        return X.reshape(self.P, self.G, self.Cg, self.M)

    def from_phases(self, X, layout):
        """Inverse of to_phases for gradients: (P, G, Cg, M) -> x layout (cropped part 0)."""
        if layout == "channels_last":
            gx = np.zeros((self.N,) + self.S + (self.C,))
        else:
            gx = np.zeros((self.N, self.C) + self.S)
        gs = self._split_channels(gx, layout, self.C)
        Xg = X.reshape((self.P, self.G, self.Cg, self.N) + self.Q)
        perm = (2, 0, 1) + tuple(range(3, 3 + self.nd))       # (G,Cg,N,*) -> (N,G,Cg,*)
        for ph, sl in enumerate(self._phase_slices()):
            if sl is not None:
                src, dst = sl
                gs[(slice(None),) * 3 + src] = \
                    Xg[(ph, slice(None), slice(None), slice(None)) + dst].transpose(perm)
        return gx

    def _output_view(self, gy, layout):
        gs = self._split_channels(gy, layout, self.O)        # (N, G, Og, *Ho')
        return gs.transpose((1, 2, 0) + tuple(range(3, 3 + self.nd)))   # (G, Og, N, *Ho')

    def grid_from_output(self, gy, layout):
        """gy (y layout; Ho' <= Ho per axis) -> (G, Og, M) on the phase grid, 0 elsewhere."""
        Gg = np.zeros((self.G, self.Og, self.N) + self.Q)
        v = self._output_view(gy, layout)
        Gg[(slice(None),) * 3 + tuple(slice(0, h) for h in v.shape[3:])] = v
        return Gg.reshape(self.G, self.Og, self.M)

    def output_cols(self, gy, layout):
        """gy (y layout; Ho' <= Ho per axis) -> (G, Og, Mo) on the output grid."""
        v = self._output_view(gy, layout)
        if v.shape[3:] == tuple(self.Ho):
            return np.ascontiguousarray(v).reshape(self.G, self.Og, self.Mo)
        out = np.zeros((self.G, self.Og, self.N) + self.Ho)
        out[(slice(None),) * 3 + tuple(slice(0, h) for h in v.shape[3:])] = v
        return out.reshape(self.G, self.Og, self.Mo)

    def _to_layout(self, Yc, layout):
        """(G, Og, N, *Ho) -> y in ``layout``."""
        nd = self.nd
        if layout == "channels_last":
            out = Yc.transpose((2,) + tuple(range(3, 3 + nd)) + (0, 1))
            return out.reshape((self.N,) + self.Ho + (self.O,))
        out = Yc.transpose((2, 0, 1) + tuple(range(3, 3 + nd)))
        return out.reshape((self.N, self.O) + self.Ho)

    def output_from_grid(self, Y, layout):
        Yg = Y.reshape((self.G, self.Og, self.N) + self.Q)
        return self._to_layout(Yg[(slice(None),) * 3 + tuple(slice(0, h) for h in self.Ho)], layout)

    def output_from_cols(self, Yo, layout):
        return self._to_layout(Yo.reshape((self.G, self.Og, self.N) + self.Ho), layout)

    def _window(self, Xgrid, ph, q):
        """Phase ``ph`` at offset ``q`` on the output grid: (G, Cg, N, *Ho)."""
        return Xgrid[(ph, slice(None), slice(None), slice(None)) +
                     tuple(slice(qi, qi + h) for qi, h in zip(q, self.Ho))]

    def im2col(self, X):
        """(P, G, Cg, M) -> (G, T*Cg, Mo), taps major."""
        Xgrid = X.reshape((self.P, self.G, self.Cg, self.N) + self.Q)
        cols = np.empty((self.G, self.T, self.Cg, self.N) + self.Ho)
        for t, ph, _off, q in self.taps:
            cols[:, t] = self._window(Xgrid, ph, q)
        return cols.reshape(self.G, self.T * self.Cg, self.Mo)

    def col2im(self, Z):
        """(G, T*Cg, Mo) -> (P, G, Cg, M), summing overlapping windows."""
        GX = np.zeros((self.P, self.G, self.Cg, self.N) + self.Q)
        Zt = Z.reshape((self.G, self.T, self.Cg, self.N) + self.Ho)
        for t, ph, _off, q in self.taps:
            self._window(GX, ph, q)[...] += Zt[:, t]
        return GX.reshape(self.P, self.G, self.Cg, self.M)

    # -- weights -------------------------------------------------------------------
    def weights_by_tap(self, w, layout):
        """w (O, Cg, *K) or (O, *K, Cg) -> (T, G, Og, Cg)."""
        w = _weights_first(w, layout)
        return np.ascontiguousarray(w.reshape(self.G, self.Og, self.Cg, self.T).transpose(3, 0, 1, 2))

    def weights_stacked(self, w, layout):
        """w -> (G, Og, T*Cg), taps major (matches im2col)."""
        w = _weights_first(w, layout)
        return np.ascontiguousarray(
            w.reshape(self.G, self.Og, self.Cg, self.T).transpose(0, 1, 3, 2)
        ).reshape(self.G, self.Og, self.T * self.Cg)

    def weights_from_stacked(self, dW, layout):
        """(G, Og, T*Cg) -> w layout."""
        w = dW.reshape(self.G, self.Og, self.T, self.Cg).transpose(0, 1, 3, 2)
        w = w.reshape((self.O, self.Cg) + self.K)
        return _weights_last(w) if layout == "channels_last" else np.ascontiguousarray(w)

    def weights_from_taps(self, dW, layout):
        """(T, G, Og, Cg) -> w layout."""
        w = dW.transpose(1, 2, 3, 0).reshape((self.O, self.Cg) + self.K)
        return _weights_last(w) if layout == "channels_last" else np.ascontiguousarray(w)

    def group_chunks(self):
        return [slice(g, min(self.G, g + self.chunk)) for g in range(0, self.G, self.chunk)]


def _weights_first(w, layout):
    if layout == "channels_last":
        return np.moveaxis(w, -1, 1)
    return w


def _weights_last(w):
    return np.ascontiguousarray(np.moveaxis(w, 1, -1))


def _product(A, B, out):
    """out = A @ B for stacks (g, m, k) @ (g, k, n); k == 1 as a broadcast product."""
    if A.shape[-1] == 1:
        np.multiply(A, B, out=out)
    else:
        np.matmul(A, B, out=out)


# -- the three passes ----------------------------------------------------------------
def forward(plan: Plan, x, w, layout):
    """Forward pass without bias, float64, in ``layout``."""
    X = plan.to_phases(x, layout)
    if plan.gather:
        Yo = np.matmul(plan.weights_stacked(w, layout), plan.im2col(X))
        return plan.output_from_cols(Yo, layout)
    Wt = plan.weights_by_tap(w, layout)
    Y = np.zeros((plan.G, plan.Og, plan.M))
    Mv = plan.Mv
    for gs in plan.group_chunks():
        Yv = Y[gs, :, :Mv]
        tmp = np.empty(Yv.shape)
        for t, ph, off, _q in plan.taps:
            _product(Wt[t, gs], X[ph, gs, :, off:off + Mv], tmp)
            Yv += tmp
    return plan.output_from_grid(Y, layout)


def grad_input(plan: Plan, w, gy, layout):
    """Input gradient (the transposed convolution of gy), float64, in ``layout``."""
    if plan.gather:
        W2 = plan.weights_stacked(w, layout)
        Z = np.matmul(W2.transpose(0, 2, 1), plan.output_cols(gy, layout))
        return plan.from_phases(plan.col2im(Z), layout)
    Gg = plan.grid_from_output(gy, layout)
    WtT = plan.weights_by_tap(w, layout).transpose(0, 1, 3, 2)      # (T, G, Cg, Og)
    GX = np.zeros((plan.P, plan.G, plan.Cg, plan.M))
    Mv = plan.Mv
    for gs in plan.group_chunks():
        Gv = Gg[gs, :, :Mv]
        tmp = np.empty((Gv.shape[0], plan.Cg, Mv))
        for t, ph, off, _q in plan.taps:
            _product(WtT[t, gs], Gv, tmp)
            GX[ph, gs, :, off:off + Mv] += tmp
    return plan.from_phases(GX, layout)


def grad_weight(plan: Plan, x, gy, layout):
    """Weight gradient, float64, in the weight layout of ``layout``."""
    X = plan.to_phases(x, layout)
    if plan.gather:
        dW = np.matmul(plan.output_cols(gy, layout), plan.im2col(X).transpose(0, 2, 1))
        return plan.weights_from_stacked(dW, layout)
    Gg = plan.grid_from_output(gy, layout)
    Mv = plan.Mv
    Gv = Gg[:, :, :Mv]
    dW = np.empty((plan.T, plan.G, plan.Og, plan.Cg))
    for t, ph, off, _q in plan.taps:
        np.matmul(Gv, X[ph, :, :, off:off + Mv].transpose(0, 2, 1), out=dW[t])
    return plan.weights_from_taps(dW, layout)
