"""The views of a report (HTML, Markdown, JUnit XML) and `convwitness diff`.

The systems under test are the report consumers; the runs they consume are real
runs of the demo port (reports/_demo/brindlemoss_port.py: release 0.3.0 correct, 0.3.1
with a planted grouped-bias bug) and of the built-in reference adapter.
"""
from __future__ import annotations

import copy
import io
import json
import os
import re
import xml.etree.ElementTree as ET
from html.parser import HTMLParser

import numpy as np
import pytest

from convwitness.cli.main import parse_args, run
from convwitness.report.document import load_report, validate_report

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
DEMO = os.path.join(ROOT, "reports", "_demo", "brindlemoss_port.py")
# the bias bug shows in these; forward.contract and forward.explicit_padding pass in both releases;
# forward.special_values is information only (the port does not claim IEEE special values)
ONLY = "forward.contract,forward.reference,forward.bias_shift,forward.group_split,forward.explicit_padding,forward.special_values"
BROKEN = {"forward.reference", "forward.bias_shift", "forward.group_split"}


def cli(*argv):
    out, err = io.StringIO(), io.StringIO()
    rc = run(parse_args(list(argv)), out, err)
    return rc, out.getvalue(), err.getvalue()


def _run(tmp, name, adapter, seed=0, only=ONLY):
    folder = os.path.join(tmp, name)
    rc, out, err = cli("run", "--adapter", adapter, "--only", only, "--seed", str(seed),
                       "--report", folder, "--quiet", "--isolation", "none")
    return rc, folder


@pytest.fixture(scope="module")
def reports(tmp_path_factory):
    tmp = str(tmp_path_factory.mktemp("views"))
    rc_good, good = _run(tmp, "good", f"{DEMO}:BrindlemossPort030")
    rc_bad, bad = _run(tmp, "bad", f"{DEMO}:BrindlemossPort")
    _, good2 = _run(tmp, "good2", f"{DEMO}:BrindlemossPort030")
    assert (rc_good, rc_bad) == (0, 1)
    return {"good": good, "bad": bad, "good2": good2}


def _doc(folder):
    return load_report(os.path.join(folder, "report.json"))


def test_views_are_written_beside_a_valid_report(reports):
    for folder in reports.values():
        validate_report(_doc(folder))
        for name in ("report.html", "summary.md", "junit.xml"):
            assert os.path.getsize(os.path.join(folder, name)) > 200, name


# -- JUnit XML -------------------------------------------------------------------------
def test_junit_xml_parses_with_one_testcase_per_invariant(reports):
    doc = _doc(reports["bad"])
    root = ET.parse(os.path.join(reports["bad"], "junit.xml")).getroot()
    # JUnit XML as CI servers read it: <testsuites><testsuite><testcase> with <failure>,
    # <error> or <skipped> children and counts as attributes (common practice, no source)
    assert root.tag == "testsuites"
    cases = root.findall("./testsuite/testcase")
    assert [c.get("name") for c in cases] == [r["id"] for r in doc["invariants"]]
    failed = {c.get("name") for c in cases if c.find("failure") is not None}
    assert failed == BROKEN
    by_id = {r["id"]: r for r in doc["invariants"]}
    for c in cases:
        f = c.find("failure")
        if f is not None:
            r = by_id[c.get("name")]
            assert r["message"] in f.text and r["witness"]["path"] in f.text
            assert f.get("message") == r["message"].splitlines()[0]
    special = next(c for c in cases if c.get("name") == "forward.special_values")
    assert special.find("skipped") is not None and "information only" in special.find("skipped").get("message")
    suite = root.find("testsuite")
    assert int(suite.get("tests")) == len(cases) and int(suite.get("failures")) == len(BROKEN)


def test_junit_xml_holds_control_characters_and_markup(reports):
    from convwitness.report.junit import render
    doc = copy.deepcopy(_doc(reports["bad"]))
    r = next(r for r in doc["invariants"] if r["id"] == "forward.reference")
    r["message"] = "bad \x1b[31mred\x1b[0m & <tag> ]]> \x00 end\nsecond line"
    r["output"] = "printed \x07 bell"
    text = render(doc)
    root = ET.fromstring(text.encode())       # XML 1.0 well-formedness (W3C XML 1.0 §2.2)
    f = root.find(".//testcase[@name='forward.reference']/failure")
    assert "<tag>" in f.text and "\\x1b" in f.text and "\\x00" in f.text


# -- HTML ------------------------------------------------------------------------------
class _Tags(HTMLParser):
    def __init__(self):
        super().__init__()
        self.tags, self.attrs, self.text = [], [], []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        self.attrs += [(tag, k, v or "") for k, v in attrs]

    def handle_data(self, data):
        self.text.append(data)


def _parse(text):
    p = _Tags()
    p.feed(text)
    return p


def test_html_is_self_contained_and_shows_every_part(reports):
    doc = _doc(reports["bad"])
    with open(os.path.join(reports["bad"], "report.html"), encoding="utf-8") as fh:
        page = fh.read()
    p = _parse(page)
    text = " ".join(p.text)
    assert "script" not in p.tags and "link" not in p.tags and "iframe" not in p.tags
    for tag, key, value in p.attrs:
        assert not key.startswith("on"), (tag, key)
        if key in ("src", "href"):
            assert value.startswith("#") or value.startswith("data:"), (tag, key, value)
    assert "NOT CONFORMANT" in text
    for r in doc["invariants"]:
        assert r["id"] in text and r["statement"] in text
    for r in doc["invariants"]:
        if r["verdict"] == "fail":
            assert r["witness"]["geometry"] in text and r["witness"]["replay"] in text
            for line in r["message"].splitlines():
                assert line in page.replace("&lt;", "<").replace("&gt;", ">").replace("&#x27;", "'")
    # one share chart per invariant that ran, one coverage card per feature
    ran = [r for r in doc["invariants"] if r["verdict"] not in ("not-applicable", "unavailable")]
    assert page.count('aria-label="share of the bound used per example"') == len(ran)
    assert page.count('aria-label="coverage of ') == len(doc["coverage"])


def test_html_prints_small_witness_arrays_from_the_npz(reports):
    from convwitness.cases.case import load_case
    from convwitness.report.html import witness_arrays
    doc = _doc(reports["bad"])
    r = next(r for r in doc["invariants"] if r["id"] == "forward.reference")
    case, _ = load_case(os.path.join(reports["bad"], r["witness"]["path"]))
    block = witness_arrays(r["witness"], reports["bad"], r["passes"])
    for name in ("x", "w", "b"):
        a = getattr(case, name)
        assert f"<b>{name}</b> · shape {tuple(a.shape)}" in block
        # every value of a small array is printed as numpy prints it with floatmode
        # "unique" (numpy.array2string: the fewest digits that give each value back, 1.0
        # as "1."), for float64 as for float32: read back, they are the array
        pre = block.split(f"<b>{name}</b>", 1)[1].split("<pre>", 1)[1].split("</pre>", 1)[0]
        shown = [float(t) for t in re.findall(r"[-+]?(?:\d+\.?\d*|\.\d+)(?:e[-+]?\d+)?|nan|inf", pre)]
        assert np.array_equal(np.asarray(shown, dtype=a.dtype), a.ravel()), (name, pre)
    assert "not beside this report" in witness_arrays(r["witness"], "/nonexistent", r["passes"])


def test_html_escapes_strings_from_adapters():
    from convwitness.report.html import render
    doc = _synthetic()
    page = render(doc)
    p = _parse(page)
    assert "script" not in p.tags and "img" not in p.tags
    assert all(not k.startswith("on") for _, k, _ in p.attrs)
    text = " ".join(p.text)
    assert "<script>document.title='pwned'</script>" in text
    assert "<img src=x onerror=alert(1)>" in text


def _synthetic():
    """A real report with adapter-controlled strings replaced by markup."""
    import tempfile
    with tempfile.TemporaryDirectory() as tmp:
        _rc, folder = _run(tmp, "x", f"{DEMO}:BrindlemossPort", only="forward.reference")
        doc = _doc(folder)
    doc["adapter"]["name"] = "<script>document.title='pwned'</script>"
    doc["adapter"]["version"] = "\"><svg onload=alert(1)>"
    r = doc["invariants"][0]
    r["message"] = "<img src=x onerror=alert(1)>"
    r["output"] = "</pre><script>alert(2)</script>"
    r["witness"]["replay"] = "convwitness replay '<b>x</b>'"
    validate_report(doc)
    return doc


# -- Markdown --------------------------------------------------------------------------
def test_markdown_summary_names_failures_and_replays(reports):
    doc = _doc(reports["bad"])
    with open(os.path.join(reports["bad"], "summary.md"), encoding="utf-8") as fh:
        md = fh.read()
    head = md.splitlines()[0]
    assert "NOT CONFORMANT" in head and "brindlemoss" in head
    for r in doc["invariants"]:
        if r["verdict"] == "fail":
            assert f"| `{r['id']}` |" in md and r["witness"]["replay"] in md
    assert len(md) < 20000        # sized for a pull-request comment
    good = open(os.path.join(reports["good"], "summary.md"), encoding="utf-8").read()
    assert "CONFORMANT" in good.splitlines()[0] and "NOT" not in good.splitlines()[0]


def test_markdown_escapes_table_breakers():
    from convwitness.report.markdown import md_code, md_text
    assert md_text("a|b<script>") == "a\\|b&lt;script&gt;"
    assert md_code("x`y") == "``x`y``"


# -- diff ------------------------------------------------------------------------------
def test_diff_of_passing_then_failing_exits_1_and_names_new_failures(reports):
    old, new = (os.path.join(reports[k], "report.json") for k in ("good", "bad"))
    rc, out, _ = cli("diff", old, new)
    assert rc == 1 and "REGRESSED" in out
    section = out.split("Newly failing")[1].split("\n\n")[0]
    assert {ln.split(":")[0].strip() for ln in section.splitlines()[1:]} == BROKEN
    rc, out, _ = cli("diff", old, new, "--format", "json")
    d = json.loads(out)
    assert {e["id"] for e in d["newly_failing"]} == BROKEN and d["regressed"]
    assert d["identity"]["adapter_version"] == {"old": "0.3.0-demo", "new": "0.3.1-demo"}


def test_diff_of_two_passing_reports_exits_0(reports):
    old, new = (os.path.join(reports[k], "report.json") for k in ("good", "good2"))
    for fmt in ("text", "markdown", "json"):
        rc, out, _ = cli("diff", old, new, "--format", fmt)
        assert rc == 0, out
    rc, out, _ = cli("diff", os.path.join(reports["bad"], "report.json"), old, "--format", "json")
    assert rc == 0 and {e["id"] for e in json.loads(out)["fixed"]} == BROKEN


def test_diff_flags_accuracy_drift_even_when_passing(reports):
    from convwitness.report.diff import diff_reports
    old = _doc(reports["good"])
    new = copy.deepcopy(old)
    r = next(r for r in new["invariants"] if r["id"] == "forward.reference")
    r["worst_share"] = float(r["worst_share"]) + 0.3
    d = diff_reports(old, new, drift=0.25)
    assert d["regressed"] and [e["id"] for e in d["drift"]] == ["forward.reference"]
    assert not diff_reports(old, new, drift=0.5)["regressed"]


def test_diff_matches_failures_by_fingerprint_not_message(reports):
    from convwitness.report.diff import diff_reports, fingerprint
    old = _doc(reports["bad"])
    new = copy.deepcopy(old)
    r = next(r for r in new["invariants"] if r["id"] == "forward.group_split")
    r["message"] = "entirely different words, 1.234e+99"
    d = diff_reports(old, new)
    e = next(e for e in d["still_failing"] if e["id"] == "forward.group_split")
    assert e["same_failure"] and not d["regressed"]
    spec = dict(r["witness"]["spec"])
    spec.update(input_size=[s + 3 for s in spec["input_size"]])       # same shape of geometry
    assert fingerprint({**r, "witness": {**r["witness"], "spec": spec}}) == fingerprint(r)
    spec.update(dtype="float32" if spec["dtype"] == "float64" else "float64")
    r["witness"] = {**r["witness"], "spec": spec}
    e = next(e for e in diff_reports(old, new)["still_failing"] if e["id"] == "forward.group_split")
    assert not e["same_failure"]


def test_diff_reports_coverage_library_and_scope_changes(reports):
    from convwitness.report.diff import diff_reports
    old = _doc(reports["good"])
    new = copy.deepcopy(old)
    new["environment"]["libraries"]["numpy"] = "0.0.1-other"
    new["coverage"]["dtype"] = {"float64": 3}
    gone = new["invariants"].pop(0)
    d = diff_reports(old, new)
    assert d["libraries"][0]["name"] == "numpy"
    assert "dtype=float32" in d["coverage"]["disappeared"]
    assert [e["id"] for e in d["no_longer_checked"]] == [gone["id"]] and d["regressed"]


def test_diff_refuses_a_file_that_is_not_a_report(tmp_path, reports):
    bad = tmp_path / "x.json"
    bad.write_text('{"format": "something-else"}')
    rc, _, err = cli("diff", str(bad), os.path.join(reports["good"], "report.json"))
    assert rc == 2 and len(err.strip().splitlines()) == 1 and "expected a report" in err
