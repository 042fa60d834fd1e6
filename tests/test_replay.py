"""Replay from an artifact: a witness records its adapter and the directory the run
started in, so `convwitness replay WITNESS` works from anywhere; it prints the geometry
and the arrays; a witness the adapter does not claim checks nothing and says so.

Source: convwitness's own witness contract (run/witness.py), through the real CLI, on
a port whose fault is known by construction (tests/fixtures/faulty_adapters.py:WrongShape).
"""
from __future__ import annotations

import os
import shutil
import subprocess
import sys

REPO = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def _cw(args, cwd):
    return subprocess.run([sys.executable, "-m", "convwitness", *args], cwd=cwd,
                          capture_output=True, text=True, timeout=600)


def test_witness_replays_from_another_directory_without_adapter(tmp_path):
    report = tmp_path / "r"
    run = _cw(["run", "--adapter", "tests/fixtures/faulty_adapters.py:WrongShape", "--report",
               str(report), "--profile", "quick", "--only", "forward.contract", "--quiet"], REPO)
    assert run.returncode == 1, run.stderr
    witness = report / "witnesses" / "forward.contract.json"
    moved = tmp_path / "downloaded" / "forward.contract.json"      # an artifact elsewhere
    moved.parent.mkdir()
    shutil.copy(witness, moved)
    shutil.copy(witness.with_suffix(".npz"), moved.with_suffix(".npz"))
    out = _cw(["replay", str(moved)], tmp_path)
    assert out.returncode == 1, out.stdout + out.stderr
    assert "forward.contract on wrong-shape: fail" in out.stdout
    assert "conv" in out.stdout.splitlines()[0] and "seed" in out.stdout.splitlines()[0]
    assert any(line.strip().startswith("x ") and "shape (" in line for line in out.stdout.splitlines())


def test_replay_on_an_adapter_that_does_not_claim_it_checks_nothing(tmp_path):
    report = tmp_path / "r"
    _cw(["run", "--adapter", "tests/fixtures/faulty_adapters.py:WrongShape", "--report",
         str(report), "--profile", "quick", "--only", "forward.contract", "--quiet"], REPO)
    witness = report / "witnesses" / "forward.contract.json"
    # scipy claims no transposed pass, so transposed.contract does not apply to it
    out = _cw(["replay", str(witness), "--adapter", "scipy", "--invariant", "transposed.contract"],
              tmp_path)
    assert out.returncode == 2 and "nothing was checked" in out.stderr, out.stdout + out.stderr


def test_version_is_printed():
    out = _cw(["--version"], REPO)
    assert out.returncode == 0 and out.stdout.startswith("convwitness ")
