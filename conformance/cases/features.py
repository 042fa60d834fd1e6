"""The coverage classifier: which geometry features a drawn spec has.

Kept apart from the strategies so that reading or comparing reports (``diff``) never
imports hypothesis.
"""
from __future__ import annotations

from ..geometry.spec import ConvSpec

__all__ = ["feature_of"]


def feature_of(spec: ConvSpec) -> dict:
    """Coverage features of a spec (for the report)."""
    grouping = "single" if spec.groups == 1 else (
        "depthwise" if spec.in_channels == spec.groups else "grouped")
    pads = set()
    for lo, hi in spec.padding:
        pads.add("negative" if min(lo, hi) < 0 else "asymmetric" if lo != hi else
                 "symmetric" if lo else "none")
    return {
        "ndim": str(spec.ndim),
        "dtype": spec.dtype,
        "layout": spec.layout,
        "stride": "strided" if any(s > 1 for s in spec.stride) else "unit",
        "dilation": "dilated" if any(d > 1 for d in spec.dilation) else "none",
        "groups": grouping,
        "padding": "+".join(sorted(pads)),
        "remainder": "nonzero" if any(spec.remainder) else "zero",
        "batch": "zero" if spec.batch == 0 else "one" if spec.batch == 1 else "many",
        "bias": "bias" if spec.bias else "nobias",
        "transposed": "transposed" if spec.transposed else "conv",
    }
