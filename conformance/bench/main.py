"""Benchmarks (``python -m convwitness.bench [reference|isolation|harness|signatures|quantized|all|cluster]``).

They print measured figures side by side from one run on this machine; nothing here
is a pass/fail test.

* reference: the float64 reference's forward and backward GFLOP/s against torch's
  float64 CPU convolution on three shapes, as a ratio, and as a share of numpy's
  float64 matmul GFLOP/s; plus the per-call time of a tiny case.
* isolation: per-call overhead of the worker process against in-process calls.
* harness: what the harness adds per example beyond the adapter's and the
  reference's own work, measured with an instant adapter, split into drawing
  (hypothesis, geometry, values, bookkeeping) and checking (contract, bounds, comparison).
* signatures: distinct call signatures of a quick run on the built-in adapters, and the
  wall time of a simulated compile-per-shape port (:mod:`.signatures`).
* cluster (not in ``all``): wall time of the standard profile on the reference adapter,
  locally and on ``--cluster local:2``, and their ratio (bench/cluster.py).
* quantized: wall time of the quick profile's quantized.* invariants on onnxruntime's
  ConvInteger and QLinearConv, torch's quantized conv and the numpy control.
"""
from __future__ import annotations

import statistics
import sys
import time

import numpy as np

from ..numerics import reference as ref
from ..geometry.spec import ConvSpec

SHAPES = {
    "a: N=8 64->64 56x56 3x3 pad 1": ConvSpec(batch=8, in_channels=64, out_channels=64, input_size=(56, 56),
                                           kernel_size=(3, 3), padding=1, dtype="float64", bias=False),
    "b: N=1 3->16 224x224 7x7 s2 pad 3": ConvSpec(batch=1, in_channels=3, out_channels=16, input_size=(224, 224),
                                               kernel_size=(7, 7), stride=2, padding=3, dtype="float64",
                                               bias=False),
    "c: depthwise N=16 32ch 28x28 3x3": ConvSpec(batch=16, in_channels=32, out_channels=32, input_size=(28, 28),
                                              kernel_size=(3, 3), padding=1, groups=32, dtype="float64",
                                              bias=False),
}
TINY = ConvSpec(batch=2, in_channels=3, out_channels=4, input_size=(9, 7), kernel_size=(3, 2),
                dtype="float64", bias=False)


def best(fn, repeat: int = 7) -> float:
    fn()
    times = []
    for _ in range(repeat):
        t = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t)
    return min(times)


def median(fn, repeat: int = 200) -> float:
    fn()
    times = []
    for _ in range(repeat):
        t = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t)
    return statistics.median(times)


def matmul_gflops() -> float:
    a = np.random.default_rng(0).standard_normal((2048, 2048))
    return 2 * 2048 ** 3 / best(lambda: a @ a, 5) / 1e9


def bench_reference(out=sys.stdout):
    try:
        import torch
        import torch.nn.functional as F
    except ImportError:
        torch = None
    peak = matmul_gflops()
    print(f"numpy float64 matmul (2048^3): {peak:.1f} GFLOP/s — the practical ceiling here", file=out)
    print(f"{'shape':36s} {'pass':9s} {'reference':>12s} {'torch f64':>12s} {'ratio':>7s} {'of matmul':>9s}",
          file=out)
    rng = np.random.default_rng(0)
    for name, spec in SHAPES.items():
        x = rng.standard_normal(spec.x_shape)
        w = rng.standard_normal(spec.w_shape)
        g = rng.standard_normal(spec.y_shape)
        flops = spec.flops()
        t_f = best(lambda: ref.forward(spec, x, w))
        t_b = best(lambda: (ref.grad_input(spec, w, g), ref.grad_weight(spec, x, g)))
        tt_f = tt_b = float("nan")
        if torch is not None:
            xt, wt, gt = torch.from_numpy(x), torch.from_numpy(w), torch.from_numpy(g)
            pad = tuple(p[0] for p in spec.padding)
            conv = lambda a, b: F.conv2d(a, b, None, spec.stride, pad, 1, spec.groups)  # noqa: E731
            tt_f = best(lambda: conv(xt, wt))
            xr, wr = xt.clone().requires_grad_(), wt.clone().requires_grad_()

            def both():
                return torch.autograd.grad(conv(xr, wr), (xr, wr), gt)
            tt_b = best(both) - tt_f
        for label, t_ref, t_t, fl in (("forward", t_f, tt_f, flops), ("backward", t_b, tt_b, 2 * flops)):
            gr, gt_ = fl / t_ref / 1e9, fl / t_t / 1e9
            print(f"{name:36s} {label:9s} {gr:8.2f} GF/s {gt_:8.2f} GF/s {gr / gt_:6.2f}x {gr / peak:8.1%}",
                  file=out)
    x = rng.standard_normal(TINY.x_shape)
    w = rng.standard_normal(TINY.w_shape)
    g = rng.standard_normal(TINY.y_shape)
    print(f"tiny {TINY.describe()}: forward {median(lambda: ref.forward(TINY, x, w)) * 1e6:.0f} µs, "
          f"backward {median(lambda: (ref.grad_input(TINY, w, g), ref.grad_weight(TINY, x, g))) * 1e6:.0f} µs "
          "(median per call)", file=out)


class _Instant:
    """An adapter that answers at once (a preallocated output): measures overheads."""

    name = "instant"

    def __init__(self):
        self._cache = {}

    def forward(self, x, w, b, *, stride, padding, dilation, groups, layout="channels_first"):
        """Answers from a memo of earlier identical calls (the first call computes)."""
        from ..adapters.reference import _spec
        spec = _spec(x, w, b, stride, padding, dilation, groups, layout)
        key = (spec, x.tobytes(), w.tobytes(), None if b is None else b.tobytes())
        if key not in self._cache:
            if len(self._cache) > 64:
                self._cache.clear()
            self._cache[key] = ref.forward(spec, x, w, b).astype(x.dtype)
        return self._cache[key].copy()


def bench_isolation(out=sys.stdout):
    from ..boundary.isolation.client import load_isolated
    small = ConvSpec(batch=2, in_channels=3, out_channels=3, input_size=(9, 7), kernel_size=(1, 1),
                     dtype="float64", bias=False)
    large = ConvSpec(batch=8, in_channels=64, out_channels=64, input_size=(56, 56), kernel_size=(1, 1),
                     dtype="float32", bias=False)
    rng = np.random.default_rng(0)
    cases = [(small, rng.standard_normal(small.x_shape), rng.standard_normal(small.w_shape), 400),
             (large, rng.standard_normal(large.x_shape).astype(np.float32),
              rng.standard_normal(large.w_shape).astype(np.float32), 30)]
    spec = "convwitness.bench.main:_Instant"
    results = {}
    for mode in ("none", "process"):
        a = load_isolated(spec, isolation=mode)
        for s, x, w, n in cases:
            results[(mode, s)] = median(lambda: a.forward(s, x, w, None), n)
        getattr(a, "close", lambda: None)()
    for s, *_ in cases:
        extra = results[("process", s)] - results[("none", s)]
        print(f"isolation overhead, {s.describe()} ({s.x_shape} in, {s.y_shape} out): "
              f"{extra * 1e6:.0f} µs median per call", file=out)


def bench_harness(out=sys.stdout):
    """Per-example cost of the harness beyond the adapter's and the reference's own work
    (issue 11's goal: at most 2 ms), with an instant adapter, on the quick profile's rules
    with 300 geometries of one value set each, seed 0, wall clock.

    Per example, total = adapter + reference + harness. The adapter's share is the
    instant adapter's own forward (a memo of earlier calls); the reference's, every call
    of the float64 reference's public functions (numerics/reference.py), wherever made
    (the near_max value filling included). The harness is the rest, split in two:
    checking, the time inside ``Invariant.check`` beyond the adapter and the reference
    (the call contract, copies, bounds, comparison); and drawing, everything else
    (hypothesis's engine and draws, the geometry builder, value filling, the runner's
    per-example bookkeeping). The load average is printed with the figures: on a loaded
    machine every share grows."""
    import dataclasses
    import functools
    import os
    from ..numerics import reference as refmod
    from ..boundary.contract import wrap
    from ..invariants import Invariant, get
    from ..cases.profiles import get_profile
    from ..run.runner import run_invariant
    spent = {"reference": 0.0, "adapter": 0.0, "check": 0.0, "inner": 0.0}
    depth = [0]

    def timed(bucket, fn):
        @functools.wraps(fn)
        def inner(*a, **k):
            if depth[0]:
                return fn(*a, **k)
            depth[0] += 1
            t = time.perf_counter()
            try:
                return fn(*a, **k)
            finally:
                spent[bucket] += time.perf_counter() - t
                depth[0] -= 1
        return inner
    names = ("forward", "transposed", "grad_input", "grad_weight", "grad_bias", "forward_magnitude",
             "grad_input_magnitude", "grad_weight_magnitude", "grad_bias_magnitude")
    saved = {n: getattr(refmod, n) for n in names}
    saved_check = Invariant.check

    def check(self, *a, **k):
        before = spent["adapter"] + spent["reference"]
        t = time.perf_counter()
        try:
            return saved_check(self, *a, **k)
        finally:
            spent["check"] += time.perf_counter() - t
            spent["inner"] += spent["adapter"] + spent["reference"] - before
    instant = _Instant()
    instant.forward = timed("adapter", instant.forward)
    adapter = wrap(instant, source="instant")
    profile = dataclasses.replace(get_profile("quick"), examples=300, values=1)
    print(f"harness: instant adapter, quick profile with 300 geometries x 1 value set, seed 0; load "
          f"average {os.getloadavg()[0]:.2f} on {os.cpu_count()} CPUs", file=out)
    # the covering schedules of every invariant are built once per run (run/covering.py)
    # and shared; built here first, they are printed as a cost of their own
    from ..run.covering import run_schedules
    t = time.perf_counter()
    built = run_schedules(adapter.capabilities, profile, 0)
    once = time.perf_counter() - t
    print(f"harness: the covering schedules of all {len(built)} invariants, built once per run: "
          f"{once * 1e3:.0f} ms ({sum(map(len, built.values()))} geometries)", file=out)
    try:
        for n in names:
            setattr(refmod, n, timed("reference", saved[n]))
        Invariant.check = check
        for inv_id in ("forward.reference", "forward.contract", "forward.input_linearity"):
            spent.update(reference=0.0, adapter=0.0, check=0.0, inner=0.0)
            res = run_invariant(adapter, get(inv_id), profile, seed=0)
            rest = res.duration_s - spent["reference"] - spent["adapter"]
            checking = spent["check"] - spent["inner"]
            n = max(res.examples, 1)
            ms = lambda s: f"{s / n * 1e3:.2f}"   # noqa: E731
            print(f"harness, {inv_id}: {res.examples} examples in {res.duration_s:.2f} s; per example "
                  f"{ms(res.duration_s)} ms total = {ms(spent['adapter'])} adapter + "
                  f"{ms(spent['reference'])} reference + {ms(rest)} harness (= {ms(rest - checking)} "
                  f"drawing: hypothesis, geometry, values, bookkeeping + {ms(checking)} checking: "
                  "contract, bounds, comparison; goal <= 2 ms)", file=out)
    finally:
        Invariant.check = saved_check
        for n, fn in saved.items():
            setattr(refmod, n, fn)


def bench_quantized(out=sys.stdout):
    """Wall time of the quick profile's quantized.* invariants on onnxruntime's kernels
    (as ``convwitness run`` does it: process isolation, seed 0), goal <= 60 s each."""
    from ..boundary.isolation.client import load_isolated
    from ..errors import AdapterLoadError
    from ..run.certify import certify
    print("quantized: quick profile, quantized.* only, process isolation, seed 0", file=out)
    for name in ("onnxruntime-convinteger", "onnxruntime-qlinearconv", "torch-quant", "quant-numpy"):
        try:
            adapter = load_isolated(name)
        except AdapterLoadError as exc:
            print(f"  {name:26s} unavailable: {exc}", file=out)
            continue
        try:
            t = time.perf_counter()
            doc, res = certify(adapter, profile="quick", seed=0, report_dir=None, only="quantized.*")
            wall = time.perf_counter() - t
        finally:
            adapter.close()
        ran = [r for r in res if r.verdict != "not-applicable"]
        ex = sum(r.examples for r in ran)
        print(f"  {name:26s} {wall:6.1f} s wall  {len(ran)} invariants  {ex} examples  "
              f"verdict {(doc.get('verdict') or {}).get('headline', '?')}  (goal <= 60 s)", file=out)


def main(argv=None):
    argv = sys.argv[1:] if argv is None else argv
    which = argv[0] if argv else "all"
    if which in ("quantized", "all"):
        bench_quantized()
    if which in ("reference", "all"):
        bench_reference()
    if which in ("isolation", "all"):
        bench_isolation()
    if which in ("harness", "all"):
        bench_harness()
    if which in ("signatures", "all"):
        from .signatures import bench_signatures
        bench_signatures()
    if which == "cluster":          # not in "all": it runs a whole certification twice
        from .cluster import bench_cluster
        bench_cluster(argv[1:])


if __name__ == "__main__":
    main()
