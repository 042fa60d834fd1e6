"""Evidence: what one example measured, and the comparison that produces it.

A failed comparison's message has a fixed anatomy, in this order:

1. the criterion and how the bound was built;
2. structural problems first (shape, dtype, non-finite values where the reference is
   finite, finite values where it overflows);
3. counts: how many elements break the bound, of how many;
4. the worst share of the bound used, and the worst positions with
   actual / expected / |difference| / bound.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ..errors import AdapterCrashed, AdapterOutputError, AdapterRaised, AdapterTimeout

__all__ = ["Evidence", "compare", "InvariantFailure", "combine", "verdict_of"]

_WORST = 5


class InvariantFailure(AssertionError):
    """Raised inside a hypothesis test when an invariant fails; carries the Evidence."""

    def __init__(self, evidence: "Evidence"):
        super().__init__(evidence.message)
        self.evidence = evidence


@dataclass
class Evidence:
    """One example's measurement.

    ``share`` is max(error / bound) over the checked elements ("share of the bound
    used"): below 1 passes. For exact criteria the bound is 0 and the share is 0 on
    equality, inf otherwise.
    """

    ok: bool
    error: float = 0.0
    bound: float = 0.0
    share: float = 0.0
    where: tuple | None = None
    message: str = ""
    checked: int = 0
    details: dict = field(default_factory=dict)
    #: why the example was not checked ("" when it was): a skipped example is neither a
    #: pass nor a fail, and never counts as checked
    skipped: str = ""

    @classmethod
    def skip(cls, why: str) -> "Evidence":
        """An example whose property could not be checked here, with the reason."""
        return cls(True, message=f"skipped: {why}", skipped=why)


def combine(*items: "Evidence") -> Evidence:
    """Combine several measurements of one example: fails if any fails; worst share wins.

    Skipped measurements do not count; when every one skipped (or there is none), the
    example is skipped with the first reason."""
    failed = [e for e in items if not e.ok]
    if failed:
        return max(failed, key=lambda e: e.share)
    checked = [e for e in items if not e.skipped]
    if checked:
        return max(checked, key=lambda e: e.share)
    return items[0] if items else Evidence.skip("nothing to compare")


def _fmt(v) -> str:
    if isinstance(v, (float, np.floating)):
        return f"{float(v):.9g}"
    return str(v)


def compare(actual, expected, bound, *, what: str, criterion: str, explanation: str = "",
            exact: bool = False, allow=None) -> Evidence:
    """Check ``|actual - expected| <= bound`` elementwise (``actual == expected`` if exact).

    ``expected`` is float64 (the reference or the adapter's own other result); ``bound``
    an array or scalar. Non-finite expected values must be matched in kind (NaN, +inf,
    -inf). ``allow`` masks elements that may hold any value (e.g. intermediate
    overflow is possible there); they are counted but not judged.
    """
    head = f"{criterion}" + (f" [{explanation}]" if explanation else "")
    if not isinstance(actual, np.ndarray):
        return Evidence(False, math.inf, 0.0, math.inf, None,
                        f"{head}\n  structure: {what} is {type(actual).__name__}, expected an array")
    exp = np.asarray(expected, dtype=np.float64)
    if actual.shape != exp.shape:
        return Evidence(False, math.inf, 0.0, math.inf, None,
                        f"{head}\n  structure: {what} shape {actual.shape} != expected {exp.shape}")
    act = actual.astype(np.float64)
    bnd = np.broadcast_to(np.asarray(0.0 if exact else bound, dtype=np.float64), exp.shape)
    free = np.zeros(exp.shape, bool) if allow is None else np.broadcast_to(allow, exp.shape)
    n = exp.size
    if n == 0:
        return Evidence(True, 0.0, 0.0, 0.0, None, f"{head}: empty {what}, nothing to compare", 0)
    structural = []
    if (allow is None or not free.any()) and np.isfinite(exp).all() and np.isfinite(act).all():
        # the common case: every element finite and judged, so no structural mismatch
        # (the general branch below gives the same diff and share, with ten more passes)
        with np.errstate(invalid="ignore", over="ignore"):
            diff = np.abs(act - exp)
            positive = bnd > 0
            share = np.where(positive, diff / np.where(positive, bnd, 1.0), np.where(diff > 0, np.inf, 0.0))
        return _verdict(head, what, act, exp, bnd, free, diff, share, structural, n)
    exp_nan, act_nan = np.isnan(exp), np.isnan(act)
    exp_inf, act_inf = np.isinf(exp), np.isinf(act)
    bad_struct = ~free & ((exp_nan != act_nan) | (exp_inf != act_inf) |
                          (exp_inf & act_inf & (np.sign(exp) != np.sign(act))))
    if bad_struct.any():
        for label, mask in (("NaN where expected is not", ~free & act_nan & ~exp_nan),
                            ("infinite where expected is finite", ~free & act_inf & ~exp_inf & ~exp_nan),
                            ("not NaN where expected is NaN", ~free & exp_nan & ~act_nan),
                            ("finite or wrong-signed where expected is infinite",
                             ~free & exp_inf & ~(act_inf & (np.sign(exp) == np.sign(act))))):
            cnt = int(mask.sum())
            if cnt:
                first = tuple(int(i) for i in np.argwhere(mask)[0])
                structural.append(f"{cnt} element(s) {label}, first at {list(first)}")
    finite = np.isfinite(exp) & np.isfinite(act) & ~free
    with np.errstate(invalid="ignore", over="ignore"):
        diff = np.where(finite, np.abs(act - exp), 0.0)
        share = np.where(finite, np.where(bnd > 0, diff / np.where(bnd > 0, bnd, 1.0),
                                          np.where(diff > 0, np.inf, 0.0)), 0.0)
    share = np.where(bad_struct, np.inf, share)
    return _verdict(head, what, act, exp, bnd, free, diff, share, structural, n)


def _verdict(head, what, act, exp, bnd, free, diff, share, structural, n) -> Evidence:
    """The evidence of a comparison from its elementwise shares of the bound."""
    worst_flat = int(np.argmax(share))
    worst = np.unravel_index(worst_flat, exp.shape)
    worst_share = float(share.flat[worst_flat])
    bad = share > 1.0
    nbad = int(bad.sum())
    ok = nbad == 0
    err = float(diff.max()) if diff.size else 0.0
    where = tuple(int(i) for i in worst)
    if ok:
        msg = f"{head}: {n} elements of {what}, worst share of bound {worst_share:.3g}"
        nfree = int(np.asarray(free).sum())
        if nfree:
            msg += f" ({nfree} element(s) not judged: {NOT_JUDGED})"
        return Evidence(True, err, float(bnd.flat[worst_flat]), worst_share, where, msg, n)
    lines = [head]
    lines.append("  structure: " + ("; ".join(structural) if structural else "ok (shape, dtype, finiteness)"))
    lines.append(f"  mismatched: {nbad} of {n} elements of {what} ({100.0 * nbad / n:.3g}%)")
    lines.append(f"  worst share of bound: {worst_share:.4g} at {list(where)}")
    order = np.argsort(-share, axis=None, kind="stable")[:_WORST]
    lines.append("  worst positions (index: actual, expected, |diff|, bound):")
    for flat in order:
        if share.flat[flat] <= 1.0:
            break
        idx = np.unravel_index(int(flat), exp.shape)
        a, e, b = act[idx], exp[idx], bnd[idx]
        d = abs(a - e) if np.isfinite(a) and np.isfinite(e) else float("nan")
        lines.append(f"    {[int(i) for i in idx]}: {_fmt(a)}, {_fmt(e)}, {_fmt(d)}, {_fmt(b)}")
    return Evidence(False, err, float(bnd.flat[worst_flat]), worst_share, where, "\n".join(lines), n)


#: why an element is left unjudged (the ``allow`` mask of :func:`compare`)
NOT_JUDGED = "intermediate overflow possible"


def verdict_of(exc) -> str:
    """The verdict of what ended an invariant: the adapter's doing, or ``internal`` (an
    exception that convwitness did not expect is a bug of convwitness, never the adapter's)."""
    if isinstance(exc, (InvariantFailure, AdapterOutputError)):
        return "fail"
    if isinstance(exc, AdapterCrashed):
        return "crash"
    if isinstance(exc, AdapterTimeout):
        return "timeout"
    if isinstance(exc, AdapterRaised):
        return "error"
    return "internal"
