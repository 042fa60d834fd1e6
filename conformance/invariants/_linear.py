"""What the linearity invariants of every pass share: the second operand, the power of
two, and the check that scaling by it commutes with every rounding.

Used by forward.input_linearity / forward.weight_linearity (operand x or w) and by
backward.upstream_linearity (operand g, the upstream gradient).
"""
from __future__ import annotations

import numpy as np

from ..geometry.formats import get_format, to_format
from ..cases.values import aux_rng
from ._common import model_of

__all__ = ["second_operand", "power_of_two", "products_stay_normal", "near_underflow"]

#: value kinds whose second operand is small integers (exact sums in every format)
_INTEGER_KINDS = ("ones", "one_hot", "small_int")


def second_operand(case, a: np.ndarray, salt: int) -> np.ndarray:
    """A second operand shaped like ``a``, of a kind like the case's, exact in its dtype."""
    rng = aux_rng(case.seed, salt)
    if case.kind in _INTEGER_KINDS:
        v = rng.integers(-3, 4, size=a.shape).astype(np.float64)
    elif case.kind == "pow2":
        v = rng.choice([-1.0, 1.0], size=a.shape) * np.exp2(rng.integers(-4, 5, size=a.shape))
    else:
        v = rng.uniform(-1, 1, size=a.shape)
    return to_format(v, case.spec.dtype).astype(a.dtype)


def power_of_two(case, salt: int) -> int:
    """The exponent k of the homogeneity check f(2^k a) = 2^k f(a)."""
    return int(aux_rng(case.seed, salt).choice([1, 2, 3, -1, -2]))


def products_stay_normal(adapter, spec, a, b, k: int) -> bool:
    """No product of ``a`` and ``b``, scaled by 2^k, falls below the normal range of the
    product and accumulation formats: then power-of-two scaling commutes with every rounding."""
    m = model_of(adapter, spec).resolve(spec.dtype)
    tiny = max(get_format(m.product).tiny, get_format(m.accumulate).tiny)
    aa, ab = np.abs(a.astype(np.float64)), np.abs(b.astype(np.float64))
    na, nb = aa[aa > 0], ab[ab > 0]
    return not (na.size and nb.size and na.min() * nb.min() * 2.0 ** min(k, 0) < 4 * tiny)


def near_underflow(y, ys, k: int, tiny: float) -> np.ndarray:
    """Where the homogeneity check f(2^k a) == 2^k f(a) says nothing.

    Rounding commutes with scaling by 2^k exactly when the exact result v and 2^k v both
    lie in the normal range: below it the step is fixed, not relative (IEEE 754-2019,
    3.3/4.3: subnormal numbers share one exponent). The smaller of the two scales is
    |v|·min(1, 2^k); if the port's result at that scale is at least 2·tiny, the exact one is
    at least tiny and the element is compared. It is left out only when both results,
    f(a) and f(2^k a) taken to that scale, are under 2·tiny, zero included: an exact value
    under half the smallest subnormal rounds to 0 while its 2^k multiple may not (float8
    e4m3: 2^-10 -> 0, 2^-9 stays). So a port that returns 0, or garbage, for a result
    of normal size on either side is still caught."""
    lo = 2.0 * tiny
    y = np.abs(np.asarray(y, dtype=np.float64)) * min(1.0, 2.0 ** k)
    ys = np.abs(np.asarray(ys, dtype=np.float64)) * min(2.0 ** -k, 1.0)
    with np.errstate(invalid="ignore"):
        return (y < lo) & (ys < lo)
