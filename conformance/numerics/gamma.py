"""The rounding-error constant gamma_n (Higham, *Accuracy and Stability of Numerical
Algorithms*, 2nd ed., SIAM 2002, Lemma 3.1) and the unit roundoff of the float64 reference.

Its own module: both the componentwise bounds (bounds.py) and the fast-algorithm bounds
(fastbounds.py) use it, and neither imports the other for it.
"""
from __future__ import annotations

import math

__all__ = ["gamma", "U64"]

#: unit roundoff of IEEE binary64 (2^-53), the precision of the reference
U64 = 2.0 ** -53


def gamma(n: int, u: float) -> float:
    """``gamma_n = n u / (1 - n u)``; ``inf`` when ``n u >= 1`` (the bound is vacuous)."""
    if n < 0:
        raise ValueError(f"gamma: n={n} must be >= 0")
    nu = n * u
    if nu >= 1:
        return math.inf
    return nu / (1 - nu)
