"""The Python API: ``convwitness.certify(adapter, ...)`` returns a :class:`Report`.

For notebooks and scripts. It runs the same certification as ``convwitness run``
(``run/certify.py``), writes the same report folder (report.json, report.html,
summary.md, junit.xml, witnesses/), and wraps the report document in an object::

    report = convwitness.certify("reference", profile="quick", only="forward.*")
    report.conformant, report.verdict, report.scope, report.results, report.witnesses
    report.raise_for_failures()            # in a test or a CI script

Imported lazily by ``convwitness`` (``import convwitness`` stays light).
"""
from __future__ import annotations

import html as _html
import json
import os
import tempfile
from dataclasses import dataclass

from .errors import ConvWitnessError

__all__ = ["certify", "Report", "Witness", "NotConformant"]

ISOLATIONS = ("process", "none")


class NotConformant(ConvWitnessError, AssertionError):
    """Raised by :meth:`Report.raise_for_failures` when the adapter is not conformant."""


@dataclass(frozen=True)
class Witness:
    """The minimal failing case of one invariant, saved in the report folder."""

    invariant: str
    verdict: str
    message: str
    geometry: str
    path: str | None            # the witness .json (absolute), None when not saved
    replay_command: str

    def load(self):
        """(Case, meta) read back from the files (``convwitness.load_case``)."""
        if not self.path:
            raise ConvWitnessError(f"the witness of {self.invariant} was not saved to files; "
                                   "certify with a report_dir to keep witnesses")
        from .cases.case import load_case
        return load_case(self.path)

    def replay(self, adapter=None, *, isolation: str = "none"):
        """Re-run the invariant on the witness without hypothesis: (verdict, message).
        ``adapter``: a spec string or an object; None replays on the recorded adapter."""
        from .run.witness import recorded_adapter, replay
        _case, meta = self.load()
        target = _load(adapter if adapter is not None else recorded_adapter(meta, self.path),
                       isolation, None)
        try:
            verdict, _ev, message, _meta = replay(self.path, target, self.invariant)
        finally:
            _close(target)
        return verdict, message


class Report:
    """A finished certification: the report document and the folder it was written to."""

    def __init__(self, document: dict, report_dir: str | None = None):
        self.document = document
        self.report_dir = report_dir

    # -- the verdict and its scope ----------------------------------------------------
    @property
    def conformant(self) -> bool:
        """True when every deciding invariant passed (or did not apply), at least one
        passed, and the run is complete."""
        return bool(self.document["conformant"])

    @property
    def verdict(self) -> str:
        """``CONFORMANT``, ``NOT CONFORMANT`` or ``PARTIAL`` (an interrupted run)."""
        from .report.outputs import headline
        return headline(self.document)

    @property
    def scope(self) -> dict:
        """What the verdict covers: the adapter and its claims, the profile and seed, the
        invariants that decided it and those that did not apply."""
        d = self.document
        results = d["invariants"]
        return {
            "adapter": d["adapter"]["name"], "version": d["adapter"]["version"],
            "claimed": d["adapter"]["capabilities"],
            "profile": d["profile"]["name"], "seed": d["seed"], "status": d["status"],
            "deciding": [r["id"] for r in results
                         if not r["informational"] and r["verdict"] not in ("not-applicable",)],
            "informational": [r["id"] for r in results if r["informational"]],
            "not_applicable": [r["id"] for r in results if r["verdict"] == "not-applicable"],
            "evidence": "every invariant held on every example drawn under the profile's budget, "
                        "for the geometries claimed; evidence, not proof",
        }

    @property
    def results(self) -> list[dict]:
        """One dict per invariant (the ``invariants`` of report.json)."""
        return self.document["invariants"]

    @property
    def failures(self) -> list[dict]:
        """The results that decide against conformance (fail, error, crash, timeout)."""
        from .report.outputs import is_failure
        return [r for r in self.results if is_failure(r)]

    @property
    def witnesses(self) -> list[Witness]:
        out = []
        for r in self.results:
            w = r.get("witness")
            if not w:
                continue
            path = w.get("path")
            if path and self.report_dir:
                path = os.path.abspath(os.path.join(self.report_dir, path))
            else:
                path = None
            out.append(Witness(invariant=r["id"], verdict=r["verdict"], message=r["message"] or "",
                               geometry=w.get("geometry", ""), path=path,
                               replay_command=w.get("replay", "")))
        return out

    def summary(self) -> dict:
        """Counts of verdicts (``summary`` of report.json)."""
        return dict(self.document["summary"])

    # -- outputs ----------------------------------------------------------------------
    def to_json(self, indent: int | None = 2) -> str:
        """report.json's text (the document validated against the report schema)."""
        return json.dumps(self.document, indent=indent)

    def to_html(self) -> str:
        """report.html's text: one self-contained page."""
        from .report.html import render
        return render(self.document, self.report_dir)

    def _repr_html_(self) -> str:
        # the page is self-contained with its own styles: shown in an iframe so that its
        # styles and the notebook's do not mix
        page = _html.escape(self.to_html(), quote=True)
        return (f'<iframe srcdoc="{page}" title="convwitness report" '
                'style="width:100%;height:640px;border:1px solid #ccc" sandbox></iframe>')

    def raise_for_failures(self) -> "Report":
        """Raise :class:`NotConformant` (an AssertionError) naming what failed, with the
        witness files; return the report unchanged when it is conformant."""
        if self.conformant:
            return self
        failed = self.failures
        if failed:
            parts = []
            for r in failed:
                w = r.get("witness") or {}
                where = (f" (witness {os.path.join(self.report_dir, w['path'])})"
                         if w.get("path") and self.report_dir else "")
                parts.append(f"{r['id']}: {r['verdict']}{where}")
            raise NotConformant(f"{self.document['adapter']['name']} is not conformant: "
                                f"{len(failed)} invariant(s) failed: " + "; ".join(parts))
        if self.document["status"] != "complete":
            raise NotConformant(f"{self.document['adapter']['name']}: the run is "
                                f"{self.document['status']} (interrupted), so no verdict; rerun it")
        raise NotConformant(f"{self.document['adapter']['name']}: no invariant applied and passed "
                            "(check `only` and the adapter's capabilities)")

    def __repr__(self) -> str:
        d = self.document
        s = d["summary"]
        counts = ", ".join(f"{n} {v}" for v, n in s.items() if n)
        where = f" in {self.report_dir}" if self.report_dir else ""
        return (f"<convwitness Report {d['adapter']['name']} {d['adapter']['version']}: "
                f"{self.verdict} ({counts}){where}>")


def certify(adapter, profile="quick", only=None, seed=0, isolation="process",
            report_dir: str | None = None, cluster: str | None = None) -> Report:
    """Certify ``adapter`` and return its :class:`Report`.

    ``adapter``: a spec string as ``--adapter`` takes it (a built-in name,
    ``pkg.module:attr``, ``path/file.py:attr``, ``exec:COMMAND``) or an adapter object
    (or a forward function). ``profile``: quick, standard or nightly. ``only``: invariant
    ids or patterns (a comma-separated string or a list). ``isolation``: ``"process"``
    runs every call in a worker process (spec strings only: an object lives in this
    process) or ``"none"``. ``report_dir``: where the report folder is written; None
    writes it to a new temporary folder (``Report.report_dir``), which is kept so the
    witnesses can be replayed. ``cluster``: a Dask scheduler address or ``"local:N"``, as
    ``run --cluster`` takes it (spec strings only: every worker loads the adapter itself;
    docs/cluster.md).
    """
    from .cases.profiles import get_profile
    from .report.outputs import write_views
    from .run.certify import certify as run_certify
    prof = get_profile(profile)
    if only is not None and not isinstance(only, str):
        only = ",".join(only)
    if report_dir is None:
        report_dir = tempfile.mkdtemp(prefix="convwitness-report-")
    if cluster is not None:
        if not isinstance(adapter, str):
            raise ConvWitnessError("certify: cluster= needs an adapter spec string (each worker loads "
                                   f"the adapter itself), got {type(adapter).__name__}; pass e.g. "
                                   "'pkg.module:MyConv'")
        from .run.cluster import certify_on_cluster
        opts = {"isolation": isolation, "call_timeout": prof.call_timeout, "memory_limit": None,
                "first_call_allowance": 2.0}
        doc, results = certify_on_cluster(adapter, cluster, load_opts=opts, profile=prof, only=only,
                                          seed=seed, report_dir=report_dir)
    else:
        target = _load(adapter, isolation, prof.call_timeout)
        try:
            doc, results = run_certify(target, profile=prof, only=only, seed=seed,
                                       report_dir=report_dir)
        finally:
            _close(target)
    if not results:
        raise ConvWitnessError(f"certify: no invariant matched only={only!r}; "
                               "`convwitness invariants` lists the ids")
    write_views(doc, report_dir)
    return Report(doc, report_dir)


def _load(adapter, isolation: str, call_timeout):
    from .boundary.contract import Adapter, wrap
    if isolation not in ISOLATIONS:
        raise ConvWitnessError(f"certify: isolation={isolation!r}; expected one of "
                               f"{', '.join(map(repr, ISOLATIONS))}")
    if isinstance(adapter, str):
        from .boundary.isolation.client import load_isolated
        return load_isolated(adapter, isolation=isolation, call_timeout=call_timeout)
    if isolation == "process" and not isinstance(adapter, Adapter):
        raise ConvWitnessError(
            f"certify: isolation='process' needs an adapter spec string (a worker process "
            f"imports it), got a {type(adapter).__name__} object; fix: pass isolation='none', "
            "or a spec such as 'my_pkg.conv:MyConv' or 'path/to/file.py:MyConv'")
    return wrap(adapter)


def _close(adapter) -> None:
    close = getattr(adapter, "close", None)
    if callable(close):
        close()
