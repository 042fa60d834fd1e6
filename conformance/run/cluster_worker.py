"""What runs on the Dask workers of a cluster run (run/cluster.py drives them).

Functions here are sent to the workers by reference (``convwitness.run.cluster_worker``),
so every worker needs convwitness installed, and the adapter's library.
"""
from __future__ import annotations

import os
import shutil
import tempfile
import threading
import traceback

__all__ = ["probe", "release", "task"]


class _Runner:
    """The one thread of a worker process that loads adapters and runs invariants.

    Dask may run tasks on threads it later retires; the adapter's zygote is killed when
    the thread that started it ends (PR_SET_PDEATHSIG is per thread), so the adapter is
    loaded, used and closed on this long-lived thread only. It keeps the adapter of the
    current run (one load per worker and run, not per task: a load costs a process start
    and the library's import), and runs one invariant at a time (hypothesis is not
    thread-safe)."""

    _lock = threading.Lock()
    _one = None

    def __init__(self):
        import queue
        self.jobs: "queue.Queue" = queue.Queue()
        self.key, self.adapter = None, None
        threading.Thread(target=self._loop, name="convwitness-cluster-runner", daemon=True).start()

    @classmethod
    def get(cls) -> "_Runner":
        with cls._lock:
            if cls._one is None:
                cls._one = cls()
            return cls._one

    def _loop(self):
        while True:
            fn, args, box, done = self.jobs.get()
            try:
                box["value"] = fn(self, *args)
            except BaseException as exc:     # handed to the calling task, which raises it
                box["error"] = exc
            done.set()

    def call(self, fn, *args):
        box, done = {}, threading.Event()
        self.jobs.put((fn, args, box, done))
        done.wait()
        if "error" in box:
            raise box["error"]
        return box["value"]

    def adapter_for(self, spec: str, opts: dict, run_id: str):
        """The adapter of run ``run_id`` (loaded on first use; an earlier run's is closed,
        so no state of one run, such as calls known to hang, leaks into another)."""
        key = (run_id, spec, repr(sorted(opts.items())))
        if self.key != key:
            self.release()
            from ..boundary.isolation.client import load_isolated
            self.adapter = load_isolated(spec, **opts)
            self.key = key
        return self.adapter

    def release(self, run_id: str | None = None):
        if self.adapter is not None and (run_id is None or self.key[0] == run_id):
            close = getattr(self.adapter, "close", None)
            self.key, self.adapter = None, None
            if close is not None:
                close()


def probe(spec: str, opts: dict, run_id: str) -> dict:
    """Run on every worker before any task: can it load the adapter, and as what?"""
    def probe(runner):
        adapter = runner.adapter_for(spec, opts, run_id)
        return {"name": adapter.name, "version": adapter.version,
                "capabilities": adapter.capabilities.to_dict()}
    try:
        return _Runner.get().call(probe)
    except Exception as exc:    # reported, one line per worker, by the driver
        return {"error": f"{type(exc).__name__}: {str(exc).splitlines()[0] if str(exc) else ''}"}


def release(run_id: str) -> None:
    """Run on every worker at the end of a run: close the run's adapter."""
    _Runner.get().call(lambda runner: runner.release(run_id))


def task(spec: str, opts: dict, run_id: str, inv_id: str, profile, seed, shrink: bool) -> dict:
    """One invariant on this worker; the result dict and the files it wrote."""
    try:    # under the worker's own folder: Dask removes the folders of workers that died
        from distributed import get_worker
        where = get_worker().local_directory
    except (ImportError, ValueError, AttributeError):
        where = None
    return _Runner.get().call(_run_one, spec, opts, run_id, inv_id, profile, seed, shrink, where)


def _run_one(runner, spec, opts, run_id, inv_id, profile, seed, shrink, where=None) -> dict:
    from ..report.document import result_to_dict
    from .further import search_further
    from .runner import InvariantResult, run_invariant, select
    import warnings
    with warnings.catch_warnings():
        # the worker's own threads (heartbeats) draw from the global `random` while a
        # strategy runs; hypothesis then warns that the strategy used `random`. Our
        # strategies do not (cases come from hypothesis' own draws and aux_rng), so the
        # warning says nothing about the run here.
        warnings.filterwarnings("ignore", message="Do not use the `random` module inside strategies")
        tmp = tempfile.mkdtemp(prefix="convwitness-task-", dir=where)
        try:
            try:
                adapter = runner.adapter_for(spec, opts, run_id)
                inv, refusal = next(pair for pair in select(adapter.capabilities, None)
                                    if pair[0].id == inv_id)
                res = run_invariant(adapter, inv, profile, seed=seed, report_dir=tmp,
                                    refusal=refusal, shrink=shrink)
                res.further = search_further(adapter, inv, profile, res, seed=seed, report_dir=tmp,
                                             shrink=shrink, replay_hint="", run_invariant=run_invariant)
            except Exception as exc:   # a bug of convwitness on the worker: never the adapter's verdict
                res = InvariantResult(id=inv_id, statement="", property="", passes=[],
                                      verdict="internal", message=f"{type(exc).__name__}: {exc}",
                                      traceback=traceback.format_exc())
            files = {}
            for folder in ("witnesses", "internal"):
                root = os.path.join(tmp, folder)
                for name in sorted(os.listdir(root)) if os.path.isdir(root) else []:
                    with open(os.path.join(root, name), "rb") as fh:
                        files[f"{folder}/{name}"] = fh.read()
            return {"result": result_to_dict(res), "files": files, "tmp": tmp, "cwd": os.getcwd()}
        finally:
            shutil.rmtree(tmp, ignore_errors=True)
