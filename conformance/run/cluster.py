"""Running a certification on a Dask cluster (``convwitness run --cluster ADDRESS``).

The unit of work is the whole invariant, as for ``--shard`` (run/shard.py says why: a
piece of an invariant restricted to one dtype or ndim would draw other examples and
shrink to other witnesses than the local run with the same seed). One Dask task per
invariant; each task runs on a worker that loads the adapter itself, under the same
process isolation, call timeout and memory limit as a local run, runs the invariant
(and its further-cause search) into a private temporary folder and sends back the
result and the witness files. The driver writes each result into the run's journal as
it arrives, and one report at the end, with the cluster in ``environment.cluster``.

Differences from a local run, on purpose:

* Known timeout/crash causes (run/causes.py) are not replayed across invariants: the
  invariants run at the same time on different machines, so no invariant sees what an
  earlier one found. An adapter with no timeout or crash gets the local verdicts; one
  with a hang pays the hang once per invariant that meets it.
* Each task starts with an empty hypothesis example database (a fresh local report
  folder does too); a local rerun into an old folder replays its saved examples first.

Faults: a worker lost mid-task makes the scheduler run the task again on another
worker (Dask reschedules it; finished results are already in the journal). When the
scheduler goes away, or a task has killed ``allowed-failures`` workers, the run ends with
a partial report (exit 6), as on Ctrl-C. An adapter the workers cannot load is a
one-line error (exit 3) before any task is submitted.
"""
from __future__ import annotations

import contextlib
import os
import shlex
import time
from types import SimpleNamespace

from ..errors import AdapterLoadError, ConvWitnessError
from .cluster_worker import probe, release, task

__all__ = ["open_cluster", "certify_on_cluster", "ClusterError"]

#: seconds to wait for the first worker of a cluster named by address
WORKER_WAIT_S = 60.0


class ClusterError(ConvWitnessError):
    """A cluster that cannot be reached or used."""


def _distributed():
    try:
        import distributed
    except ImportError:
        raise ClusterError("--cluster needs Dask's distributed scheduler, which is not installed; "
                           "fix: pip install 'convwitness[cluster]' (or pip install 'dask[distributed]')"
                           ) from None
    return distributed


def open_cluster(address: str):
    """``(client, cluster or None, name)`` for ``local:N`` or a scheduler address."""
    distributed = _distributed()
    text = str(address).strip()
    if text.startswith("local:"):
        n = text[len("local:"):]
        if not n.isdigit() or int(n) < 1:
            raise ClusterError(f"--cluster {address!r}: expected local:N with N >= 1 worker processes "
                               "(e.g. local:2) or a scheduler address (e.g. tcp://host:8786)")
        cluster = distributed.LocalCluster(n_workers=int(n), threads_per_worker=1, processes=True,
                                           dashboard_address=None, silence_logs=50)
        return distributed.Client(cluster), cluster, f"local:{int(n)}"
    if not text:
        raise ClusterError("--cluster '': expected local:N or a scheduler address (e.g. tcp://host:8786)")
    try:
        client = distributed.Client(text, timeout=30)
    except (OSError, TimeoutError) as exc:
        raise ClusterError(f"--cluster {address!r}: no scheduler answered ({type(exc).__name__}: "
                           f"{str(exc).splitlines()[0] if str(exc) else 'timed out'}); start one with "
                           "`dask scheduler` and give its address (tcp://HOST:8786)") from None
    return client, None, text


class _Quiet:
    """Silence the client's own tracebacks while it runs (its reconnect attempts after the
    scheduler went away); what was lost is said in one line per cause instead."""

    NAMES = ("distributed.client", "distributed.comm", "distributed.core", "distributed.utils")

    def __init__(self):
        import logging
        self.saved = {n: logging.getLogger(n).level for n in self.NAMES}
        for n in self.NAMES:
            logging.getLogger(n).setLevel(logging.CRITICAL)

    def close(self):
        import logging
        for n, level in self.saved.items():
            logging.getLogger(n).setLevel(level)


def _close(client, cluster) -> None:
    """Close a client and the local cluster this run started (None: started elsewhere)."""
    if cluster is None:
        return
    for close in (client.close, cluster.close):
        try:
            close(timeout=10)
        except Exception:     # a scheduler already gone: nothing left to close
            pass


# -- on the driver -----------------------------------------------------------------------
def _identity(client, spec: str, opts: dict, name: str, run_id: str):
    """The adapter as every worker loads it; a one-line error when one cannot."""
    try:
        client.wait_for_workers(1, timeout=WORKER_WAIT_S)
    except (TimeoutError, OSError):
        raise ClusterError(f"--cluster {name}: no worker joined within {WORKER_WAIT_S:g} s; start workers "
                           f"with `dask worker {name} --nthreads 1`") from None
    answers = client.run(probe, spec, opts, run_id)
    bad = {w: a["error"] for w, a in answers.items() if "error" in a}
    if bad:
        _release_all(client, run_id)
        w, why = sorted(bad.items())[0]
        raise AdapterLoadError(f"--adapter {spec!r}: {len(bad)} of {len(answers)} worker(s) of {name} cannot "
                               f"load it (worker {w}: {why}); fix: install the adapter's package on every "
                               "worker or give a path they can all read (docs/cluster.md)")
    idents = {(a["name"], a["version"], repr(sorted(a["capabilities"].items()))) for a in answers.values()}
    if len(idents) > 1:
        _release_all(client, run_id)
        raise AdapterLoadError(f"--adapter {spec!r}: the workers of {name} load different adapters "
                               f"({sorted((n, v) for n, v, _ in idents)}); fix: install one version everywhere")
    from ..geometry.capabilities import Capabilities
    a = next(iter(answers.values()))
    return SimpleNamespace(name=a["name"], version=a["version"], source=spec,
                           capabilities=Capabilities.from_dict(a["capabilities"])), len(answers)


def _release_all(client, run_id: str) -> None:
    """Close the run's adapter on every worker still there (best effort)."""
    if getattr(client, "status", "") != "running":
        return
    try:
        client.run(release, run_id)
    except Exception:        # a worker or the scheduler already gone: nothing to close there
        pass


def _worker_spec(spec: str) -> str:
    """A file adapter made absolute, so workers started elsewhere in this tree find it."""
    where, _, attr = spec.rpartition(":")
    if where.endswith(".py") and os.path.isfile(where):
        return f"{os.path.abspath(where)}:{attr}"
    return spec


def _settle(data: dict, report_dir: str) -> dict:
    """Write the task's files into ``report_dir``; its result with our paths in place of the worker's."""
    import json
    tmp, cwd = data["tmp"], data["cwd"]
    here = os.getcwd()
    for rel, blob in data["files"].items():
        path = os.path.join(report_dir, rel)
        os.makedirs(os.path.dirname(path), exist_ok=True)
        if rel.endswith(".json") and rel.startswith("witnesses/"):
            meta = json.loads(blob.decode("utf-8"))
            if "run_dir" in meta:
                meta["run_dir"] = here
            blob = (json.dumps(meta, indent=2) + "\n").encode("utf-8")
        with open(path, "wb") as fh:
            fh.write(blob)
    res = data["result"]
    witnesses = [res.get("witness")] + [c.get("witness") for c in res.get("further_causes") or []]
    for w in witnesses:
        if w and w.get("path") and w.get("replay"):
            old = shlex.quote(os.path.relpath(os.path.join(tmp, w["path"]), cwd))
            new = shlex.quote(os.path.relpath(os.path.join(report_dir, w["path"]), here))
            w["replay"] = w["replay"].replace(old, new, 1)
    for key in ("message", "traceback"):
        if res.get(key):
            res[key] = res[key].replace(tmp, os.path.abspath(report_dir))
    return res


def _view(d: dict) -> SimpleNamespace:
    """What the console's progress line reads of a result."""
    return SimpleNamespace(id=d["id"], verdict=d.get("deviation", d["verdict"]), examples=d["examples"],
                           informational=d["informational"], duration_s=d["duration_s"])


def certify_on_cluster(spec: str, cluster: str, *, load_opts: dict, profile="quick", only=None,
                       seed=0, report_dir: str | None = None, progress=None, shrink: bool = True,
                       work=None, shard: str | None = None, client=None, warn=None, identity=None,
                       run_id: str | None = None):
    """Like run.certify.certify, with every invariant a task on ``cluster`` (``local:N`` or a
    scheduler address; or pass a connected ``client``). Returns (report document, results).
    ``warn(line)`` is told of each invariant lost to the cluster (the report is then partial)."""
    from ..cases.profiles import get_profile
    from ..report.document import build_report, write_report
    from .journal import Journal
    from .runner import select
    from .signals import Terminated, as_interrupt, check as interruption_check
    distributed = _distributed()
    profile = get_profile(profile)
    own = None
    if client is None:
        client, own, name = open_cluster(cluster)
    else:
        name = cluster
    futures = {}
    run_id = run_id or os.urandom(8).hex()
    stop = contextlib.ExitStack()
    try:
        wspec = _worker_spec(spec)
        adapter, workers = identity or _identity(client, wspec, load_opts, name, run_id)
        adapter.source = spec
        chosen = select(adapter.capabilities, only)
        if work is not None:
            chosen = work(chosen)
        order = [inv.id for inv, _ in chosen]
        journal = None
        if report_dir:
            os.makedirs(report_dir, exist_ok=True)
            from .certify import _drop_stale_witnesses
            _drop_stale_witnesses(report_dir, order)
            journal = Journal.open(report_dir, adapter, profile, seed, planned=order, shard=shard)
        started, t0 = time.time(), time.perf_counter()
        quiet = _Quiet()
        done: dict = {}
        status, lost = "complete", []
        stop.enter_context(as_interrupt())   # left once the report is written
        try:
            for inv_id in order:
                fut = client.submit(task, wspec, load_opts, run_id, inv_id, profile, seed, shrink,
                                    pure=False, key=f"convwitness-{inv_id}-{os.urandom(4).hex()}")
                futures[fut] = inv_id
            for fut in distributed.as_completed(list(futures)):
                interruption_check()          # a signal whose exception was swallowed
                inv_id = futures.pop(fut)     # released once read: a worker lost later costs no rerun
                try:
                    data = fut.result()
                except Exception as exc:      # the scheduler went away, or workers kept dying
                    why = (str(exc).splitlines() or [""])[0].replace(fut.key, "the task")
                    lost.append((inv_id, f"{type(exc).__name__}: {why}"))
                    status = "partial"
                    continue
                res = _settle(data, report_dir) if report_dir else data["result"]
                done[inv_id] = res
                if journal is not None:
                    journal.append(res)
                if progress:
                    progress("done", {"index": len(done) - 1, "total": len(order), "result": _view(res),
                                      "elapsed": time.perf_counter() - t0})
        except KeyboardInterrupt as exc:
            status = "partial"
            if progress:
                progress("interrupted", {"done": len(done), "total": len(order),
                                         "signal": str(exc) if isinstance(exc, Terminated) else "SIGINT"})
        finally:
            quiet.close()
            if journal is not None:
                journal.close()
        for why in dict.fromkeys(w for _, w in lost) if warn else []:
            ids = [i for i, w in lost if w == why]
            warn(f"{len(ids)} invariant(s) lost to the cluster, not in the report ({why}): {', '.join(ids)}; rerun to complete it")
        results = [done[i] for i in order if i in done]
        doc = build_report(adapter, results, profile=profile, seed=seed, started=started,
                           duration_s=time.perf_counter() - t0, shard=shard,
                           status="partial" if shard else status)
        doc["environment"]["cluster"] = {"address": name, "workers": workers}
        if report_dir:
            write_report(doc, report_dir)
        return doc, results
    finally:
        stop.close()                   # the previous signal handlers come back
        for fut in futures:
            if not fut.done():
                fut.cancel()
        _release_all(client, run_id)
        _close(client, own)


def run_cli(args, profile, stderr, *, safe):
    """``convwitness run --cluster``: (report document, results, report folder)."""
    from ..report.console import Progress
    opts = {"isolation": args.isolation, "call_timeout": args.call_timeout or profile.call_timeout,
            "memory_limit": args.memory_limit,
            "first_call_allowance": getattr(args, "first_call_allowance", 1.0)}
    extra = {}
    if getattr(args, "shard", None):
        from .shard import shard_filter
        extra["work"], extra["shard"] = shard_filter(args.shard), args.shard
    # the command ends with this run: the client's late tracebacks (its reconnect, cancelled
    # as the process closes it) stay silenced; the lost invariants are said in one line
    _distributed()              # imported first: importing it sets its loggers' levels
    _Quiet()
    client, own, name = open_cluster(args.cluster)
    try:
        run_id = os.urandom(8).hex()
        ident = _identity(client, _worker_spec(args.adapter), opts, name, run_id)
        adapter = ident[0]
        report_dir = args.report or os.path.join("reports", safe(adapter.name))
        if os.path.exists(report_dir) and not os.path.isdir(report_dir):
            raise ConvWitnessError(f"--report {report_dir!r} is a file; expected a folder for report.json "
                                   "and its views (give a new or existing folder, e.g. --report reports/mine)")
        progress = None if args.quiet else Progress(stderr)
        doc, results = certify_on_cluster(
            args.adapter, name, load_opts=opts, profile=profile, only=args.only, seed=args.seed,
            report_dir=report_dir, progress=progress, shrink=not args.no_shrink, client=client, identity=ident, run_id=run_id,
            warn=lambda line: print(f"convwitness: {line}", file=stderr), **extra)
    finally:
        _close(client, own)
    return doc, results, report_dir
