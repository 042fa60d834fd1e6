"""Command-line wiring of the outputs: ``run --shard``, ``diff``, ``merge`` and ``generate``.

``convwitness.cli.main`` calls :func:`extend_run` with the ``run`` sub-parser and
:func:`extend_sub` with the sub-parsers object, and dispatches the commands named in
:data:`HANDLERS` (``name -> handler(args, stdout, stderr) -> int``).
"""
from __future__ import annotations

import argparse

__all__ = ["extend_run", "extend_sub", "HANDLERS"]


def _shard_arg(text: str) -> str:
    from ..errors import ConvWitnessError
    from ..run.shard import parse_shard
    try:
        k, n = parse_shard(text)
    except ConvWitnessError as exc:
        raise argparse.ArgumentTypeError(str(exc).removeprefix("--shard ")) from None
    return f"{k}/{n}"


def _drift_arg(text: str) -> float:
    try:
        v = float(text)
    except ValueError:
        v = -1.0
    if not v >= 0 or v == float("inf"):
        raise argparse.ArgumentTypeError(f"expected a finite share of the bound >= 0 (e.g. 0.25), got {text!r}")
    return v


def extend_run(r: argparse.ArgumentParser) -> None:
    r.add_argument("--shard", type=_shard_arg, default=None, metavar="K/N",
                   help="run shard K of N: a deterministic 1/N of the invariants (join the shard "
                        "reports with `convwitness merge`)")


def extend_sub(sub) -> None:
    d = sub.add_parser("diff", help="compare two reports (nightly regression): exit 1 when anything regressed")
    d.add_argument("old", metavar="OLD", help="a report.json or the report folder holding it")
    d.add_argument("new", metavar="NEW", help="a report.json or the report folder holding it")
    d.add_argument("--format", choices=("text", "markdown", "json"), default="text")
    d.add_argument("--drift", type=_drift_arg, default=0.25, metavar="SHARE",
                   help="flag a passing invariant whose worst share of the bound grew by more than "
                        "this (absolute, default 0.25)")

    m = sub.add_parser("merge", help="join the shard reports of one run into one report")
    m.add_argument("reports", nargs="+", metavar="SHARD", help="shard report.json files or their folders")
    m.add_argument("-o", "--output", required=True, metavar="MERGED",
                   help="the merged report.json, or a folder to write report.json into")
    m.add_argument("--views", action="store_true",
                   help="also write report.html, summary.md and junit.xml beside the merged report")

    g = sub.add_parser("generate", help="write a pytest module that runs the suite on an adapter")
    g.add_argument("--adapter", required=True, help="as for `run`")
    g.add_argument("-o", "--output", required=True, metavar="FILE.py",
                   help="the module to write, e.g. tests/test_conv_conformance.py")
    g.add_argument("--profile", default="quick", help="quick, standard or nightly (as for `run`)")
    g.add_argument("--seed", type=int, default=0, help="hypothesis seed (default 0, as for `run`)")
    g.add_argument("--only", default=None, help="comma-separated invariant ids or glob patterns")
    g.add_argument("--isolation", choices=("none", "process"), default="none",
                   help="call the adapter in the test process (default) or in a worker process")


def cmd_diff(args, stdout, stderr) -> int:
    from ..report.diff import diff_reports, render
    from ..report.document import load_report
    old, new = load_report(args.old), load_report(args.new)
    d = diff_reports(old, new, drift=args.drift)
    stdout.write(render(d, args.format))
    return 1 if d["regressed"] else 0


def cmd_merge(args, stdout, stderr) -> int:
    import os
    from ..report.console import summary_table
    from ..report.document import report_path
    from ..run.shard import merge_shards, write_merged
    from .outcome import outcome as _outcome
    reports = [report_path(p) for p in args.reports]
    output = args.output
    if os.path.isdir(output) or output.endswith(("/", os.sep)):
        output = os.path.join(output, "report.json")
    doc, warnings = merge_shards(reports, output)
    path = write_merged(doc, output)
    for w in warnings:
        print(f"convwitness merge: {w}", file=stderr)
    if args.views:
        from ..report.outputs import write_views
        write_views(doc, os.path.dirname(os.path.abspath(path)))
    print(summary_table(doc), file=stdout)
    print(f"merged {len(args.reports)} report(s) into {path}", file=stdout)
    return _outcome(doc, stderr)


def cmd_generate(args, stdout, stderr) -> int:
    from ..run.generate import write_suite
    path = write_suite(args.adapter, args.output, profile=args.profile, seed=args.seed,
                       only=args.only, isolation=args.isolation)
    print(f"wrote {path}; run it with `pytest {path}` (or `pytest -n auto {path}`)", file=stdout)
    return 0


HANDLERS = {"diff": cmd_diff, "merge": cmd_merge, "generate": cmd_generate}
