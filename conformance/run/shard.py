"""Sharding a run across machines, and merging the shard reports.

``run --shard K/N`` runs a deterministic 1/N of the work; ``convwitness merge A.json
B.json ... -o merged.json`` joins the shard reports into one valid report.

The unit of sharding is the whole invariant. Its weight is the number of
(dtype x ndim) cells it covers for the adapter (the claimed dtypes and ndims, cut
down by the invariant's needs; 0 when it does not apply), and the invariants are
dealt to shards by longest-weight-first onto the least loaded shard. An invariant
is never split across shards by dtype or ndim: hypothesis searches the space of one
invariant as a whole, so a piece restricted to one dtype would draw other examples
and shrink to other witnesses than the unsharded run with the same seed. Kept whole,
each invariant runs exactly as it does unsharded, so the merged report has the
verdicts of the unsharded run for that seed.
"""
from __future__ import annotations

import json
import os
import re
from types import SimpleNamespace

from ..errors import ConvWitnessError

__all__ = ["parse_shard", "shard_filter", "assign", "merge_shards", "write_merged", "MergeError"]

_SHARD = re.compile(r"^\s*(\d+)\s*/\s*(\d+)\s*$")


class MergeError(ConvWitnessError):
    """Shard reports that cannot be joined into one report."""


def parse_shard(text: str) -> tuple[int, int]:
    """``"K/N"`` -> (K, N) with 1 <= K <= N; a one-line error otherwise."""
    m = _SHARD.match(str(text))
    if not m or not 1 <= int(m.group(1)) <= int(m.group(2)):
        raise ConvWitnessError(f"--shard {text!r}: expected K/N with 1 <= K <= N (for example "
                               "--shard 2/4 runs the second of four shards)")
    return int(m.group(1)), int(m.group(2))


def _weight(inv, refusal, caps) -> int:
    if refusal:
        return 0
    from ..geometry.formats import STORAGE_FORMATS
    needs = inv.needs_for(caps) if caps is not None else inv.needs
    dtypes = set(caps.dtypes) if caps is not None else set(STORAGE_FORMATS)
    ndims = set(caps.ndims) if caps is not None else {1, 2, 3}
    if needs.dtypes is not None:
        dtypes &= set(needs.dtypes)
    if needs.ndims is not None:
        ndims &= set(needs.ndims)
    return len(dtypes) * len(ndims)


def assign(chosen, n: int, caps=None) -> list[int]:
    """The shard (0-based) of each (invariant, refusal) pair, in the order given."""
    weights = [_weight(inv, refusal, caps) for inv, refusal in chosen]
    load, count = [0] * n, [0] * n
    out = [0] * len(chosen)
    for i in sorted(range(len(chosen)), key=lambda i: (-weights[i], i)):
        k = min(range(n), key=lambda k: (load[k], count[k], k))
        out[i] = k
        load[k] += weights[i]
        count[k] += 1
    return out


def shard_filter(text: str, capabilities=None):
    """A function keeping the (invariant, refusal) pairs of shard ``text`` ("K/N")."""
    k, n = parse_shard(text)

    def work(chosen):
        chosen = list(chosen)
        owner = assign(chosen, n, capabilities)
        return [pair for pair, o in zip(chosen, owner) if o == k - 1]
    return work


# -- merge -----------------------------------------------------------------------------
def _identity(doc: dict) -> dict:
    a = doc["adapter"]
    return {"adapter": a["name"], "adapter source": a["source"], "adapter version": a["version"],
            "capabilities": a["capabilities"], "tool version": doc["tool"]["version"],
            "profile": doc["profile"], "seed": doc["seed"],
            "library versions": doc["environment"]["libraries"]}


def _short(v) -> str:
    text = json.dumps(v, sort_keys=True) if not isinstance(v, str) else repr(v)
    return text if len(text) <= 60 else text[:57] + "..."


def _journal_missing(path: str, doc: dict) -> list[str]:
    """Invariants a shard planned but did not report (read from its journal, if kept)."""
    from .journal import NAME, JournalError, read
    folder = os.path.dirname(os.path.abspath(path))
    if not os.path.isfile(os.path.join(folder, NAME)):
        return []
    try:
        head, _ = read(folder)
    except JournalError:
        return []
    if head.get("shard") != doc.get("shard") or head.get("seed") != doc["seed"]:
        return []
    done = {r["id"] for r in doc["invariants"]}
    return [i for i in head.get("planned") or [] if i not in done]


def merge_shards(paths: list[str], out_path: str) -> tuple[dict, list[str]]:
    """Join shard reports; returns (merged report, warnings). Refuses mismatched shards."""
    from ..geometry.capabilities import Capabilities
    from ..invariants import catalogue
    from ..cases.profiles import Profile
    from ..report.document import build_report, load_report
    if len(paths) < 1:
        raise MergeError("merge: expected at least one shard report (A.json B.json ...)")
    docs = [load_report(p) for p in paths]
    first, ident = paths[0], _identity(docs[0])
    for p, d in zip(paths[1:], docs[1:]):
        other = _identity(d)
        for key in ident:
            if other[key] != ident[key]:
                raise MergeError(f"merge: shards disagree on {key}: {first} has {_short(ident[key])}, "
                                 f"{p} has {_short(other[key])}; merge only the shards of one run "
                                 "(same adapter, versions, profile and seed)")
    shards = [d.get("shard") for d in docs]
    warnings: list[str] = []
    if any(s is None for s in shards):
        if not all(s is None for s in shards):
            plain = paths[shards.index(None)]
            raise MergeError(f"merge: {plain} is not a shard report (it has no 'shard') but others "
                             "are; merge the shard reports of one `run --shard K/N` matrix")
        complete = all(d["status"] == "complete" for d in docs)
    else:
        parsed = [parse_shard(s) for s in shards]
        ns = {n for _, n in parsed}
        if len(ns) != 1:
            raise MergeError(f"merge: shards of different splits {sorted(ns)} (K/N with different N); "
                             "merge the shards of one matrix")
        n = ns.pop()
        seen: dict = {}
        for p, (k, _) in zip(paths, parsed):
            if k in seen:
                raise MergeError(f"merge: shard {k}/{n} given twice ({seen[k]} and {p}); give each shard once")
            seen[k] = p
        missing = [f"{k}/{n}" for k in range(1, n + 1) if k not in seen]
        if missing:
            warnings.append(f"shard(s) {', '.join(missing)} missing: the merged report is partial")
        complete = not missing
    owner: dict = {}
    results = []
    for p, d in zip(paths, docs):
        left = _journal_missing(p, d)
        if left:
            complete = False
            warnings.append(f"{p} was interrupted: its journal planned {', '.join(left)}, not in the report")
        for r in d["invariants"]:
            if r["id"] in owner:
                raise MergeError(f"merge: invariant {r['id']} is in both {owner[r['id']]} and {p}; "
                                 "shards of one run never overlap (were they run with different --only?)")
            owner[r["id"]] = p
            results.append(_rebase(r, p, out_path))
    order = {inv.id: i for i, inv in enumerate(catalogue())}
    results.sort(key=lambda r: order.get(r["id"], len(order)))
    base = docs[0]
    a = base["adapter"]
    adapter = SimpleNamespace(name=a["name"], version=a["version"], source=a["source"],
                              capabilities=Capabilities.from_dict(a["capabilities"]))
    prof = base["profile"]
    profile = Profile(**{**prof, "max_spatial": tuple(prof["max_spatial"])})
    import datetime as _dt
    started = min(_dt.datetime.fromisoformat(d["started"]).timestamp() for d in docs)
    doc = build_report(adapter, results, profile=profile, seed=base["seed"], started=started,
                       duration_s=max(d["duration_s"] for d in docs), shard=None,
                       status="complete" if complete else "partial")
    doc["tool"] = dict(base["tool"])
    doc["environment"] = dict(base["environment"])
    doc["profile"] = prof
    return doc, warnings


def _rebase(r: dict, shard_path: str, out_path: str) -> dict:
    """A result whose witness paths are relative to the merged report's folder."""
    w = r.get("witness")
    if not w:
        return r
    w = dict(w)
    src = os.path.dirname(os.path.abspath(shard_path))
    dst = os.path.dirname(os.path.abspath(out_path))
    for key in ("path", "arrays"):
        if w.get(key):
            w[key] = os.path.relpath(os.path.join(src, w[key]), dst)
    return {**r, "witness": w}


def write_merged(doc: dict, out_path: str) -> str:
    """Validate and write the merged report to ``out_path`` atomically."""
    from ..report.document import validate_report
    from ..report.outputs import write_text
    validate_report(doc)
    folder = os.path.dirname(os.path.abspath(out_path))
    os.makedirs(folder, exist_ok=True)
    return write_text(out_path, json.dumps(doc, indent=2) + "\n")
