"""The package's shape: no import cycle (module-level or inside functions), and no module
much over 400 lines (the project's own limit for readable modules: common practice, no
source). Checked by scripts/import_cycles.py and by counting lines."""
from __future__ import annotations

import os
import subprocess
import sys

REPO = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def test_no_import_cycle():
    out = subprocess.run([sys.executable, os.path.join(REPO, "scripts", "import_cycles.py"), REPO],
                         capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stdout + out.stderr
    assert "module-level imports: 0 cycle(s)" in out.stdout and "all imports: 0 cycle(s)" in out.stdout


def test_no_module_much_over_400_lines():
    long = []
    for base in ("conformance", "adapters"):
        for dp, _, fs in os.walk(os.path.join(REPO, base)):
            for f in fs:
                if f.endswith(".py"):
                    with open(os.path.join(dp, f), encoding="utf-8") as fh:
                        n = sum(1 for _ in fh)
                    if n > 420:
                        long.append((os.path.relpath(os.path.join(dp, f), REPO), n))
    assert not long, long
