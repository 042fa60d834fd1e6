"""The conformance report: a model, its JSON form and its schema.

``report.json`` is validated against ``report.schema.json`` (JSON Schema draft
2020-12, shipped in the package) before it is written; a report that fails its
schema is never written silently.
"""
from __future__ import annotations

import datetime as _dt
import json
import os
import platform
import sys
from collections import Counter
from importlib import metadata

from ..errors import ConvWitnessError
from .verdicts import judge, word_of

__all__ = ["REPORT_FORMAT", "build_report", "validate_report", "write_report", "load_report",
           "report_path", "with_verdict", "schema", "library_versions", "environment",
           "ReportError"]

REPORT_FORMAT = "convwitness-report/1"
_LIBS = ("numpy", "hypothesis", "jsonschema", "torch", "jax", "jaxlib", "onnx", "onnxruntime",
         "scipy", "ml_dtypes")


class ReportError(ConvWitnessError):
    """A report that does not satisfy its schema, or a file that is not a report."""


def schema() -> dict:
    path = os.path.join(os.path.dirname(__file__), "report.schema.json")
    with open(path, encoding="utf-8") as fh:
        return json.load(fh)


def library_versions() -> dict:
    out = {}
    for name in _LIBS:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            continue
    return out


def environment(adapter=None) -> dict:
    """Where the run happened: Python, platform, library versions, the CPU (model and
    the instruction-set features numpy detects) and the build of the library under
    test (report/machine.py)."""
    from .machine import cpu_info, library_builds
    hints = (getattr(adapter, "name", ""), getattr(adapter, "source", "")) if adapter is not None else ()
    return {"python": sys.version.split()[0], "platform": platform.platform(),
            "libraries": library_versions(), "cpu": cpu_info(), "builds": library_builds(*hints)}


def _share(x: float):
    """Shares may be infinite (a structural failure); JSON gets the string 'inf'."""
    if x is None:
        return None
    if x == float("inf"):
        return "inf"
    return float(x)


def result_to_dict(r) -> dict:
    """The JSON form of one result; its ``verdict`` is the verdict word (``info`` for a
    deviation the adapter does not claim, whose raw verdict is kept in ``deviation``)."""
    if isinstance(r, dict):
        return r
    verdict = word_of(r.verdict, r.informational)
    extra = {"deviation": r.verdict} if verdict != r.verdict else {}
    return {
        "id": r.id, "statement": r.statement, "property": r.property, "passes": list(r.passes),
        "verdict": verdict, **extra, "informational": bool(r.informational),
        "examples": int(r.examples), "geometries": int(r.geometries),
        "skipped": int(r.skipped), "skip_reasons": list(r.skip_reasons),
        "worst_share": _share(r.worst_share), "worst_bound": r.worst_bound,
        "shares": [_share(s) for s in r.shares],
        "duration_s": round(float(r.duration_s), 6),
        "examples_per_s": round(float(r.examples_per_s), 3),
        "message": r.message, "reason": r.reason, "witness": r.witness,
        "traceback": r.traceback, "output": r.output, "coverage": dict(r.coverage),
        **({"same_cause_as": r.same_cause_as} if getattr(r, "same_cause_as", "") else {}),
        **({"further_causes": list(r.further)} if getattr(r, "further", None) else {}),
        **({"reach": r.reach} if getattr(r, "reach", None) else {}),
    }


def group_causes(invs):
    from ..run.causes import group_causes as group
    return group(invs)


def build_report(adapter, results, *, profile, seed, started: float, duration_s: float,
                 shard: str | None = None, status: str = "complete") -> dict:
    """The report document of a run (a dict ready for JSON)."""
    invs = [result_to_dict(r) for r in results]
    coverage: Counter = Counter()
    for r in invs:
        coverage.update(r["coverage"])
    cov = {}
    for key, n in sorted(coverage.items()):
        feat, _, value = key.partition("=")
        cov.setdefault(feat, {})[value] = n
    caps = adapter.capabilities
    doc = {
        "format": REPORT_FORMAT,
        "tool": {"name": "convwitness", "version": _tool_version()},
        "status": status,
        "conformant": False,
        "adapter": {"name": adapter.name, "version": adapter.version, "source": adapter.source,
                    "capabilities": caps.to_dict()},
        "environment": environment(adapter),
        "profile": profile.to_dict(),
        "seed": seed,
        "shard": shard,
        "started": _dt.datetime.fromtimestamp(started, _dt.timezone.utc).isoformat(),
        "duration_s": round(float(duration_s), 3),
        "summary": {},
        "invariants": invs,
        "causes": group_causes(invs),
        "coverage": cov,
        **_reach(invs),
        **({"signatures": len(adapter.signatures)} if getattr(adapter, "signatures", None) else {}),
    }
    return with_verdict(doc)


def with_verdict(doc: dict) -> dict:
    """Set ``summary``, ``conformant`` and ``verdict`` of ``doc`` from :func:`judge` (the
    one place the rule is applied); returns ``doc``."""
    j = judge(doc)
    doc["summary"] = dict(j.counts)
    doc["conformant"] = j.conformant
    doc["verdict"] = j.to_dict(doc)
    return doc


def _reach(invs: list) -> dict:
    from .reach import summarize
    reach = summarize(invs)
    return {"reach": reach} if reach else {}


def _tool_version() -> str:
    from .. import __version__
    return __version__


def validate_report(doc: dict) -> None:
    """Raise ReportError naming the first schema violation (path and reason)."""
    import jsonschema
    validator = jsonschema.Draft202012Validator(schema())
    errors = sorted(validator.iter_errors(doc), key=lambda e: list(e.absolute_path))
    if errors:
        e = errors[0]
        where = "/".join(str(p) for p in e.absolute_path) or "(top level)"
        raise ReportError(f"report fails its schema at {where}: {e.message} "
                          f"({len(errors)} violation(s) in all); this is a convwitness bug or a "
                          "hand-edited report — regenerate it with `convwitness run`")


def write_report(doc: dict, report_dir: str) -> str:
    """Validate, then write ``report_dir/report.json`` atomically; returns the path."""
    validate_report(doc)
    os.makedirs(report_dir, exist_ok=True)
    path = os.path.join(report_dir, "report.json")
    tmp = path + ".tmp"
    with open(tmp, "w", encoding="utf-8") as fh:
        json.dump(doc, fh, indent=2, sort_keys=False)
        fh.write("\n")
    os.replace(tmp, path)
    return path


def report_path(path: str) -> str:
    """``path`` itself, or ``path/report.json`` when ``path`` is a report folder."""
    if os.path.isdir(path):
        inside = os.path.join(path, "report.json")
        if not os.path.isfile(inside):
            raise ReportError(f"{path!r} is a folder without report.json; expected a report.json or "
                              "the folder `convwitness run --report DIR` wrote")
        return inside
    return path


def load_report(path: str) -> dict:
    """Read and validate a report.json, or the report.json of a report folder (a clear
    error for anything else)."""
    path = report_path(path)
    try:
        with open(path, encoding="utf-8") as fh:
            doc = json.load(fh)
    except FileNotFoundError:
        raise ReportError(f"report {path!r} does not exist; `convwitness run --report DIR` writes "
                          "DIR/report.json") from None
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise ReportError(f"report {path!r} is not valid JSON ({exc}); expected the report.json "
                          "that `convwitness run --report DIR` writes (a truncated file can be "
                          "rebuilt from its journal: `convwitness rebuild DIR`)") from None
    if not isinstance(doc, dict) or doc.get("format") != REPORT_FORMAT:
        got = doc.get("format") if isinstance(doc, dict) else type(doc).__name__
        raise ReportError(f"{path!r}: expected a report of format {REPORT_FORMAT!r}, got {got!r}; "
                          "give the report.json that `convwitness run --report DIR` writes")
    validate_report(doc)
    return doc
