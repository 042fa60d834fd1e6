"""``junit.xml``: the report as JUnit XML for CI test dashboards.

A reporter that only consumes the report document. One ``<testcase>`` per invariant
(classname ``convwitness.<adapter>``, name the invariant id, time its wall time):

* ``fail``                        -> ``<failure>`` (message: first line of the anatomy;
                                     text: the anatomy, the witness path, the replay command)
* ``error``, ``crash``, ``timeout`` -> ``<error>`` (with the adapter's traceback when there is one)
* ``not-applicable``, ``unavailable`` -> ``<skipped>`` with the reason
* a failure that is information only (the adapter does not claim the property)
  -> ``<skipped>`` whose message says so, so it shows without failing the build.

The output is built with :mod:`xml.etree.ElementTree` (which escapes markup);
characters that XML 1.0 cannot hold (most control characters) are written as
``\\xNN``. The document is parsed back before it is returned.
"""
from __future__ import annotations

import re
import xml.etree.ElementTree as ET

from .outputs import FAILING, share_text

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
        parts.append("adapter traceback:\n" + r["traceback"])
    return "\n".join(parts)


def _first(r: dict) -> str:
    return r["message"].splitlines()[0] if r["message"] else f"verdict {r['verdict']}"


def render(doc: dict, report_dir: str | None = None) -> str:
    a = doc["adapter"]
    invs = doc["invariants"]
    n_fail = sum(r["verdict"] == "fail" and not r["informational"] for r in invs)
    n_err = sum(r["verdict"] in ("error", "crash", "timeout") and not r["informational"] for r in invs)
    n_skip = sum(r["verdict"] in ("not-applicable", "unavailable") or
                 (r["verdict"] in FAILING and r["informational"]) for r in invs)
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
                       ("conformant", str(doc["conformant"]).lower()),
                       ("tool.version", doc["tool"]["version"])):
        ET.SubElement(props, "property", {"name": key, "value": xml_safe(value)})
    for r in invs:
        case = ET.SubElement(suite, "testcase", {"classname": xml_safe(f"convwitness.{a['name']}"),
                                                  "name": xml_safe(r["id"]),
                                                  "time": f"{r['duration_s']:.3f}"})
        v = r["verdict"]
        if v in ("not-applicable", "unavailable"):
            ET.SubElement(case, "skipped", {"message": xml_safe(f"{v}: {r['reason']}")})
        elif v in FAILING and r["informational"]:
            el = ET.SubElement(case, "skipped", {"message": xml_safe(
                f"information only ({v}; the adapter does not claim this property): {_first(r)}")})
            el.text = xml_safe(_body(r))
        elif v == "fail":
            el = ET.SubElement(case, "failure", {"message": xml_safe(_first(r)), "type": "fail"})
            el.text = xml_safe(_body(r))
        elif v in FAILING:
            el = ET.SubElement(case, "error", {"message": xml_safe(_first(r)), "type": v})
            el.text = xml_safe(_body(r))
        if r["output"]:
            ET.SubElement(case, "system-out").text = xml_safe(r["output"])
    ET.indent(root)
    text = '<?xml version="1.0" encoding="UTF-8"?>\n' + ET.tostring(root, encoding="unicode") + "\n"
    ET.fromstring(text.encode("utf-8"))     # well-formed, or raise here rather than in CI
    return text
