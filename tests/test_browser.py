"""report.html in a real browser: Debian's headless chromium.

A failing run of an adapter whose name is a script tag is rendered to a
screenshot and to its DOM (``--dump-dom``, the document after load). The DOM must
show the verdict, every invariant and the witness, and no script may have run: the
title stays ours and no <script> element exists. A control page with a real inline
script proves that the check would see a script that ran.
"""
from __future__ import annotations

import io
import os
import shutil
import struct
import subprocess
import tempfile
from html.parser import HTMLParser

import pytest

from convwitness.cli.main import parse_args, run

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
DEMO = os.path.join(ROOT, "reports", "_demo", "brindlemoss_port.py")
EVIL = "<script>document.title='pwned'</script>"
ONLY = "forward.contract,forward.reference,forward.group_split,forward.layout_agreement"   # layout: n/a


def _chromium():
    for name in ("chromium", "chromium-browser"):
        path = shutil.which(name)
        if path:
            return path
    pytest.skip("chromium not found on PATH: install Debian's chromium (`apt-get install -y "
                "chromium`, as .ci/run does) to run the browser test")


def browse(page: str, *extra: str, size=(1200, 2000)) -> subprocess.CompletedProcess:
    profile = tempfile.mkdtemp(prefix="cw-chromium-")
    try:
        return subprocess.run(
            [_chromium(), "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
             "--no-first-run", "--disable-background-networking", "--disable-component-update",
             "--disable-sync", f"--user-data-dir={profile}", f"--window-size={size[0]},{size[1]}",
             *extra, "file://" + os.path.abspath(page)],
            capture_output=True, text=True, timeout=120)
    finally:
        shutil.rmtree(profile, ignore_errors=True)


class _Dom(HTMLParser):
    """Elements of the dumped DOM: tag stack, text per class, title."""

    def __init__(self):
        super().__init__()
        self.tags, self.stack, self.title, self.by_class, self.by_id = [], [], "", {}, {}

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        self.tags.append(tag)
        if tag not in ("meta", "br", "line", "rect", "link", "img"):
            self.stack.append((tag, (a.get("class") or "").split(), a.get("id")))

    def handle_endtag(self, tag):
        names = [t for t, _, _ in self.stack]
        if tag in names:                     # close up to the innermost open element of that name
            del self.stack[len(names) - 1 - names[::-1].index(tag):]

    def handle_data(self, data):
        tags = [t for t, _, _ in self.stack]
        if tags[-2:] == ["head", "title"]:
            self.title += data
        for tag, classes, ident in self.stack:
            for c in classes:
                self.by_class.setdefault(c, []).append(data)
            if ident:
                self.by_id.setdefault(ident, []).append(data)


def dom(text: str) -> _Dom:
    d = _Dom()
    d.feed(text)
    return d


@pytest.fixture(scope="module")
def failing_report(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("browser")
    port = tmp / "evil_port.py"
    port.write_text("import importlib.util\n"
                    f"spec = importlib.util.spec_from_file_location('brindlemoss_demo', {DEMO!r})\n"
                    "mod = importlib.util.module_from_spec(spec)\nspec.loader.exec_module(mod)\n\n\n"
                    "class EvilPort(mod.BrindlemossPort):\n"
                    f"    name = {EVIL!r}\n")
    folder = str(tmp / "report")
    rc = run(parse_args(["run", "--adapter", f"{port}:EvilPort", "--only", ONLY, "--report", folder,
                         "--quiet", "--isolation", "none"]), io.StringIO(), io.StringIO())
    assert rc == 1
    from convwitness.report.document import load_report
    return folder, load_report(os.path.join(folder, "report.json"))


def test_browser_shows_verdict_invariants_and_witness_and_runs_no_script(failing_report):
    folder, doc = failing_report
    page = os.path.join(folder, "report.html")
    res = browse(page, "--dump-dom")
    assert res.returncode == 0, res.stderr[-2000:]
    d = dom(res.stdout)
    assert "script" not in d.tags
    # the title is the one the page set, with the adapter's name in it as text
    assert d.title == f"convwitness · {EVIL} 0.3.1-demo · NOT CONFORMANT"
    assert " ".join(d.by_class["verdict"]).strip() == "NOT CONFORMANT"
    for r in doc["invariants"]:          # each invariant has its own element, showing its id
        anchor = "inv-" + "".join(c if c.isalnum() or c in "-_." else "_" for c in r["id"])
        assert r["id"] in " ".join(d.by_id[anchor]), r["id"]
        assert r["statement"] in " ".join(d.by_id[anchor])
    failing = [r for r in doc["invariants"] if r["verdict"] == "fail"]
    assert failing
    witness = " ".join(d.by_class["witness"])
    for r in failing:
        assert r["witness"]["geometry"] in witness and r["witness"]["replay"] in witness
        assert r["message"].splitlines()[-1].strip() in witness


def test_browser_screenshot_of_a_failing_report(failing_report, tmp_path):
    folder, _ = failing_report
    shot = tmp_path / "shot.png"
    res = browse(os.path.join(folder, "report.html"), f"--screenshot={shot}")
    assert res.returncode == 0, res.stderr[-2000:]
    data = shot.read_bytes()
    # PNG signature and IHDR width/height, big-endian (PNG specification, ISO/IEC 15948 §5.2, §11.2.2)
    assert data[:8] == b"\x89PNG\r\n\x1a\n" and data[12:16] == b"IHDR"
    assert struct.unpack(">II", data[16:24]) == (1200, 2000)
    assert len(data) > 50_000            # a rendered page, not a blank image


def test_control_page_shows_that_a_running_script_would_be_seen(tmp_path):
    page = tmp_path / "control.html"
    page.write_text(f"<!DOCTYPE html><html><head><title>ours</title></head><body>{EVIL}</body></html>")
    d = dom(browse(str(page), "--dump-dom").stdout)
    assert d.title == "pwned"
