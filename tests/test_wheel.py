"""A plain (non-editable) wheel install is complete: every subpackage and the report
schema are in the wheel, and the installed command lists and runs invariants.

The editable install used for development hides a package missing from pyproject's
list (the failure mode: ``ModuleNotFoundError: convwitness.invariants`` from a wheel).
Packaging behaviour checked against setuptools' documented ``packages``/``package-dir``
and ``package-data`` options (common practice, no source beyond their docs).
"""
from __future__ import annotations

import json
import os
import subprocess
import sys
import sysconfig
import venv
import zipfile

import pytest

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


@pytest.fixture(scope="module")
def wheel(tmp_path_factory):
    out = tmp_path_factory.mktemp("wheel")
    done = subprocess.run([sys.executable, "-m", "pip", "wheel", "--no-deps", "-q", "-w", str(out), ROOT],
                          capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, done.stdout + done.stderr
    (path,) = out.glob("convwitness-*.whl")
    return path


def test_wheel_holds_every_subpackage_and_the_schema(wheel):
    names = set(zipfile.ZipFile(wheel).namelist())
    source_dirs = {os.path.relpath(d, os.path.join(ROOT, "conformance"))
                   for d, _, files in os.walk(os.path.join(ROOT, "conformance")) if "__init__.py" in files}
    for d in source_dirs:
        init = "convwitness/" + ("" if d == "." else d + "/") + "__init__.py"
        assert init in names, f"{init} missing from the wheel: list the subpackage in pyproject.toml"
    assert "convwitness/adapters/__init__.py" in names
    assert "convwitness/report/report.schema.json" in names


def test_installed_wheel_lists_and_runs_an_invariant(wheel, tmp_path):
    env_dir = tmp_path / "venv"
    venv.create(env_dir, with_pip=True)
    py = env_dir / "bin" / "python"
    done = subprocess.run([str(py), "-m", "pip", "install", "-q", "--no-deps", str(wheel)],
                          capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, done.stderr
    # the dependencies come from this interpreter's site-packages, added as a plain path:
    # a path added by a .pth file is not a site directory, so the editable install of the
    # checkout (a .pth-installed import hook there) cannot shadow the wheel
    purelib = subprocess.run([str(py), "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"],
                             capture_output=True, text=True, check=True).stdout.strip()
    with open(os.path.join(purelib, "outer_dependencies.pth"), "w") as fh:
        fh.write(sysconfig.get_paths()["purelib"] + "\n")
    where = subprocess.run([str(py), "-c", "import convwitness; print(convwitness.__file__)"],
                           capture_output=True, text=True, cwd=tmp_path, timeout=120)
    assert where.returncode == 0, where.stderr
    assert where.stdout.strip().startswith(str(env_dir)), f"imported {where.stdout.strip()}, not the wheel"
    cli = env_dir / "bin" / "convwitness"
    listing = subprocess.run([str(cli), "invariants"], capture_output=True, text=True, cwd=tmp_path, timeout=120)
    assert listing.returncode == 0, listing.stderr
    assert "forward.reference" in listing.stdout and "grad_weight.reference" in listing.stdout
    report = tmp_path / "report"
    ran = subprocess.run([str(cli), "run", "--adapter", "reference", "--only", "forward.reference",
                          "--report", str(report), "--quiet", "--isolation", "none"],
                         capture_output=True, text=True, cwd=tmp_path, timeout=600)
    assert ran.returncode == 0, ran.stdout + ran.stderr
    doc = json.loads((report / "report.json").read_text())
    verdicts = {r["id"]: r["verdict"] for r in doc["invariants"]}
    assert verdicts["forward.reference"] == "pass"
