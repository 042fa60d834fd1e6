"""Planted backward-pass bugs of the zoo: input, weight and bias gradients.

Each class keeps the reference forward and computes the gradients of
:func:`convwitness.numerics.reference.backward` with one defect, described in its docstring
with the bug class of shared/BUG-CLASSES.md it stands for. Hooks see channels-first
arrays and a channels-first spec (see :mod:`.zoo_base`).
"""
from __future__ import annotations

import numpy as np

from convwitness.numerics import reference as ref

from .zoo_base import ZooAdapter, fit

__all__ = [
    "StrideTailDropped", "WeightGradIgnoresDilation", "WeightGradIgnoresStride",
    "DepthwiseWeightGradLastRow", "BiasGradSampleZero", "WeightGradMean", "WeightGradRace",
    "ZeroBatchWeightGradUninitialised", "UpstreamGradClipped", "BiasGradIntoWeight",
]


class _Backward(ZooAdapter):
    passes = ("forward", "backward")

    @staticmethod
    def _gb(spec, b, g):
        return None if b is None else ref.grad_bias(spec, g)


class StrideTailDropped(_Backward):
    """C01 strided tail: in the input gradient, the last output position of every axis with
    stride >= 2 and a nonzero remainder r = (L + p_lo + p_hi - e) mod s contributes
    nothing (the tail loop of the scatter is skipped, pytorch#25101: wrong values in the
    last columns). The weight and bias gradients are right."""

    name = "stride_tail_dropped"
    bug_class = "C01"

    def bwd(self, spec, x, w, b, g):
        g2 = g.copy()
        for a, (s, r) in enumerate(zip(spec.stride, spec.remainder)):
            if s >= 2 and r != 0:
                idx = [slice(None)] * g.ndim
                idx[2 + a] = -1
                g2[tuple(idx)] = 0
        return ref.grad_input(spec, w, g2), ref.grad_weight(spec, x, g), self._gb(spec, b, g)


class WeightGradIgnoresDilation(_Backward):
    """C22 wrong backward formula: the weight gradient correlates x with g as if the
    dilation were 1 (the helper of pytorch#13008 that mishandled d > 1); the input
    gradient is right."""

    name = "weight_grad_ignores_dilation"
    bug_class = "C22"

    def bwd(self, spec, x, w, b, g):
        gx = ref.grad_input(spec, w, g)
        if all(d == 1 for d in spec.dilation):
            return gx, ref.grad_weight(spec, x, g), self._gb(spec, b, g)
        plain = spec.replace(dilation=1)
        return gx, ref.grad_weight(plain, x, fit(g, plain.y_shape)), self._gb(spec, b, g)


class WeightGradIgnoresStride(_Backward):
    """C22 wrong backward formula: the weight gradient reads the upstream gradient as if it
    came from a stride-1 convolution (windows stepped by 1, not s); the input gradient is
    right."""

    name = "weight_grad_ignores_stride"
    bug_class = "C22"

    def bwd(self, spec, x, w, b, g):
        gx = ref.grad_input(spec, w, g)
        if all(s == 1 for s in spec.stride):
            return gx, ref.grad_weight(spec, x, g), self._gb(spec, b, g)
        unit = spec.replace(stride=1)
        return gx, ref.grad_weight(unit, x, fit(g, unit.y_shape)), self._gb(spec, b, g)


class DepthwiseWeightGradLastRow(_Backward):
    """C02 strided depthwise weight gradient: for G = C_in > 1 with a stride > 1, the last
    kernel row (the last index of the first kernel axis) of the weight gradient is never
    accumulated and stays 0 (pytorch#50042). Everything else is right."""

    name = "depthwise_weight_grad_last_row"
    bug_class = "C02"

    def bwd(self, spec, x, w, b, g):
        gx, gw, gb = ref.backward(spec, x, w, g, bias=b is not None)
        depthwise = spec.groups > 1 and spec.groups == spec.in_channels
        if depthwise and any(s > 1 for s in spec.stride) and spec.kernel_size[0] > 1:
            gw = gw.copy()
            gw[:, :, -1] = 0
        return gx, gw, gb


class BiasGradSampleZero(_Backward):
    """C14 batch dependence in the bias gradient: dL/db sums the upstream gradient over the
    positions of sample 0 only (the batch loop of the reduction is missing). Right for
    N = 1."""

    name = "bias_grad_sample0"
    bug_class = "C14"

    def bwd(self, spec, x, w, b, g):
        gx, gw, _ = ref.backward(spec, x, w, g, bias=False)
        if b is None:
            return gx, gw, None
        return gx, gw, ref.grad_bias(spec.replace(batch=min(spec.batch, 1)), g[:1])


class WeightGradMean(_Backward):
    """C22 wrong backward formula: the weight gradient is averaged over the batch (a mean
    where the derivative of the sum is a sum). Right for N = 1."""

    name = "weight_grad_mean"
    bug_class = "C22"

    def bwd(self, spec, x, w, b, g):
        gx, gw, gb = ref.backward(spec, x, w, g, bias=b is not None)
        return gx, gw / max(spec.batch, 1), gb


class WeightGradRace(_Backward):
    """C24 data race: in about half of the calls, one randomly chosen weight-gradient element
    loses the partial sum of sample 0 (two threads write it unsynchronised,
    pytorch#34344). The adapter honestly declares itself nondeterministic, which allows
    run-to-run differences within the bound, not this."""

    name = "weight_grad_race"
    bug_class = "C24"
    claims = {"deterministic": False}

    def bwd(self, spec, x, w, b, g):
        gx, gw, gb = ref.backward(spec, x, w, g, bias=b is not None)
        rng = np.random.default_rng()          # unseeded on purpose: a race
        if spec.batch and gw.size and rng.random() < 0.5:
            lost = ref.grad_weight(spec.replace(batch=1), x[:1], g[:1])
            i = int(rng.integers(0, gw.size))
            gw = gw.copy()
            gw.reshape(-1)[i] -= lost.reshape(-1)[i]
        return gx, gw, gb


class ZeroBatchWeightGradUninitialised(_Backward):
    """C10 zero-size batch: for N = 0 the weight and bias gradients are returned from an
    uninitialised buffer (NaN-filled here) instead of zeros (FluxML/NNlib.jl#763)."""

    name = "zero_batch_weight_grad_uninitialised"
    bug_class = "C10"

    def bwd(self, spec, x, w, b, g):
        gx, gw, gb = ref.backward(spec, x, w, g, bias=b is not None)
        if spec.batch == 0:
            gw = np.full(gw.shape, np.nan)
            gb = None if gb is None else np.full(gb.shape, np.nan)
        return gx, gw, gb


class UpstreamGradClipped(_Backward):
    """C22 wrong backward rule: the upstream gradient is clipped to [-1, 1] inside backward
    (a stray stabilisation step), so the gradients are no longer homogeneous in g
    (tensorflow#107706). Gradients of data within [-1, 1] are right."""

    name = "upstream_grad_clipped"
    bug_class = "C22"

    def bwd(self, spec, x, w, b, g):
        return ref.backward(spec, x, w, np.clip(g, -1.0, 1.0), bias=b is not None)


class BiasGradIntoWeight(_Backward):
    """C21 gradient-subset dependence: without a bias, the bias-gradient reduction still
    runs and writes through the missing bias buffer into the first tap of each output
    channel's weight gradient (sony/nnabla-ext-cuda#292: the bias gradient read when
    there is no bias). With a bias everything is right."""

    name = "bias_grad_into_weight"
    bug_class = "C21"

    def bwd(self, spec, x, w, b, g):
        gx, gw, gb = ref.backward(spec, x, w, g, bias=b is not None)
        if b is None and gw.size:
            gw = gw.copy()
            gw[(slice(None), 0) + (0,) * spec.ndim] += ref.grad_bias(spec, g)
        return gx, gw, gb
