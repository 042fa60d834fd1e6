"""The ``convwitness`` command line: ``parse_args`` then ``run(args, stdout, stderr)``."""
from __future__ import annotations

import argparse
import enum
import os
import sys

from ..errors import AdapterLoadError, AdapterUnavailable, ConvWitnessError

__all__ = ["ExitCode", "parse_args", "run", "main"]


class ExitCode(enum.IntEnum):
    OK = 0                  # every applicable invariant passed
    FAILED = 1              # an invariant failed, errored, crashed or timed out
    USAGE = 2               # bad command line or input file
    NOT_LOADABLE = 3        # the adapter could not be loaded or is unavailable
    INTERNAL = 4            # convwitness itself failed


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="convwitness", description=(
        "Certify a convolution-layer implementation against a float64 reference with "
        "derived rounding-error bounds. A passing report is evidence, not proof; an "
        "adapter runs arbitrary code, so run untrusted ports in a sandbox."))
    sub = p.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True

    r = sub.add_parser("run", help="run the suite on an adapter and write a report")
    r.add_argument("--adapter", required=True, help="built-in name, package.module:attr, file.py:attr or exec:COMMAND")
    r.add_argument("--profile", default="quick", help="quick (CI-sized), standard or nightly")
    r.add_argument("--only", default=None, help="comma-separated invariant ids or glob patterns (e.g. 'forward.*')")
    r.add_argument("--seed", type=int, default=0, help="hypothesis seed (default 0)")
    r.add_argument("--report", default=None, help="report folder (default reports/<adapter name>)")
    r.add_argument("--no-shrink", action="store_true", help="skip shrinking (faster, larger witnesses)")
    r.add_argument("--quiet", action="store_true", help="no progress lines")
    _isolation_options(r)
    r.add_argument("--invariant-budget", type=float, default=None, metavar="SECONDS",
                   help="wall-time budget of one invariant, shrinking included (default: the profile's)")
    _extend_run(r)

    rp = sub.add_parser("replay", help="re-run one witness without hypothesis")
    rp.add_argument("witness", help="a witness .json (or .npz) written by `run`")
    rp.add_argument("--adapter", required=True)
    rp.add_argument("--invariant", default=None, help="check another invariant on the witness case")
    _isolation_options(rp)

    rb = sub.add_parser("rebuild", help="rebuild DIR/report.json from the journal of an interrupted run")
    rb.add_argument("report", help="the report folder of the interrupted run")

    sub.add_parser("invariants", help="print the catalogue of invariants")
    sub.add_parser("adapters", help="list the built-in adapters")
    st = sub.add_parser("selftest", help="run the suite on the planted-bug zoo and the correct adapters")
    st.add_argument("--profile", default="quick")
    st.add_argument("--seed", type=int, default=0)
    st.add_argument("--only", default=None, help="zoo entries to run (comma-separated names)")
    st.add_argument("--seeds", default=None, metavar="SEEDS",
                    help="run the zoo once per seed (e.g. 0-4 or 0,2,7) and print the bug × seed matrix")
    _extend_sub(sub)
    return p


def _memory(text: str) -> int:
    from ..boundary.limits import parse_bytes
    try:
        return parse_bytes(text)
    except ValueError as exc:
        raise argparse.ArgumentTypeError(f"--memory-limit {exc}") from None


def _isolation_options(p):
    p.add_argument("--isolation", choices=("process", "none"), default="process",
                   help="run adapter calls in a worker process (default) or in-process (faster, "
                        "for debugging; a crash then ends the run)")
    p.add_argument("--call-timeout", type=float, default=None,
                   help="seconds per adapter call before it is killed (default: the profile's)")
    p.add_argument("--memory-limit", type=_memory, default=None,
                   help="memory cap of the worker process (default 4GiB)")


def _extend_run(r):
    """Options of ``run`` that live with the outputs (sharding)."""
    from . import commands as cli_outputs
    cli_outputs.extend_run(r)


def _extend_sub(sub):
    """The output commands: diff, merge, generate."""
    from . import commands as cli_outputs
    cli_outputs.extend_sub(sub)


def parse_args(argv=None) -> argparse.Namespace:
    return _parser().parse_args(argv)


def run(args: argparse.Namespace, stdout=None, stderr=None) -> int:
    stdout = stdout or sys.stdout
    stderr = stderr or sys.stderr
    try:
        handler = _HANDLERS.get(args.command)
        if handler is None:
            from . import commands as cli_outputs
            handler = cli_outputs.HANDLERS[args.command]
        return int(handler(args, stdout, stderr))
    except AdapterUnavailable as exc:
        print(f"convwitness: {exc}", file=stderr)
        return ExitCode.NOT_LOADABLE
    except AdapterLoadError as exc:
        print(f"convwitness: {exc}", file=stderr)
        return ExitCode.NOT_LOADABLE
    except ConvWitnessError as exc:
        print(f"convwitness: {exc}", file=stderr)
        return ExitCode.USAGE


def _load(args, profile=None):
    from ..boundary.isolation.client import load_isolated
    timeout = args.call_timeout or (profile.call_timeout if profile is not None else 60.0)
    return load_isolated(args.adapter, isolation=args.isolation, call_timeout=timeout,
                         memory_limit=args.memory_limit)


def cmd_run(args, stdout, stderr) -> int:
    from ..run.certify import certify
    from ..report.console import Progress, summary_table
    from ..cases.profiles import get_profile
    profile = get_profile(args.profile)
    if args.invariant_budget is not None:
        import dataclasses
        profile = dataclasses.replace(profile, budget_s=args.invariant_budget)
    adapter = _load(args, profile)
    report_dir = args.report or os.path.join("reports", _safe(adapter.name))
    progress = None if args.quiet else Progress(stderr)
    extra = {}
    if getattr(args, "shard", None):
        from ..run.shard import shard_filter
        extra["work"], extra["shard"] = shard_filter(args.shard), args.shard
    try:
        doc, results = certify(adapter, profile=profile, only=args.only, seed=args.seed,
                               report_dir=report_dir, progress=progress, shrink=not args.no_shrink,
                               **extra)
    finally:
        close = getattr(adapter, "close", None)
        if close is not None:
            close()
    _write_views(doc, report_dir)
    print(summary_table(doc), file=stdout)
    print(f"report: {os.path.join(report_dir, 'report.json')}", file=stdout)
    if not results:
        print("convwitness: no invariant matched --only", file=stderr)
        return ExitCode.USAGE
    if doc["status"] == "partial" and not doc.get("shard"):
        print(f"convwitness: interrupted after {len(results)} invariant(s); the partial report "
              "is written (status partial)", file=stderr)
        return ExitCode.FAILED
    return ExitCode.OK if _all_passed(doc) else ExitCode.FAILED


def _all_passed(doc) -> bool:
    return all(r["verdict"] in ("pass", "not-applicable") or r["informational"]
               for r in doc["invariants"]) and any(r["verdict"] == "pass" for r in doc["invariants"])


def _write_views(doc, report_dir):
    """Human and CI views beside report.json: report.html, summary.md, junit.xml."""
    from ..report.outputs import write_views
    write_views(doc, report_dir)


def _safe(name: str) -> str:
    return "".join(c if c.isalnum() or c in "-_." else "_" for c in name) or "adapter"


def cmd_replay(args, stdout, stderr) -> int:
    from ..run.witness import replay
    adapter = _load(args)
    verdict, ev, message, meta = replay(args.witness, adapter, args.invariant)
    print(f"{meta.get('invariant', args.invariant)} on {adapter.name}: {verdict}", file=stdout)
    print(message, file=stdout)
    if verdict in ("pass", "not-applicable"):
        return ExitCode.OK
    return ExitCode.FAILED


def cmd_rebuild(args, stdout, stderr) -> int:
    from ..report.console import summary_table
    from ..run.journal import rebuild
    doc = rebuild(args.report)
    _write_views(doc, args.report)
    print(summary_table(doc), file=stdout)
    print(f"rebuilt {os.path.join(args.report, 'report.json')} from the journal "
          f"({len(doc['invariants'])} invariants, status {doc['status']})", file=stdout)
    return ExitCode.OK if _all_passed(doc) and doc["status"] == "complete" else ExitCode.FAILED


def cmd_invariants(args, stdout, stderr) -> int:
    from ..invariants import SURFACES, by_surface
    for surface, invs in by_surface().items():
        print(f"{surface} — {SURFACES.get(surface, '')}", file=stdout)
        for inv in invs:
            passes = ",".join(sorted(inv.passes))
            print(f"  {inv.id:34s} [{passes}] {inv.statement}", file=stdout)
    return ExitCode.OK


def cmd_adapters(args, stdout, stderr) -> int:
    from ..boundary.builtins import list_builtins
    for row in list_builtins():
        print(row, file=stdout)
    return ExitCode.OK


def cmd_selftest(args, stdout, stderr) -> int:
    from ..run.selftest import selftest
    return selftest(profile=args.profile, seed=args.seed, only=args.only, stdout=stdout, stderr=stderr,
                    seeds=args.seeds)


_HANDLERS = {"run": cmd_run, "replay": cmd_replay, "invariants": cmd_invariants, "rebuild": cmd_rebuild,
             "adapters": cmd_adapters, "selftest": cmd_selftest}


def main(argv=None) -> int:
    args = parse_args(argv)
    try:
        code = run(args)
        sys.stdout.flush()
    except BrokenPipeError:
        # the reader went away (``convwitness invariants | head``): not an error of ours
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        code = ExitCode.OK
    sys.exit(code)


if __name__ == "__main__":
    main()
