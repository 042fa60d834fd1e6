"""The views of a report: ``report.html``, ``summary.md`` and ``junit.xml``.

Each view only consumes the report document (the dict that ``report.json`` holds);
none of them runs an invariant or loads an adapter. :func:`write_views` writes all
three beside ``report.json``; the helpers here are what the views share (how a share of
the bound is printed, atomic writes). Verdict words, counts and the conformance rule
come from :mod:`convwitness.report.verdicts`, the one place they are computed.
"""
from __future__ import annotations

import os

__all__ = ["write_views", "VIEWS", "FAILING", "headline", "label", "share_text", "is_failure",
           "write_text"]

from .verdicts import AGAINST as FAILING, judge, label, share_text, word

#: file name -> module that renders it (each has ``render(doc, report_dir) -> str``)
VIEWS = {"report.html": "html", "summary.md": "markdown", "junit.xml": "junit"}


def is_failure(r: dict) -> bool:
    """A failing result that decides conformance (information-only deviations do not)."""
    return word(r) in FAILING


def headline(doc: dict) -> str:
    """CONFORMANT, NOT CONFORMANT, INTERNAL ERROR, NOTHING CERTIFIED or PARTIAL
    (:func:`convwitness.report.verdicts.judge`)."""
    return judge(doc).headline


def write_text(path: str, text: str) -> str:
    """Write ``text`` to ``path`` atomically (a reader never sees half a file)."""
    tmp = path + ".tmp"
    with open(tmp, "w", encoding="utf-8", newline="\n") as fh:
        fh.write(text)
    os.replace(tmp, path)
    return path


def write_views(doc: dict, report_dir: str, names=None) -> dict:
    """Write the views of ``doc`` into ``report_dir``; returns {file name: path}.

    ``names`` restricts the files written (default: all of :data:`VIEWS`).
    """
    import importlib
    os.makedirs(report_dir, exist_ok=True)
    out = {}
    for name, module in VIEWS.items():
        if names is not None and name not in names:
            continue
        render = importlib.import_module(f"{__package__}.{module}").render
        out[name] = write_text(os.path.join(report_dir, name), render(doc, report_dir))
    return out
