"""docs/ci.md runs as written: its shard and merge blocks, executed by bash exactly as
the doc shows them (the install block aside: this environment is installed already),
with each job in a folder of its own and an artifacts folder between them.

Sources: the recipe itself; the planted bug is the zoo's kernel flip
(adapters/zoo_forward.py:KernelFlipped, BUG-CLASSES.md C01); exit codes as README.md's
table states them.
"""
from __future__ import annotations

import json
import os
import re
import shutil
import subprocess

REPO = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
DOC = os.path.join(REPO, "docs", "ci.md")
ONLY = "forward.reference,forward.input_linearity,call.inputs_untouched,grad_input.reference"
PLANTED = "convwitness.adapters.zoo_forward:KernelFlipped"


def _blocks():
    with open(DOC, encoding="utf-8") as fh:
        blocks = re.findall(r"```bash\n(.*?)```", fh.read(), re.S)
    assert len(blocks) == 3, "docs/ci.md: expected install, shard and merge blocks"
    return blocks


def _job(block, cwd, **env):
    os.makedirs(cwd, exist_ok=True)
    full = dict(os.environ, PROFILE="quick", N="2", ONLY=ONLY, **{k: str(v) for k, v in env.items()})
    return subprocess.run(["bash", "-c", block], cwd=cwd, env=full, capture_output=True,
                          text=True, timeout=900)


def _pipeline(tmp, name, adapter, baseline, shards=(1, 2)):
    _, shard, merge = _blocks()
    art = tmp / f"{name}-artifacts"
    for k in shards:
        res = _job(shard, tmp / f"{name}-shard-job-{k}", ADAPTER=adapter, K=k, ARTIFACTS=art)
        assert res.returncode == 0, res.stdout + res.stderr      # the shard job stays green
    return _job(merge, tmp / f"{name}-merge-job", ARTIFACTS=art, BASELINE=baseline)


def test_recipe_certifies_compares_and_survives_a_missing_shard(tmp_path):
    # a correct adapter: conformant, and its merged report becomes the baseline
    res = _pipeline(tmp_path, "good", "reference", tmp_path / "no-baseline-yet")
    assert res.returncode == 0, res.stdout + res.stderr
    merged = tmp_path / "good-merge-job" / "merged"
    doc = json.loads((merged / "report.json").read_text())
    assert doc["conformant"] and doc["status"] == "complete"
    assert sorted(r["id"] for r in doc["invariants"]) == sorted(ONLY.split(","))
    for view in ("report.html", "summary.md", "junit.xml"):
        assert (merged / view).is_file()
    shutil.copytree(merged, tmp_path / "baseline")
    # a planted bug: both shard jobs stay green, the merge says NOT CONFORMANT and the
    # diff against the baseline names the regression
    res = _pipeline(tmp_path, "bad", PLANTED, tmp_path / "baseline")
    assert res.returncode == 1, res.stdout + res.stderr
    bad = tmp_path / "bad-merge-job" / "merged"
    assert not json.loads((bad / "report.json").read_text())["conformant"]
    assert "forward.reference" in (bad / "diff.md").read_text()
    # a shard job that never uploaded (crashed): the merge still runs and says partial (6);
    # against the baseline, the invariants it lost count as regressed (exit 1)
    res = _pipeline(tmp_path, "lost", "reference", tmp_path / "no-baseline-yet", shards=(1,))
    assert res.returncode == 6, res.stdout + res.stderr
    lost = json.loads((tmp_path / "lost-merge-job" / "merged" / "report.json").read_text())
    assert lost["status"] == "partial"
    res = _pipeline(tmp_path, "lost-vs-baseline", "reference", tmp_path / "baseline", shards=(1,))
    assert res.returncode == 1 and "REGRESSED" in res.stdout, res.stdout + res.stderr
