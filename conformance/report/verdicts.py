"""The verdict words, the conformance rule and the counts: one function for every view.

:func:`judge` reads a report document (the dict ``report.json`` holds, old or new) and
returns a :class:`Judgement`: the count of every verdict word, the invariants that keep
the run from certifying the adapter, the outcome with its headline and exit code, and
the scope of the certificate. The terminal, ``report.json`` (its ``summary``,
``conformant`` and ``verdict``), ``summary.md``, ``junit.xml``, ``report.html``, the
index of ``reports/``, ``merge`` and ``diff`` all read it; none computes a count or the
rule itself.
"""
from __future__ import annotations

from dataclasses import dataclass, field

__all__ = ["WORDS", "OUTCOMES", "AGAINST", "Judgement", "judge", "word", "word_of", "label",
           "worst_text", "scope_of"]

#: verdict word of one invariant -> what it means (the order of every count)
WORDS = {
    "pass": "every checked example held the property",
    "fail": "an example broke the property: the adapter's result is wrong",
    "error": "the adapter raised an exception on a case it claims",
    "crash": "the adapter's process died",
    "timeout": "an adapter call ran past its time limit",
    "internal": "convwitness itself failed: a bug in convwitness, never blamed on the adapter",
    "info": "a deviation on a property the adapter does not claim: information only, never decides",
    "not-applicable": "nothing was checked: the claims exclude it, or every example skipped",
    "unavailable": "the library under test is not installed",
}

#: words that decide against conformance
AGAINST = ("fail", "error", "crash", "timeout")

#: outcome of a run -> (headline, exit code of `convwitness run`)
OUTCOMES = {
    "conformant": ("CONFORMANT", 0),
    "not-conformant": ("NOT CONFORMANT", 1),
    "internal": ("INTERNAL ERROR", 4),
    "nothing-certified": ("NOTHING CERTIFIED", 5),
    "partial": ("PARTIAL", 6),
}

_LABEL = {"not-applicable": "not applicable", "info": "information only"}
_NOT_CHECKED = ("not-applicable", "unavailable")


def word_of(verdict: str, informational: bool) -> str:
    """The verdict word of a raw verdict (a deviation the adapter does not claim is ``info``)."""
    return "info" if verdict in AGAINST and informational else verdict


def word(r: dict) -> str:
    """The verdict word of one invariant result of a report (old reports included)."""
    return word_of(r["verdict"], bool(r.get("informational")))


def label(r: dict) -> str:
    """The verdict word of one result for people."""
    w = word(r)
    return _LABEL.get(w, w)


def share_text(v) -> str:
    """A share of the bound (error/bound) as people read it."""
    if v is None:
        return "-"
    if v == "inf" or float(v) >= 1e300:      # the runner stores inf as 1e300 in per-example lists
        return "inf"
    v = float(v)
    if v == 0:
        return "0"
    if v >= 1e4:
        return f"{v:.2e}"
    return f"{v:.3g}"


def worst_text(r: dict) -> str:
    """The worst share of the bound of one result; "–" where nothing was checked."""
    if word(r) in _NOT_CHECKED or not r.get("examples"):
        return "–"
    return share_text(r["worst_share"])


def scope_of(doc: dict) -> dict:
    """What the certificate covers: the passes, dtypes, ndims and layouts of the examples
    actually checked, the profile and the seed."""
    passes, dtypes, ndims, layouts = set(), set(), set(), set()
    for r in doc["invariants"]:
        if word(r) in _NOT_CHECKED or not r.get("examples"):
            continue
        passes.update(r["passes"])
        for key, n in (r.get("coverage") or {}).items():
            feat, _, value = key.partition("=")
            if not n:
                continue
            if feat == "dtype":
                dtypes.add(value)
            elif feat == "ndim":
                ndims.add(int(value))
            elif feat == "layout":
                layouts.add(value)
    order = ("forward", "backward", "transposed", "quantized")
    return {"passes": sorted(passes, key=lambda p: order.index(p) if p in order else 9),
            "dtypes": sorted(dtypes), "ndims": sorted(ndims), "layouts": sorted(layouts),
            "profile": (doc.get("profile") or {}).get("name", "?"), "seed": doc.get("seed")}


@dataclass(frozen=True)
class Judgement:
    """The counts and the conformance rule applied to one report."""

    outcome: str
    counts: dict
    against: list
    internal: list
    info: list
    not_applicable: list          # [(id, reason)]
    unclaimed: list               # passes implemented, not claimed: untested
    scope: dict
    skipped: dict = field(default_factory=dict)   # id -> (skipped, commonest reason)

    @property
    def headline(self) -> str:
        return OUTCOMES[self.outcome][0]

    @property
    def exit_code(self) -> int:
        return OUTCOMES[self.outcome][1]

    @property
    def conformant(self) -> bool:
        return self.outcome == "conformant"

    @property
    def blocking(self) -> list:
        """Invariants that keep the run from certifying: against conformance, or internal."""
        return self.against + self.internal

    def counts_text(self) -> str:
        """``3 pass, 1 information only, 2 not applicable`` (nonzero counts, word order)."""
        parts = [f"{n} {_LABEL.get(w, w)}" for w, n in self.counts.items() if n]
        return ", ".join(parts) or "no invariant"

    def scope_text(self) -> str:
        s = self.scope
        if not s["passes"]:
            return (f"nothing checked (profile {s['profile']}, seed {s['seed']})")
        dims = ", ".join(f"{n}-D" for n in s["ndims"]) or "?"
        return (f"{', '.join(s['passes'])} × {', '.join(s['dtypes']) or '?'} × {dims} × "
                f"{', '.join(s['layouts']) or '?'} (profile {s['profile']}, seed {s['seed']})")

    def unclaimed_text(self) -> str:
        return "; ".join(f"{p} implemented, not claimed: untested" for p in self.unclaimed)

    def line(self, doc: dict) -> str:
        """The verdict line every view prints: headline, adapter, counts, scope."""
        a = doc["adapter"]
        causes = [c for c in doc.get("causes") or () if c.get("verdict") in AGAINST]
        why = (f" ({len(causes)} cause{'s' if len(causes) != 1 else ''}, see causes)"
               if self.against and causes else "")
        out = (f"{self.headline} — {a['name']} {a['version']}".rstrip() + f": {self.counts_text()}"
               f"{why}; covers {self.scope_text()}")
        if self.unclaimed:
            out += f"; {self.unclaimed_text()}"
        return out

    def not_applicable_lines(self) -> list:
        return [f"{i}: {why}" for i, why in self.not_applicable]

    def to_dict(self, doc: dict) -> dict:
        """The ``verdict`` object of report.json."""
        return {"outcome": self.outcome, "headline": self.headline, "exit_code": self.exit_code,
                "line": self.line(doc), "scope": dict(self.scope),
                "against": list(self.against), "internal": list(self.internal),
                "not_applicable": [{"id": i, "reason": why} for i, why in self.not_applicable],
                "unclaimed_passes": list(self.unclaimed)}


def judge(doc: dict) -> Judgement:
    """The counts and the conformance rule of a report.

    The rule: a run is CONFORMANT when it is complete, no invariant that decides went
    against the adapter (fail, error, crash, timeout), convwitness had no internal error,
    and at least one invariant was checked and passed. Otherwise, in this order: NOT
    CONFORMANT (something went against the adapter, even in a partial run), INTERNAL
    ERROR, PARTIAL (an interrupted run, one shard, or an incomplete merge), NOTHING
    CERTIFIED (complete, but nothing applicable was checked).
    """
    invs = doc["invariants"]
    counts = {w: 0 for w in WORDS}
    for r in invs:
        counts[word(r)] = counts.get(word(r), 0) + 1
    against = [r["id"] for r in invs if word(r) in AGAINST]
    internal = [r["id"] for r in invs if word(r) == "internal"]
    info = [r["id"] for r in invs if word(r) == "info"]
    na = [(r["id"], r.get("reason") or word(r)) for r in invs if word(r) in _NOT_CHECKED]
    passed = [r for r in invs if word(r) == "pass"]
    if against:
        outcome = "not-conformant"
    elif internal:
        outcome = "internal"
    elif doc.get("status", "complete") != "complete":
        outcome = "partial"
    elif not passed:
        outcome = "nothing-certified"
    else:
        outcome = "conformant"
    caps = (doc.get("adapter") or {}).get("capabilities") or {}
    skipped = {r["id"]: (r["skipped"], r["skip_reasons"][0]["reason"] if r.get("skip_reasons") else "")
               for r in invs if r.get("skipped")}
    return Judgement(outcome=outcome, counts=counts, against=against, internal=internal, info=info,
                     not_applicable=na, unclaimed=list(caps.get("unclaimed_passes") or []),
                     scope=scope_of(doc), skipped=skipped)
