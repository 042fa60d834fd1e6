"""scripts/library_findings.py: how it runs a finding and reads the outcome.

Only the script's own mechanics are tested (a real library's findings hold on some
machines and not on others, so no test depends on them). Outside source: POSIX
signals (a child killed by SIGSEGV has a negative return code in Python's subprocess).
"""
from __future__ import annotations

import importlib.util
import os
import sys
import textwrap

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def _script():
    spec = importlib.util.spec_from_file_location("library_findings",
                                                  os.path.join(ROOT, "scripts", "library_findings.py"))
    mod = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = mod            # dataclasses look their module up there
    spec.loader.exec_module(mod)
    return mod


def test_child_outcomes_are_read_as_printed_or_as_a_crash():
    f = _script()
    assert f.run_child('print("BUG 3 of 5")', None) == ("BUG", "3 of 5")
    assert f.run_child('print("OK")', "1") == ("OK", "")
    outcome, detail = f.run_child("import os, signal; os.kill(os.getpid(), signal.SIGSEGV)", None)
    assert outcome == "CRASH" and "-11" in detail
    assert f.run_child("raise SystemExit(3)", None)[0] == "ERROR"


def test_crash_findings_reproduce_only_on_a_crash():
    f = _script()
    crash = next(x for x in f.FINDINGS if x.kind == "crash")
    value = next(x for x in f.FINDINGS if x.kind == "value")
    assert f.reproduces(crash, "CRASH") and not f.reproduces(crash, "BUG")
    assert f.reproduces(value, "BUG") and not f.reproduces(value, "CRASH")


def test_every_finding_says_what_and_where_and_compiles():
    f = _script()
    ids = [x.id for x in f.FINDINGS]
    assert len(ids) == len(set(ids))
    for x in f.FINDINGS:
        assert x.claim and x.seen and x.status in ("current", "withdrawn", "unconfirmed"), x.id
        compile(textwrap.dedent(x.code), x.id, "exec")
    assert next(x for x in f.FINDINGS if x.id == "torch.bfloat16_conv3d").status == "withdrawn"


def test_unknown_finding_is_a_one_line_usage_error(capsys):
    f = _script()
    assert f.main(["no.such.finding"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "no.such.finding" in err[0] and "expected some of" in err[0]
