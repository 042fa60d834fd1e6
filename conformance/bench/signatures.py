"""Distinct call signatures of a quick run, and what a compile-per-shape port pays.

``python -m convwitness.bench signatures`` runs the quick profile in-process on the
built-in ``reference`` adapter (and ``torch`` where installed) and prints the run's count
of distinct call signatures (method, array shapes and dtypes, keywords), as the report's
``signatures`` field gives it. It then runs the reference behind a simulated port that
sleeps ``COMPILE_S`` on each new signature and prints its measured wall time, and the
wall time the same run would take at 1 s per signature (the measured time with the
simulated compile cost replaced by 1 s per signature: arithmetic, printed as such): once
as a port that does not say so, once declaring ``compiles_per_shape=True`` (the free
search then stays on the covering schedule's geometries, run/covering.py; the invariants
that call derived geometries get lean schedules, a call without bias passes a zero bias,
the precision probe runs once per dtype, long_sum.* run one geometry per dtype);
then the declaring port's count on each of ``SEEDS``.
"""
from __future__ import annotations

import sys
import time

__all__ = ["bench_signatures", "CompilePerShape"]

COMPILE_S = 0.05
SEEDS = range(5)        # the seeds whose counts are printed as well


class CompilePerShape:
    """The reference adapter as a port that compiles each new call signature."""

    def __init__(self, compile_s: float = COMPILE_S, declared: bool = True):
        from ..adapters.reference import ReferenceAdapter
        self.inner = ReferenceAdapter()
        self.name, self.version = "compile-per-shape", self.inner.version
        self.capabilities = self.inner.capabilities.replace(compiles_per_shape=declared)
        self.compile_s = compile_s
        self.seen: set = set()
        for method in ("forward", "backward", "transposed"):
            setattr(self, method, self._compiling(method))

    def _compiling(self, method):
        fn = getattr(self.inner, method)

        def call(*args, **kwargs):
            key = (method, tuple(None if a is None else (a.shape, str(a.dtype)) for a in args),
                   tuple(sorted(kwargs.items())))
            if key not in self.seen:
                self.seen.add(key)
                time.sleep(self.compile_s)
            return fn(*args, **kwargs)
        return call


def _run(adapter, seed=0):
    from ..run.certify import certify
    t = time.perf_counter()
    doc, _ = certify(adapter, profile="quick", seed=seed)
    return doc, time.perf_counter() - t


def bench_signatures(out=sys.stdout):
    from ..boundary.loading import load_adapter
    from ..boundary.contract import wrap
    from ..errors import AdapterUnavailable
    for name in ("reference", "torch"):
        try:
            adapter = load_adapter(name)
        except AdapterUnavailable as exc:
            print(f"signatures, {name}: unavailable ({exc})", file=out)
            continue
        doc, wall = _run(adapter)
        print(f"signatures, {name} (quick, seed 0, in-process): {doc.get('signatures', 0)} distinct "
              f"call signatures; {wall:.1f} s wall", file=out)
    for declared in (False, True):
        port = CompilePerShape(declared=declared)
        doc, wall = _run(wrap(port, source="compile-per-shape"))
        n = len(port.seen)
        rest = wall - n * port.compile_s
        print(f"signatures, simulated compile-per-shape port ({port.compile_s * 1e3:.0f} ms per new "
              f"signature; compiles_per_shape={declared}): {n} signatures, {wall:.1f} s wall "
              f"measured; at 1 s per signature that is {rest + n:.0f} s ({rest:.1f} s of it not "
              f"compiling); conformant: {doc['conformant']}", file=out)
    counts = []
    for seed in SEEDS:          # the count is the schedule's: a function of the seed
        port = CompilePerShape(compile_s=0.0)
        doc, _ = _run(wrap(port, source="compile-per-shape"), seed)
        counts.append(f"{seed}: {len(port.seen)}" + ("" if doc["conformant"] else " (not conformant)"))
    print("signatures, simulated compile-per-shape port declaring it, quick, by seed: "
          + ", ".join(counts), file=out)
