"""`run --shard K/N` and `convwitness merge`: four shards merged equal the unsharded run."""
from __future__ import annotations

import copy
import io
import json
import os

import pytest

from convwitness.cli.main import parse_args, run
from convwitness.report.document import load_report, validate_report

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
DEMO = os.path.join(ROOT, "reports", "_demo", "brindlemoss_port.py")
ADAPTER = f"{DEMO}:BrindlemossPort"
ONLY = "forward.*,call.*,grad_input.reference"       # fails, passes, informational and n/a


def cli(*argv):
    out, err = io.StringIO(), io.StringIO()
    rc = run(parse_args(list(argv)), out, err)
    return rc, out.getvalue(), err.getvalue()


def _run(folder, *extra, adapter=ADAPTER, seed=0):
    return cli("run", "--adapter", adapter, "--only", ONLY, "--seed", str(seed), "--report",
               str(folder), "--quiet", "--isolation", "none", *extra)


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("shards")
    _run(tmp / "whole")
    for k in range(1, 5):
        _run(tmp / f"s{k}", "--shard", f"{k}/4")
    return tmp


def _verdicts(doc):
    return [(r["id"], r["verdict"], r["informational"], r["witness"]["geometry"] if r["witness"] else None,
             r["examples"]) for r in doc["invariants"]]


def test_four_shards_merged_equal_the_unsharded_run(runs):
    whole = load_report(str(runs / "whole" / "report.json"))
    out = runs / "merged" / "report.json"
    rc, text, err = cli("merge", *(str(runs / f"s{k}" / "report.json") for k in range(1, 5)),
                        "-o", str(out), "--views")
    merged = load_report(str(out))          # validates against the schema
    assert _verdicts(merged) == _verdicts(whole)
    assert merged["summary"] == whole["summary"] and merged["conformant"] == whole["conformant"]
    assert merged["status"] == "complete" and merged["shard"] is None and err == ""
    assert rc == 1                          # the port has a planted bug
    assert merged["coverage"] == whole["coverage"]
    for r in merged["invariants"]:          # witness paths now relative to the merged report
        if r["witness"]:
            assert os.path.isfile(os.path.join(runs / "merged", r["witness"]["path"]))
    assert (runs / "merged" / "report.html").is_file() and (runs / "merged" / "junit.xml").is_file()


def test_shards_are_disjoint_cover_the_run_and_are_balanced(runs):
    whole = {r["id"] for r in load_report(str(runs / "whole" / "report.json"))["invariants"]}
    parts = [{r["id"] for r in load_report(str(runs / f"s{k}" / "report.json"))["invariants"]}
             for k in range(1, 5)]
    assert set().union(*parts) == whole and sum(map(len, parts)) == len(whole)
    assert max(map(len, parts)) - min(map(len, parts)) <= 2
    for k in range(1, 5):
        doc = load_report(str(runs / f"s{k}" / "report.json"))
        assert doc["shard"] == f"{k}/4" and doc["status"] == "partial"


def test_assignment_is_deterministic_and_weighs_dtype_ndim_cells():
    from convwitness import load_adapter
    from convwitness.run.runner import select
    from convwitness.run.shard import assign, shard_filter
    caps = load_adapter("reference").capabilities
    chosen = select(caps)
    assert assign(chosen, 4, caps) == assign(list(chosen), 4, caps)
    picked = [shard_filter(f"{k}/3", caps)(chosen) for k in (1, 2, 3)]
    assert sorted(i.id for p in picked for i, _ in p) == sorted(i.id for i, _ in chosen)
    from convwitness.run.shard import _weight
    loads = [sum(_weight(i, why, caps) for i, why in p) for p in picked]
    heaviest = max(_weight(i, why, caps) for i, why in chosen)
    assert max(loads) - min(loads) <= heaviest     # greedy longest-first bound (common practice, no source)


def _shard_docs(runs):
    return [str(runs / f"s{k}" / "report.json") for k in range(1, 5)]


def _tamper(runs, tmp_path, k, change):
    doc = copy.deepcopy(load_report(str(runs / f"s{k}" / "report.json")))
    change(doc)
    validate_report(doc)
    path = tmp_path / f"tampered{k}.json"
    path.write_text(json.dumps(doc))
    return str(path)


@pytest.mark.parametrize("field,change", [
    ("seed", lambda d: d.update(seed=5)),
    ("adapter", lambda d: d["adapter"].update(name="other-port")),
    ("adapter version", lambda d: d["adapter"].update(version="9.9")),
    ("profile", lambda d: d["profile"].update(name="standard")),
    ("library versions", lambda d: d["environment"]["libraries"].update(numpy="0.0")),
])
def test_merge_refuses_shards_of_different_runs(runs, tmp_path, field, change):
    paths = _shard_docs(runs)
    paths[1] = _tamper(runs, tmp_path, 2, change)
    rc, _, err = cli("merge", *paths, "-o", str(tmp_path / "m.json"))
    assert rc == 2 and f"disagree on {field}" in err and len(err.strip().splitlines()) == 1
    assert not (tmp_path / "m.json").exists()


def test_merge_refuses_a_shard_given_twice_and_marks_missing_ones_partial(runs, tmp_path):
    paths = _shard_docs(runs)
    rc, _, err = cli("merge", paths[0], paths[0], "-o", str(tmp_path / "m.json"))
    assert rc == 2 and "given twice" in err
    rc, _, err = cli("merge", *paths[:3], "-o", str(tmp_path / "m.json"))
    doc = load_report(str(tmp_path / "m.json"))
    assert doc["status"] == "partial" and not doc["conformant"] and "4/4 missing" in err and rc == 1


def test_bad_shard_text_is_a_usage_error(capsys):
    with pytest.raises(SystemExit) as exc:
        parse_args(["run", "--adapter", "reference", "--shard", "0/4"])
    assert exc.value.code == 2 and "expected K/N with 1 <= K <= N" in capsys.readouterr().err
