"""Array views: a non-contiguous input gives the same result as its contiguous copy."""
from __future__ import annotations

import numpy as np

from .evidence import compare, combine
from . import invariant
from ._common import copies, overflow_possible, pass_bound

VIEW_KINDS = ("step slice of the last axis", "slice of axis 1 at offset 1", "permuted storage")


def as_view(a: np.ndarray, kind: int) -> np.ndarray:
    """``a``'s values as a non-contiguous view into a larger zero-filled array.

    0: every second element of a buffer twice as long on the last axis (``base[..., ::2]``);
    1: axis 1 of a buffer one longer, from offset 1 (``base[:, 1:]``, a start offset);
    2: storage with axis 0 last (``moveaxis`` of a packed transpose).
    Zero-size and 1-D-degenerate arrays come back as they are (already packed views).
    """
    if a is None or a.size == 0 or a.ndim < 2:
        return a
    if kind == 0:
        base = np.zeros(a.shape[:-1] + (2 * a.shape[-1],), dtype=a.dtype)
        base[..., ::2] = a
        return base[..., ::2]
    if kind == 1:
        base = np.zeros((a.shape[0], a.shape[1] + 1) + a.shape[2:], dtype=a.dtype)
        base[:, 1:] = a
        return base[:, 1:]
    return np.moveaxis(np.ascontiguousarray(np.moveaxis(a, 0, -1)), -1, 0)


def _agree(adapter, spec, packed, viewed, bound, label, what):
    return compare(viewed, packed.astype(np.float64), 2 * bound.values, what=what,
                   allow=overflow_possible(spec, adapter, bound),
                   criterion=f"{label}: within twice the bound", explanation=bound.explain())


@invariant("call.strided_views", passes=("forward",),
           statement="non-contiguous views of x, w and the upstream gradient (step slices, "
                     "offset slices, permuted storage) give the results of their contiguous copies")
def views(adapter, case, ctx):
    """|f(view(x), view(w)) - f(x, w)| <= 2·bound for views holding the same values as the
    packed arrays (two roundings of one exact value; not bit for bit even for a
    deterministic adapter, since another memory layout may sum in another order); likewise
    every gradient of backward(view(x), view(w), b, view(g)) where backward is offered.
    An implementation that reads a strided view as if it were packed computes with other
    elements of the underlying buffer."""
    spec = case.spec
    kind = int(case.seed) % len(VIEW_KINDS)
    how = VIEW_KINDS[kind]
    x, w, b, g = copies(case)
    arrays = {"x": case.x, "w": case.w, "b": case.b, "grad_y": case.grad_y}
    packed = adapter.run(spec, x, w, b).copy()
    _, bound = pass_bound(adapter, spec, "transposed" if spec.transposed else "forward", arrays)
    results = [_agree(adapter, spec, packed,
                      adapter.run(spec, as_view(x, kind), as_view(w, kind), b), bound,
                      f"views ({how}) against packed copies", "y")]
    if "backward" in adapter.passes and not spec.transposed and g is not None:
        first = [None if a is None else a.copy() for a in adapter.backward(spec, *copies(case))]
        again = adapter.backward(spec, as_view(x, kind), as_view(w, kind), b, as_view(g, kind))
        for name, pass_, p, v in zip(("grad_x", "grad_w", "grad_b"),
                                     ("grad_input", "grad_weight", "grad_bias"), first, again):
            if p is None or v is None:
                continue
            gbound = pass_bound(adapter, spec, pass_, arrays)[1]
            results.append(_agree(adapter, spec, p, v, gbound,
                                  f"views ({how}) against packed copies ({name})", name))
    return combine(*results)      # no result: skipped, "nothing to compare"
