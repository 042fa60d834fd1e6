"""The planted-bug zoo: adapters with one realistic defect each, and correct controls.

``ZOO`` maps a name to an adapter class whose passes call the float64 reference
(:mod:`convwitness.numerics.reference`) with one defect taken from a class of
shared/BUG-CLASSES.md (its ``bug_class`` and docstring say which and what real code
does wrong). Every zoo adapter declares the capabilities a correct implementation of
it would claim, so a suite that certifies it has missed a bug.

``CORRECT`` holds the controls no invariant may flag: the float64 reference itself and
a plain numpy implementation that accumulates in the input dtype tap by tap.

``convwitness selftest`` runs the whole suite on both and prints which invariants catch
which bug (:mod:`convwitness.run.selftest`).
"""
from __future__ import annotations

from .reference import ReferenceAdapter
from .zoo_backward import (BiasGradIntoWeight, BiasGradSampleZero, DepthwiseWeightGradLastRow,
                           StrideTailDropped, UpstreamGradClipped, WeightGradIgnoresDilation,
                           WeightGradIgnoresStride, WeightGradMean, WeightGradRace,
                           ZeroBatchWeightGradUninitialised)
from .zoo_coincidence import (BatchChannelsSwapped, DepthwiseMultiplierOrder,
                              PatchKernelTransposed, SquareInputAxesSwapped,
                              WeightGradChannelsSwapped)
from .zoo_forward import (AccumulateFloat16, BatchSampleZeroReused, BiasMissingLastChannel,
                          ChannelThresholdSkip, DepthwiseDilatedStridedShape, DilationAxesSwapped,
                          DilationIgnoredWhenStrided, GroupChannelsMixed, IntermediateOverflow,
                          KernelFlipped, NarrowOutputIndex, NegativePaddingWraps, OperandsFloat16,
                          PaddingSidesSwapped, StrideAxesSwapped)
from .zoo_numpy import NumpyTapAdapter
from .zoo_state import (ChannelsLastWeightMisread, InputMutated, NanReadAsZero,
                        OutputFloat64, OutputPaddingAsInputPadding, PlanCacheByShape,
                        ReusedOutputBuffer, TransposedIgnoresDilation, ViewReadAsPacked)

__all__ = ["ZOO", "CORRECT", "bug_class_of"]

_BUGS = (
    # forward geometry and channel mapping
    KernelFlipped, PaddingSidesSwapped, DilationIgnoredWhenStrided, GroupChannelsMixed,
    BatchSampleZeroReused, DilationAxesSwapped, StrideAxesSwapped, NegativePaddingWraps,
    DepthwiseDilatedStridedShape,
    # forward precision, thresholds, ranges
    OperandsFloat16, AccumulateFloat16, BiasMissingLastChannel, ChannelThresholdSkip,
    NarrowOutputIndex, IntermediateOverflow,
    # backward
    StrideTailDropped, WeightGradIgnoresDilation, WeightGradIgnoresStride,
    DepthwiseWeightGradLastRow, BiasGradSampleZero, WeightGradMean, WeightGradRace,
    ZeroBatchWeightGradUninitialised, UpstreamGradClipped, BiasGradIntoWeight,
    # plumbing: inputs, state, buffers, layouts, dtypes, special values, views
    InputMutated, PlanCacheByShape, ReusedOutputBuffer, ChannelsLastWeightMisread,
    OutputFloat64, NanReadAsZero, ViewReadAsPacked,
    # transposed
    TransposedIgnoresDilation, OutputPaddingAsInputPadding,
    # fast paths chosen by a shape coincidence (C27)
    WeightGradChannelsSwapped, SquareInputAxesSwapped, DepthwiseMultiplierOrder,
    BatchChannelsSwapped, PatchKernelTransposed,
)

ZOO: dict[str, type] = {cls.name: cls for cls in _BUGS}
CORRECT: dict[str, type] = {"reference": ReferenceAdapter, NumpyTapAdapter.name: NumpyTapAdapter}

assert len(ZOO) == len(_BUGS), "two zoo adapters share a name"


def bug_class_of(name: str) -> str:
    """The bug class (C01..C26) a zoo entry stands for; '' for a correct control."""
    cls = ZOO.get(name)
    return getattr(cls, "bug_class", "") if cls is not None else ""
