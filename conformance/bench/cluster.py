"""Wall time of a certification on this machine against a local Dask cluster.

    python -m convwitness.bench cluster [--profile standard] [--workers 2] [--only PATTERNS]

Runs ``convwitness run --adapter reference`` (process isolation, seed 0) once locally
and once with ``--cluster local:N`` (the cluster's start and stop included: what a user
pays), each into a fresh temporary folder, and prints both wall times, their ratio and
the machine's load average before each, the invariants that did not pass and whether
both runs gave the same verdicts. Figures, never asserted: on a machine shared with
other work the ratio says how much the cluster gained here and now, nothing more.
"""
from __future__ import annotations

import argparse
import io
import os
import sys
import tempfile
import time

__all__ = ["bench_cluster"]


def _timed(argv) -> tuple[float, int, str]:
    from ..cli.main import parse_args, run
    err = io.StringIO()
    t = time.perf_counter()
    rc = run(parse_args(argv), io.StringIO(), err)
    return time.perf_counter() - t, rc, err.getvalue()


def bench_cluster(argv=(), out=sys.stdout):
    p = argparse.ArgumentParser(prog="python -m convwitness.bench cluster")
    p.add_argument("--profile", default="standard")
    p.add_argument("--workers", type=int, default=2)
    p.add_argument("--only", default=None)
    args = p.parse_args(list(argv))
    try:
        import distributed  # noqa: F401
    except ImportError:
        print("cluster: dask[distributed] is not installed (pip install 'convwitness[cluster]'); "
              "nothing measured", file=out)
        return
    base = ["run", "--adapter", "reference", "--profile", args.profile, "--seed", "0", "--quiet"]
    if args.only:
        base += ["--only", args.only]
    print(f"reference adapter, profile {args.profile}{', --only ' + args.only if args.only else ''}; "
          f"{os.cpu_count()} CPUs", file=out)
    rows = []
    with tempfile.TemporaryDirectory(prefix="convwitness-bench-cluster-") as tmp:
        for label, extra in (("local", []), (f"--cluster local:{args.workers}", ["--cluster", f"local:{args.workers}"])):
            load = os.getloadavg()[0]
            folder = os.path.join(tmp, label.strip("-").replace(":", "_"))
            wall, rc, err = _timed(base + ["--report", folder] + extra)
            verdicts = _verdicts(folder)
            rows.append((label, wall, rc, load, verdicts))
            print(f"  {label:22s} {wall:8.1f} s wall  (exit {rc}; 1-min load average before: {load:.1f})",
                  file=out)
            failing = sorted(i for i, v in verdicts.items() if v not in ("pass", "not-applicable", "info"))
            if failing:
                print(f"    not passing: {', '.join(f'{i} ({verdicts[i]})' for i in failing)}", file=out)
    local, cluster = rows[0][1], rows[1][1]
    print(f"  ratio local / cluster: {local / cluster:.2f} (above 1: the cluster run was faster)", file=out)
    print(f"  same verdicts: {'yes' if rows[0][4] == rows[1][4] else 'NO'}", file=out)


def _verdicts(folder) -> dict:
    import json
    try:
        with open(os.path.join(folder, "report.json"), encoding="utf-8") as fh:
            return {r["id"]: r["verdict"] for r in json.load(fh)["invariants"]}
    except (OSError, ValueError, KeyError):
        return {}


if __name__ == "__main__":
    bench_cluster(sys.argv[1:])
