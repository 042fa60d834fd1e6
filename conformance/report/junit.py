"""``junit.xml``: the report as JUnit XML for CI test dashboards.

A reporter that only consumes the report document. One ``<testcase>`` per invariant
(classname ``convwitness.<adapter>``, name the invariant id, time its wall time):

* ``fail``                        -> ``<failure>`` (message: first line of the anatomy;
                                     text: the anatomy, the witness path, the replay command)
* ``error``, ``crash``, ``timeout`` -> ``<error>`` (with the adapter's traceback when there is one)
* ``internal`` (convwitness itself failed) -> ``<error type="internal">``
* ``not-applicable``, ``unavailable`` -> ``<skipped>`` with the reason
* ``info`` (a deviation on a property the adapter does not claim)
  -> ``<skipped>`` whose message says so, so it shows without failing the build.

So failures + errors are exactly the invariants that keep the run from certifying
(:attr:`Judgement.blocking`); the suite's properties carry the verdict line, the
scope and the not-applicable invariants with their reasons.

The output is built with :mod:`xml.etree.ElementTree` (which escapes markup);
characters that XML 1.0 cannot hold (most control characters) are written as
``\\xNN``. The document is parsed back before it is returned.
"""
from __future__ import annotations

import re
import xml.etree.ElementTree as ET

from .outputs import share_text
from .verdicts import AGAINST, judge, word

__all__ = ["render", "xml_safe"]

_ILLEGAL = re.compile("[\x00-\x08\x0b\x0c\x0e-\x1f\ud800-\udfff\ufffe\uffff]")


def xml_safe(value) -> str:
    """``value`` as a string XML 1.0 can hold."""
    return _ILLEGAL.sub(lambda m: f"\\x{ord(m.group()):02x}", str(value))


def _body(r: dict) -> str:
    parts = [r["message"] or f"verdict {r['verdict']}"]
    w = r["witness"]
    if w:
        parts.append(f"minimal case: {w['geometry']} ({w['kind']})")
        if w.get("path"):
            parts.append(f"witness: {w['path']}")
        if w.get("replay"):
            parts.append(f"replay: {w['replay']}")
    parts.append(f"worst share of bound: {share_text(r['worst_share'])} over {r['examples']} examples")
    if r["traceback"]:
        who = "convwitness traceback (a bug in convwitness)" if word(r) == "internal" else "adapter traceback"
        parts.append(f"{who}:\n" + r["traceback"])
    return "\n".join(parts)


def _first(r: dict) -> str:
    return r["message"].splitlines()[0] if r["message"] else f"verdict {r['verdict']}"


def render(doc: dict, report_dir: str | None = None) -> str:
    a = doc["adapter"]
    invs = doc["invariants"]
    j = judge(doc)
    n_fail = j.counts["fail"]
    n_err = sum(j.counts[w] for w in AGAINST + ("internal",) if w != "fail")
    n_skip = j.counts["not-applicable"] + j.counts["unavailable"] + j.counts["info"]
    total = f"{sum(r['duration_s'] for r in invs):.3f}"
    counts = {"tests": str(len(invs)), "failures": str(n_fail), "errors": str(n_err),
              "skipped": str(n_skip), "time": total}
    root = ET.Element("testsuites", {"name": "convwitness", **counts})
    suite = ET.SubElement(root, "testsuite", {"name": xml_safe(f"convwitness.{a['name']}"), **counts,
                                              "timestamp": xml_safe(doc["started"])})
    props = ET.SubElement(suite, "properties")
    for key, value in (("adapter", a["name"]), ("adapter.version", a["version"]),
                       ("adapter.source", a["source"]), ("profile", doc["profile"].get("name", "")),
                       ("seed", doc["seed"]), ("status", doc["status"]),
                       ("conformant", str(j.conformant).lower()), ("verdict", j.headline),
                       ("verdict.line", j.line(doc)), ("scope", j.scope_text()),
                       ("tool.version", doc["tool"]["version"])):
        ET.SubElement(props, "property", {"name": key, "value": xml_safe(value)})
    for i, why in j.not_applicable:
        ET.SubElement(props, "property", {"name": f"not-applicable.{xml_safe(i)}", "value": xml_safe(why)})
    if j.unclaimed:
        ET.SubElement(props, "property", {"name": "unclaimed", "value": xml_safe(j.unclaimed_text())})
    for r in invs:
        case = ET.SubElement(suite, "testcase", {"classname": xml_safe(f"convwitness.{a['name']}"),
                                                  "name": xml_safe(r["id"]),
                                                  "time": f"{r['duration_s']:.3f}"})
        v = word(r)
        if v in ("not-applicable", "unavailable"):
            ET.SubElement(case, "skipped", {"message": xml_safe(f"{v}: {r['reason']}")})
        elif v == "info":
            kind = r.get("deviation") or r["verdict"]
            el = ET.SubElement(case, "skipped", {"message": xml_safe(
                f"information only ({kind}; the adapter does not claim this property): {_first(r)}")})
            el.text = xml_safe(_body(r))
        elif v == "fail":
            el = ET.SubElement(case, "failure", {"message": xml_safe(_first(r)), "type": "fail"})
            el.text = xml_safe(_body(r))
        elif v in AGAINST or v == "internal":
            el = ET.SubElement(case, "error", {"message": xml_safe(_first(r)), "type": v})
            el.text = xml_safe(_body(r))
        if r["output"]:
            ET.SubElement(case, "system-out").text = xml_safe(r["output"])
    ET.indent(root)
    text = '<?xml version="1.0" encoding="UTF-8"?>\n' + ET.tostring(root, encoding="unicode") + "\n"
    ET.fromstring(text.encode("utf-8"))     # well-formed, or raise here rather than in CI
    return text
