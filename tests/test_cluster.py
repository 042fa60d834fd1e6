"""`run --cluster`: a certification on a Dask cluster gives the verdicts of a local run.

Outside references: Dask's distributed scheduler (docs.dask.org, "Resilience": a task
running on a worker that dies is rescheduled on another worker; "Scheduler state":
``TaskState.suspicious`` counts the workers that died while running the task). The
equality is against the local run of this very tool with the same seed, which the other
tests check against the float64 reference and the zoo's planted bugs.
"""
from __future__ import annotations

import io
import json
import os
import signal
import socket
import subprocess
import sys
import threading
import time

import numpy as np
import pytest

distributed = pytest.importorskip(
    "distributed", reason="Dask's distributed scheduler is not installed (pip install 'convwitness[cluster]')")

from convwitness.cli.main import parse_args, run  # noqa: E402
from convwitness.report.document import load_report, validate_report  # noqa: E402
from convwitness.run.cluster import certify_on_cluster  # noqa: E402

ONLY = "forward.reference,forward.input_linearity,call.inputs_untouched,grad_input.reference"
PLANTED = "convwitness.adapters.zoo_forward:KernelFlipped"   # flips the kernel: fails two of ONLY
TIMEOUT = 600                                                # generous: a loaded 2-core machine


def cli(*argv):
    out, err = io.StringIO(), io.StringIO()
    rc = run(parse_args(list(argv)), out, err)
    return rc, out.getvalue(), err.getvalue()


def _run(folder, adapter, *extra):
    return cli("run", "--adapter", adapter, "--only", ONLY, "--seed", "3", "--report", str(folder),
               "--quiet", *extra)


def _comparable(doc: dict, folder) -> dict:
    """What must not differ between a local and a cluster run: everything but timings,
    the report folder in the replay commands, and the per-example shares of the bound.
    Those depend on the BLAS thread count (Dask workers run numpy with one thread, the
    local run with the machine's default), which changes the float64 summation order of
    the reference and so the last bits of every error; verdicts, witnesses and coverage
    do not depend on it (seen in CI on a loaded machine: shares of forward.input_linearity
    differed while everything else was equal)."""
    out = {}
    for r in doc["invariants"]:
        r = {k: v for k, v in r.items()
             if k not in ("duration_s", "examples_per_s", "shares", "worst_share", "worst_bound")}
        if r.get("witness"):
            w = dict(r["witness"])
            w["replay"] = w["replay"].replace(os.path.relpath(str(folder)), "DIR")
            r["witness"] = w
        out[r["id"]] = r
    return {"invariants": out, "coverage": doc["coverage"], "causes": doc["causes"],
            "summary": doc["summary"], "conformant": doc["conformant"], "status": doc["status"]}


@pytest.mark.parametrize("adapter,expected_rc", [("reference", 0), (PLANTED, 1)])
def test_cluster_run_equals_local_run(tmp_path, adapter, expected_rc):
    # the reference adapter is correct; KernelFlipped is a planted bug (adapters/zoo_forward.py):
    # neither times out nor crashes, so the local run's cause replay (run/causes.py) never acts
    rc_local, out_local, _ = _run(tmp_path / "local", adapter)
    rc_cluster, out_cluster, err = _run(tmp_path / "cluster", adapter, "--cluster", "local:2")
    assert (rc_local, rc_cluster) == (expected_rc, expected_rc), err
    local = load_report(str(tmp_path / "local" / "report.json"))
    cluster = load_report(str(tmp_path / "cluster" / "report.json"))
    validate_report(cluster)
    assert cluster["environment"]["cluster"] == {"address": "local:2", "workers": 2}
    assert "cluster" not in local["environment"]
    assert "Dask cluster" in (tmp_path / "cluster" / "report.html").read_text(encoding="utf-8")
    a, b = _comparable(cluster, tmp_path / "cluster"), _comparable(local, tmp_path / "local")
    differing = {i: sorted(k for k in set(a["invariants"][i]) | set(b["invariants"][i])
                           if a["invariants"][i].get(k) != b["invariants"][i].get(k))
                 for i in a["invariants"] if a["invariants"][i] != b["invariants"].get(i)}
    assert not differing, {i: {k: (a["invariants"][i].get(k), b["invariants"][i].get(k)) for k in ks}
                           for i, ks in differing.items()}
    assert a == b
    def listing(folder):
        return sorted(os.listdir(folder)) if folder.is_dir() else []
    names = listing(tmp_path / "local" / "witnesses")
    assert names == listing(tmp_path / "cluster" / "witnesses")
    assert bool(names) == (expected_rc == 1)
    for name in names:
        a, b = tmp_path / "local" / "witnesses" / name, tmp_path / "cluster" / "witnesses" / name
        if name.endswith(".npz"):
            with np.load(a) as za, np.load(b) as zb:
                assert sorted(za.files) == sorted(zb.files)
                for k in za.files:
                    np.testing.assert_array_equal(za[k], zb[k])
        else:
            assert json.loads(a.read_text()) == json.loads(b.read_text())
    # the journal has every invariant once, as a local run's does
    lines = (tmp_path / "cluster" / "journal.jsonl").read_text().splitlines()
    assert sorted(json.loads(x)["result"]["id"] for x in lines[1:]) == sorted(ONLY.split(","))


@pytest.fixture(scope="module")
def client():
    cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                       dashboard_address=None, silence_logs=50)
    c = distributed.Client(cluster)
    try:
        yield c
    finally:
        c.close()
        cluster.close()


LOAD = {"isolation": "process", "call_timeout": 60.0, "memory_limit": None, "first_call_allowance": 2.0}


def test_adapter_workers_cannot_import_is_one_line_before_any_work(tmp_path, client, monkeypatch):
    # a module importable here (its folder on this process's sys.path) but not on the workers
    (tmp_path / "only_here_adapter.py").write_text(
        "from convwitness.adapters.reference import ReferenceAdapter as Port\n")
    monkeypatch.syspath_prepend(str(tmp_path))
    from convwitness.boundary.loading import load_adapter
    assert load_adapter("only_here_adapter:Port").name == "reference"     # loads here
    from convwitness.errors import AdapterLoadError
    with pytest.raises(AdapterLoadError) as info:
        certify_on_cluster("only_here_adapter:Port", "local:2", load_opts=LOAD, only=ONLY,
                           report_dir=str(tmp_path / "rep"), client=client)
    text = str(info.value)
    assert "\n" not in text and "cannot load it" in text and "fix:" in text
    assert not (tmp_path / "rep").exists()              # nothing started, nothing written


def test_worker_lost_mid_task_reruns_elsewhere(tmp_path, client):
    pids = client.run(os.getpid)                      # worker address -> process id
    box = {}

    def go():
        box["out"] = certify_on_cluster("reference", "local:2", load_opts=LOAD, only="forward.*",
                                        seed=5, report_dir=str(tmp_path / "rep"), client=client)
    t = threading.Thread(target=go, daemon=True)
    t.start()

    def suspicious(dask_scheduler, key):
        ts = dask_scheduler.tasks.get(key)
        return None if ts is None else ts.suspicious
    deadline = time.monotonic() + TIMEOUT
    rerun = None
    for _attempt in range(3):        # a task that finished just before the kill proves nothing: try again
        killed = None
        while killed is None and time.monotonic() < deadline and t.is_alive():
            for addr, keys in client.processing().items():
                keys = [k for k in keys if str(k).startswith("convwitness-")]
                if keys and addr in pids:
                    os.kill(pids[addr], signal.SIGKILL)
                    killed = keys[0]
                    break
            time.sleep(0.05)
        if killed is None:
            break
        # the scheduler saw the worker die while it ran the task (TaskState.suspicious, Dask docs)
        until, n = time.monotonic() + 60, None
        while time.monotonic() < until and t.is_alive():
            n = client.run_on_scheduler(suspicious, key=killed)
            if n is None or n >= 1:
                break
            time.sleep(0.1)
        if n:
            rerun = killed
            break
        pids = client.run(os.getpid)              # the nanny's replacement worker has a new pid
    assert rerun is not None, "no worker was killed while it ran a task"
    t.join(TIMEOUT)
    assert not t.is_alive()
    doc, results = box["out"]
    assert doc["status"] == "complete"
    ids = [r["id"] for r in doc["invariants"]]
    lines = (tmp_path / "rep" / "journal.jsonl").read_text().splitlines()
    head = json.loads(lines[0])
    assert sorted(json.loads(x)["result"]["id"] for x in lines[1:]) == sorted(head["planned"]) == sorted(ids)
    assert all(r["verdict"] in ("pass", "not-applicable") for r in doc["invariants"]), \
        [(r["id"], r["verdict"], r["message"][:80]) for r in doc["invariants"]]
    # the killed task ran again elsewhere and its result is in the report
    assert rerun.split("-")[1] in ids


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def test_scheduler_gone_ends_with_partial_report(tmp_path):
    port = _free_port()
    address = f"tcp://127.0.0.1:{port}"
    env = dict(os.environ, PYTHONWARNINGS="ignore")
    sched = subprocess.Popen([sys.executable, "-m", "distributed.cli.dask_scheduler", "--host", "127.0.0.1",
                              "--port", str(port), "--no-dashboard"], env=env,
                             stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    worker = subprocess.Popen([sys.executable, "-m", "distributed.cli.dask_worker", address, "--nthreads", "1",
                               "--no-dashboard", "--death-timeout", "20"], env=env,
                              stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    rep = tmp_path / "rep"
    try:
        runner = subprocess.Popen([sys.executable, "-m", "convwitness.cli.main", "run", "--adapter", "reference",
                                   "--only", "forward.*", "--report", str(rep), "--quiet", "--cluster", address],
                                  env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        journal = rep / "journal.jsonl"
        deadline = time.monotonic() + TIMEOUT
        while time.monotonic() < deadline and runner.poll() is None:
            if journal.exists() and len(journal.read_text().splitlines()) >= 2:   # one result in
                break
            time.sleep(0.1)
        assert runner.poll() is None, runner.communicate()
        sched.send_signal(signal.SIGKILL)
        out, err = runner.communicate(timeout=TIMEOUT)
    finally:
        for p in (sched, worker):
            if p.poll() is None:
                p.kill()
            p.wait()
    assert runner.returncode == 6, err[-2000:]        # PARTIAL (cli.main.ExitCode)
    doc = load_report(str(rep / "report.json"))
    assert doc["status"] == "partial"
    done = [json.loads(x)["result"]["id"] for x in journal.read_text().splitlines()[1:]]
    assert done and [r["id"] for r in doc["invariants"]] == [i for i in json.loads(
        journal.read_text().splitlines()[0])["planned"] if i in done]
    assert "lost to the cluster, not in the report" in err and "scheduler" in err


@pytest.mark.parametrize("address", ["local:0", "local:two", ""])
def test_bad_cluster_address_is_a_one_line_usage_error(tmp_path, address):
    # exit 2 for a usage error (README, "Verdicts and exit codes"); nothing written
    rc, out, err = cli("run", "--adapter", "reference", "--report", str(tmp_path / "r"), "--cluster", address)
    assert rc == 2 and err.count("\n") == 1 and "expected local:N" in err, err
    assert not (tmp_path / "r").exists()


def test_sigterm_on_the_driver_writes_a_partial_report(tmp_path):
    # as a local run does (run/signals.py; README, exit codes: 6 PARTIAL)
    rep = tmp_path / "rep"
    proc = subprocess.Popen([sys.executable, "-m", "convwitness.cli.main", "run", "--adapter", "reference",
                             "--only", "forward.*", "--report", str(rep), "--quiet", "--cluster", "local:2"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    journal = rep / "journal.jsonl"
    deadline = time.monotonic() + TIMEOUT
    while time.monotonic() < deadline and proc.poll() is None:
        if journal.exists() and len(journal.read_text().splitlines()) >= 2:
            break
        time.sleep(0.1)
    assert proc.poll() is None, proc.communicate()
    proc.send_signal(signal.SIGTERM)
    _, err = proc.communicate(timeout=TIMEOUT)
    assert proc.returncode == 6, err[-2000:]
    doc = load_report(str(rep / "report.json"))
    done = {json.loads(x)["result"]["id"] for x in journal.read_text().splitlines()[1:]}
    assert doc["status"] == "partial" and {r["id"] for r in doc["invariants"]} == done


def test_rebuild_of_a_cluster_journal_lists_invariants_in_the_planned_order(tmp_path, client):
    # the journal gets results in the order they finish; `convwitness rebuild` keeps the plan's order
    rep = tmp_path / "rep"
    doc, _ = certify_on_cluster("reference", "local:2", load_opts=LOAD, only=ONLY, report_dir=str(rep),
                                client=client)
    (rep / "report.json").unlink()
    rc, out, err = cli("rebuild", str(rep))
    assert rc == 0, err
    head = json.loads((rep / "journal.jsonl").read_text().splitlines()[0])
    rebuilt = load_report(str(rep / "report.json"))
    assert [r["id"] for r in rebuilt["invariants"]] == head["planned"] == [r["id"] for r in doc["invariants"]]
    assert rebuilt["status"] == "complete"


def test_python_api_takes_the_cluster_option(tmp_path, client):
    """convwitness.certify(..., cluster=ADDRESS) gives the verdicts of the CLI's local run."""
    import convwitness
    rc, _, _ = _run(tmp_path / "local", PLANTED)
    local = load_report(str(tmp_path / "local" / "report.json"))
    report = convwitness.certify(PLANTED, only=ONLY, seed=3, report_dir=str(tmp_path / "api"),
                                 cluster=client.scheduler.address)
    assert report.document["environment"]["cluster"]["workers"] == 2
    assert not report.conformant and rc == 1
    assert {r["id"]: r["verdict"] for r in report.document["invariants"]} == \
        {r["id"]: r["verdict"] for r in local["invariants"]}
