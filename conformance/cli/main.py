"""The ``convwitness`` command line: ``parse_args`` then ``run(args, stdout, stderr)``."""
from __future__ import annotations

import argparse
import enum
import os
import sys
import traceback

from ..errors import AdapterLoadError, AdapterUnavailable, ConvWitnessError
from .outcome import outcome as _outcome

__all__ = ["ExitCode", "parse_args", "run", "main"]


class ExitCode(enum.IntEnum):
    """Exit codes of ``convwitness``; the outcomes of a report map to them in
    ``report/verdicts.py`` (``OUTCOMES``), the one place the rule lives."""
    OK = 0                  # CONFORMANT (diff: no regression)
    FAILED = 1              # NOT CONFORMANT: a deciding invariant failed, errored, crashed or timed out
    USAGE = 2               # bad command line or input file (nothing written)
    NOT_LOADABLE = 3        # the adapter could not be loaded or is unavailable
    INTERNAL = 4            # convwitness itself failed (a bug in convwitness, not in the adapter)
    NOTHING_CERTIFIED = 5   # the run was complete but checked nothing applicable
    PARTIAL = 6             # an interrupted run, one shard, or an incomplete merge (no failure in it)


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="convwitness", description=(
        "Certify a convolution-layer implementation against a float64 reference with "
        "derived rounding-error bounds. A passing report is evidence, not proof; an "
        "adapter runs arbitrary code, so run untrusted ports in a sandbox."))
    from .. import __version__
    p.add_argument("--version", action="version", version=f"convwitness {__version__}")
    sub = p.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True

    r = sub.add_parser("run", help="run the suite on an adapter and write a report")
    r.add_argument("--adapter", required=True, help="built-in name, package.module:attr, file.py:attr or exec:COMMAND")
    r.add_argument("--profile", default="quick", help="quick (CI-sized), standard or nightly")
    r.add_argument("--only", default=None, help="comma-separated invariant ids or glob patterns (e.g. 'forward.*')")
    r.add_argument("--seed", type=int, default=0, help="hypothesis seed (default 0)")
    r.add_argument("--report", default=None, help="report folder (default reports/<adapter name>)")
    r.add_argument("--no-shrink", action="store_true", help="skip shrinking (faster, larger witnesses)")
    r.add_argument("--compiles-per-shape", action="store_true",
                   help="the port pays for each new call signature (JIT, accelerator compiler): "
                        "the free search draws fresh values on the covering schedule's geometries, "
                        "as when its capabilities declare compiles_per_shape=True")
    r.add_argument("--quiet", action="store_true", help="no progress lines")
    _isolation_options(r)
    r.add_argument("--invariant-budget", type=float, default=None, metavar="SECONDS",
                   help="wall-time budget of one invariant, shrinking included (default: the profile's)")
    r.add_argument("--cluster", default=None, metavar="ADDRESS",
                   help="run each invariant as a task on a Dask cluster: a scheduler address "
                        "(tcp://host:8786) or local:N for N local worker processes (docs/cluster.md)")
    _extend_run(r)

    rp = sub.add_parser("replay", help="re-run one witness without hypothesis")
    rp.add_argument("witness", help="a witness .json (or .npz) written by `run`")
    rp.add_argument("--adapter", default=None,
                    help="the adapter to replay on (default: the one the witness records)")
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
    st.add_argument("--compiles-per-shape", action="store_true",
                    help="run every entry as a port that compiles per shape (free search on the "
                         "covering schedule's geometries)")
    _extend_sub(sub)
    return p


def _memory(text: str) -> int:
    from ..boundary.limits import parse_bytes
    try:
        return parse_bytes(text)
    except ValueError as exc:
        raise argparse.ArgumentTypeError(f"--memory-limit {exc}") from None


def _allowance(text: str) -> float:
    try:
        v = float(text)
    except ValueError:
        v = 0.0
    if not 1.0 <= v < float("inf"):
        raise argparse.ArgumentTypeError(f"expected a finite factor >= 1 (e.g. 2), got {text!r}")
    return v


def _isolation_options(p):
    p.add_argument("--isolation", choices=("process", "none"), default="process",
                   help="run adapter calls in a worker process (default) or in-process (faster, "
                        "for debugging; a crash then ends the run)")
    p.add_argument("--call-timeout", type=float, default=None,
                   help="seconds per adapter call before it is killed (default: the profile's)")
    p.add_argument("--first-call-allowance", type=_allowance, default=2.0, metavar="FACTOR",
                   help="a call with a new signature (method, shapes, geometry) may take FACTOR x the "
                        "call timeout, for ports that compile per shape (default 2; 1 for none)")
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
    except Exception:       # not the adapter's doing, not the user's: a bug of convwitness
        path = _save_internal(traceback.format_exc())
        print(f"convwitness: internal error (a bug in convwitness, not in the adapter): "
              f"{sys.exc_info()[0].__name__}: {sys.exc_info()[1]}; traceback saved to {path}",
              file=stderr)
        return ExitCode.INTERNAL


def _save_internal(text: str) -> str:
    import tempfile
    try:
        fd, path = tempfile.mkstemp(prefix="convwitness-internal-", suffix=".txt")
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(text)
        return path
    except OSError:
        return "(could not be saved)"


def _check_only(only: str | None) -> None:
    """``--only`` patterns that match no invariant: a usage error, before anything is written."""
    import difflib
    import fnmatch
    from ..invariants import catalogue
    from ..errors import ConvWitnessError as _Usage
    ids = [inv.id for inv in catalogue()]
    for pat in [p.strip() for p in (only or "").split(",") if p.strip()]:
        if any(fnmatch.fnmatchcase(i, pat) or i.startswith(pat + ".") or i == pat for i in ids):
            continue
        close = difflib.get_close_matches(pat, ids + sorted({i.split(".")[0] + ".*" for i in ids}), n=3)
        hint = f"; did you mean {', '.join(close)}?" if close else "; `convwitness invariants` lists them"
        raise _Usage(f"--only {pat!r} matches no invariant (expected an id or glob such as "
                     f"forward.reference or 'grad_input.*'){hint}")


def _check_report_dir(path: str) -> None:
    from ..errors import ConvWitnessError as _Usage
    if os.path.exists(path) and not os.path.isdir(path):
        raise _Usage(f"--report {path!r} is a file; expected a folder for report.json and its views "
                     "(give a new or existing folder, e.g. --report reports/mine)")


def _load(args, profile=None):
    from ..boundary.isolation.client import load_isolated
    timeout = args.call_timeout or (profile.call_timeout if profile is not None else 60.0)
    return load_isolated(args.adapter, isolation=args.isolation, call_timeout=timeout,
                         memory_limit=args.memory_limit,
                         first_call_allowance=getattr(args, "first_call_allowance", 1.0))


def cmd_run(args, stdout, stderr) -> int:
    from ..run.certify import certify
    from ..report.console import Progress, summary_table
    from ..cases.profiles import get_profile
    profile = get_profile(args.profile)
    if args.invariant_budget is not None:
        import dataclasses
        profile = dataclasses.replace(profile, budget_s=args.invariant_budget)
    _check_only(args.only)
    if args.report:
        _check_report_dir(args.report)
    if getattr(args, "cluster", None) is not None:
        if args.compiles_per_shape:
            raise ConvWitnessError(
                "--compiles-per-shape is not passed on to cluster workers; declare "
                "compiles_per_shape=True in the adapter's capabilities instead, or run without --cluster")
        return _run_on_cluster(args, profile, stdout, stderr)
    adapter = _load(args, profile)
    if args.compiles_per_shape:
        adapter.capabilities = adapter.capabilities.replace(compiles_per_shape=True)
    report_dir = args.report or os.path.join("reports", _safe(adapter.name))
    _check_report_dir(report_dir)
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
    return _outcome(doc, stderr, len(results))


def _run_on_cluster(args, profile, stdout, stderr) -> int:
    from ..run.cluster import run_cli
    doc, results, report_dir = run_cli(args, profile, stderr, safe=_safe)
    _write_views(doc, report_dir)
    from ..report.console import summary_table
    print(summary_table(doc), file=stdout)
    print(f"report: {os.path.join(report_dir, 'report.json')}", file=stdout)
    return _outcome(doc, stderr, len(results))


def _write_views(doc, report_dir):
    """Human and CI views beside report.json: report.html, summary.md, junit.xml."""
    from ..report.outputs import write_views
    write_views(doc, report_dir)


def _safe(name: str) -> str:
    return "".join(c if c.isalnum() or c in "-_." else "_" for c in name) or "adapter"


def cmd_replay(args, stdout, stderr) -> int:
    from ..cases.case import load_case
    from ..run.witness import describe_arrays, recorded_adapter, replay
    case, meta = load_case(args.witness)
    if args.adapter is None:
        args.adapter = recorded_adapter(meta, args.witness)
    adapter = _load(args)
    print(f"witness {args.witness}: {case.spec.describe()} ({case.kind}, seed {case.seed})", file=stdout)
    print("\n".join(describe_arrays(case)), file=stdout)
    verdict, ev, message, meta = replay(args.witness, adapter, args.invariant)
    print(f"{args.invariant or meta.get('invariant')} on {adapter.name}: {verdict}", file=stdout)
    print(message, file=stdout)
    if verdict == "pass":
        return ExitCode.OK
    if verdict == "not-applicable":
        print("convwitness: nothing was checked: the adapter does not claim this witness; replay "
              "it on an adapter that does (--adapter)", file=stderr)
        return ExitCode.USAGE
    return ExitCode.FAILED


def cmd_rebuild(args, stdout, stderr) -> int:
    from ..report.console import summary_table
    from ..run.journal import rebuild
    doc = rebuild(args.report)
    _write_views(doc, args.report)
    print(summary_table(doc), file=stdout)
    print(f"rebuilt {os.path.join(args.report, 'report.json')} from the journal "
          f"({len(doc['invariants'])} invariants, status {doc['status']})", file=stdout)
    return _outcome(doc, stderr)


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
                    seeds=args.seeds, compiles_per_shape=args.compiles_per_shape)


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
