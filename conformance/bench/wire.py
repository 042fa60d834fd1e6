"""Per-call overhead of the exec protocol (cwire/1), measured against in-process calls.

    python -m convwitness.bench.wire [--repeats 200] [--large-repeats 30]

An echo adapter returns copies of its two inputs. It is called in-process and
through ``exec:python -m convwitness.serve convwitness.bench.wire:Echo`` (two arrays
travel to the program and two come back); the overhead is the difference of the
medians. Sizes: two 2x3x9x7 float64 arrays, and two 8x64x56x56 float32 arrays (with
the shared region, and inline only). Goals (issue 4): <= 250 us and <= 5 ms median.
Figures are printed, never asserted.
"""
from __future__ import annotations

import argparse
import statistics
import sys
import time

import numpy as np

__all__ = ["Echo", "main"]

_KW = {"stride": (1, 1), "padding": ((0, 0), (0, 0)), "dilation": (1, 1), "groups": 1}


class Echo:
    """backward() returns copies of x and w; forward() a copy of x (for timing only)."""

    name = "echo"
    version = "1"

    @property
    def capabilities(self):
        from ..geometry.capabilities import Capabilities
        return Capabilities(passes=frozenset({"forward", "backward"}))

    def forward(self, x, w, b, **kw):
        return x.copy()

    def backward(self, x, w, b, grad_y, **kw):
        return x.copy(), w.copy(), None


def _median_s(fn, repeats: int) -> float:
    fn()
    fn()
    times = []
    for _ in range(repeats):
        t = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t)
    return statistics.median(times)


def measure(shape, dtype, repeats: int, shared_memory: bool = True, command: str | None = None):
    """(in-process median s, wire median s) of the two-array echo."""
    from ..boundary.wire.client import ExecAdapter
    rng = np.random.default_rng(0)
    x = rng.standard_normal(shape).astype(dtype)
    w = rng.standard_normal(shape).astype(dtype)
    g = np.zeros((0,) + shape[1:], dtype)
    local = Echo()
    remote = ExecAdapter(command or f"{sys.executable} -m convwitness.serve convwitness.bench.wire:Echo",
                         shared_memory=shared_memory)
    try:
        gx, gw, _ = remote.backward(x, w, None, g, **_KW)
        assert np.array_equal(gx, x) and np.array_equal(gw, w), "echo came back changed"
        t_local = _median_s(lambda: local.backward(x, w, None, g, **_KW), repeats)
        t_wire = _median_s(lambda: remote.backward(x, w, None, g, **_KW), repeats)
    finally:
        remote.close()
    return t_local, t_wire


def main(argv=None) -> int:
    p = argparse.ArgumentParser(prog="python -m convwitness.bench.wire", description=__doc__.split("\n")[0])
    p.add_argument("--repeats", type=int, default=500)
    p.add_argument("--large-repeats", type=int, default=40)
    args = p.parse_args(argv)
    rows = [("2x3x9x7 float64", (2, 3, 9, 7), np.float64, args.repeats, True, 250e-6),
            ("8x64x56x56 float32, region", (8, 64, 56, 56), np.float32, args.large_repeats, True, 5e-3),
            ("8x64x56x56 float32, inline", (8, 64, 56, 56), np.float32, args.large_repeats, False, 5e-3)]
    print(f"{'two arrays each way':32s} {'in-process':>12s} {'exec cwire/1':>13s} {'overhead':>11s} "
          f"{'goal':>8s}")
    for label, shape, dtype, repeats, shm, goal in rows:
        t_local, t_wire = measure(shape, dtype, repeats, shm)
        over = t_wire - t_local
        unit, scale = ("us", 1e6) if goal < 1e-3 else ("ms", 1e3)
        print(f"{label:32s} {t_local * scale:10.1f}{unit} {t_wire * scale:11.1f}{unit} "
              f"{over * scale:9.1f}{unit} {goal * scale:6.0f}{unit} "
              f"{'met' if over <= goal else 'MISSED'}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
