#!/usr/bin/env python3
"""Regenerate everything under reports/ (never edit those files by hand).

    python scripts/regen_reports.py [--profile quick] [--seed 0] [--no-screenshot]

* ``reports/<adapter>/`` for each built-in adapter whose library is installed
  (reference, torch, jax, onnxruntime, onnx-reference, tensorflow, scipy) and for the Oxtervane OXT-16 demo port
  (``oxtervane-npu``, the README's default) and its planted tile-remainder sibling
  (``oxtervane-npu-tailbug``), the quantized kernels of onnxruntime and torch
  (``onnxruntime-convinteger``, ``onnxruntime-qlinearconv``, ``torch-quant``, and torch's
  transposed quantized conv under its default engine and under fbgemm) and the
  Oxtervane int8 demo port with its planted padding bug (``oxtervane-int8``,
  ``oxtervane-int8-padbug``): report.json, report.html, summary.md,
  junit.xml and any witnesses, written by ``convwitness run``. An adapter whose library
  is missing keeps its previous folder (the script says so).
* ``reports/_demo/brindlemoss-0.3.0/`` and ``reports/_demo/brindlemoss-0.3.1/``: the invented
  Brindlemoss BRM-9 port (``reports/_demo/brindlemoss_port.py``) before and after its planted
  grouped-bias bug, plus ``reports/_demo/diff-0.3.0-to-0.3.1.md`` (``convwitness diff``)
  and ``reports/_demo/brindlemoss-0.3.1/screenshot.png``, the failing report rendered by
  headless chromium.
* ``reports/README.md``: an index of the above.

Runs from the repository root so that the replay commands in the reports are paths
a reader can paste there.
"""
from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
REPORTS = os.path.join(ROOT, "reports")
BUILTINS = ("reference", "torch", "jax", "onnxruntime", "onnx-reference", "tensorflow", "scipy",
            "oxtervane-npu",
            "convwitness.adapters.oxtervane:OxtervaneNPUTailBug",
            "onnxruntime-convinteger", "onnxruntime-qlinearconv", "torch-quant",
            "torch-quant-transposed", "torch-quant-transposed-fbgemm",
            "oxtervane-int8", "oxtervane-int8-padbug")
DEMO = "reports/_demo/brindlemoss_port.py"
DEMOS = (("brindlemoss-0.3.0", f"{DEMO}:BrindlemossPort030"), ("brindlemoss-0.3.1", f"{DEMO}:BrindlemossPort"))
SCRATCH = (".hypothesis", "journal.jsonl")


def convwitness(*args) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "convwitness", *args], cwd=ROOT,
                          capture_output=True, text=True)


def available(adapter: str) -> str | None:
    """None when the adapter loads, else why not (one line)."""
    from convwitness import load_adapter
    from convwitness.errors import AdapterLoadError
    try:
        load_adapter(adapter)
    except AdapterLoadError as exc:
        return str(exc)
    return None


def regen_run(rel: str, adapter: str, profile: str, seed: int) -> dict | None:
    folder = os.path.join(ROOT, rel)
    why = available(adapter)
    if why:
        print(f"  {rel}: not regenerated, kept as it was ({why})")
        return None
    if os.path.isdir(folder):
        shutil.rmtree(folder)
    res = convwitness("run", "--adapter", adapter, "--profile", profile, "--seed", str(seed),
                      "--report", rel, "--quiet")
    if res.returncode not in (0, 1, 5):     # CONFORMANT, NOT CONFORMANT, NOTHING CERTIFIED
        raise SystemExit(f"regen: `convwitness run --adapter {adapter}` failed: {res.stderr.strip()}")
    for name in SCRATCH:
        path = os.path.join(folder, name)
        if os.path.isdir(path):
            shutil.rmtree(path)
        elif os.path.exists(path):
            os.remove(path)
    with open(os.path.join(folder, "report.json"), encoding="utf-8") as fh:
        doc = json.load(fh)
    from convwitness.report.verdicts import judge
    print(f"  {rel}: {judge(doc).headline} ({counts(doc)})")
    return doc


def folder_of(adapter: str) -> str:
    """reports/ folder of a built-in name or a module:Class sibling (its adapter name)."""
    if ":" not in adapter:
        return adapter
    from convwitness import load_adapter
    return load_adapter(adapter).name


def counts(doc: dict) -> str:
    """Verdict counts, as every view prints them (convwitness.report.verdicts.judge)."""
    from convwitness.report.verdicts import judge
    return judge(doc).counts_text()


def screenshot(html: str, png: str) -> bool:
    browser = shutil.which("chromium") or shutil.which("chromium-browser")
    if not browser:
        print("  screenshot: chromium not found (apt-get install -y chromium); kept the old one")
        return False
    profile = tempfile.mkdtemp(prefix="cw-chromium-")
    try:
        res = subprocess.run([browser, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
                              "--no-first-run", "--disable-background-networking",
                              "--disable-component-update", "--disable-sync",
                              f"--user-data-dir={profile}", f"--screenshot={png}",
                              "--window-size=1200,2000", "file://" + html],
                             capture_output=True, text=True, timeout=120)
    finally:
        shutil.rmtree(profile, ignore_errors=True)
    ok = res.returncode == 0 and os.path.isfile(png)
    print(f"  screenshot: {os.path.relpath(png, ROOT) if ok else 'failed: ' + res.stderr[-300:]}")
    return ok


def index(rows: list[tuple[str, dict]]) -> str:
    lines = ["# Sample reports", "",
             "Written by `python scripts/regen_reports.py` (profile quick, seed 0); never edited by hand.",
             "`oxtervane-npu` is the demo port (a CPU emulation of the invented Oxtervane Devices OXT-16",
             "NPU kernel); `oxtervane-npu-tailbug` is its sibling with a planted tile-remainder bug.",
             "The `_demo` port is another invented accelerator (Brindlemoss BRM-9) whose release 0.3.1",
             "has a planted grouped-bias bug: the nightly-regression example for `convwitness diff`.", "",
             "| report | adapter | verdict | invariants | views |", "|---|---|---|---|---|"]
    for rel, doc in rows:
        where = os.path.relpath(os.path.join(ROOT, rel), REPORTS)
        s = counts(doc)
        from convwitness.report.verdicts import judge
        head = judge(doc).headline.lower()
        verdict = head if head == "conformant" else f"**{head}**"
        lines.append(f"| `{where}` | {doc['adapter']['name']} {doc['adapter']['version']} | {verdict} | {s} | "
                     f"[html]({where}/report.html) · [md]({where}/summary.md) · [junit]({where}/junit.xml) |")
    lines += ["", "Regression diff of the demo releases: [_demo/diff-0.3.0-to-0.3.1.md](_demo/diff-0.3.0-to-0.3.1.md);",
              "screenshot of the failing report in headless chromium: "
              "[_demo/brindlemoss-0.3.1/screenshot.png](_demo/brindlemoss-0.3.1/screenshot.png).", ""]
    return "\n".join(lines)


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--profile", default="quick")
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--no-screenshot", action="store_true")
    args = p.parse_args(argv)
    os.makedirs(REPORTS, exist_ok=True)
    rows = []
    print("built-in adapters:")
    for adapter in BUILTINS:
        name = folder_of(adapter)
        doc = regen_run(f"reports/{name}", adapter, args.profile, args.seed)
        if doc is None and os.path.isfile(os.path.join(REPORTS, name, "report.json")):
            with open(os.path.join(REPORTS, name, "report.json"), encoding="utf-8") as fh:
                doc = json.load(fh)
        if doc is not None:
            rows.append((f"reports/{name}", doc))
    print("demo port:")
    for folder, adapter in DEMOS:
        doc = regen_run(f"reports/_demo/{folder}", adapter, args.profile, args.seed)
        if doc is None:
            raise SystemExit(f"regen: the demo adapter {adapter} did not load")
        rows.append((f"reports/_demo/{folder}", doc))
    old, new = (os.path.join("reports", "_demo", f, "report.json") for f, _ in DEMOS)
    res = convwitness("diff", old, new, "--format", "markdown")
    if res.returncode not in (0, 1, 5):     # CONFORMANT, NOT CONFORMANT, NOTHING CERTIFIED
        raise SystemExit(f"regen: convwitness diff failed: {res.stderr.strip()}")
    with open(os.path.join(REPORTS, "_demo", "diff-0.3.0-to-0.3.1.md"), "w", encoding="utf-8") as fh:
        fh.write(res.stdout)
    print(f"  diff: exit {res.returncode} ({'regressed' if res.returncode else 'no regression'})")
    if not args.no_screenshot:
        failing = os.path.join(REPORTS, "_demo", DEMOS[1][0])
        screenshot(os.path.join(failing, "report.html"), os.path.join(failing, "screenshot.png"))
    with open(os.path.join(REPORTS, "README.md"), "w", encoding="utf-8") as fh:
        fh.write(index(rows))
    return 0


if __name__ == "__main__":
    sys.exit(main())
