"""Witnesses: the minimal failing case of an invariant, saved and replayed.

A witness is ``witnesses/<invariant id>.npz`` + ``.json`` inside the report folder.
The JSON holds the spec, the value kind and seed (auxiliary data of an invariant is
derived from that seed, so a replay needs nothing but these two files), the
invariant, the verdict and message, and the command that replays it.
"""
from __future__ import annotations

import os
import shlex

from ..cases.case import load_case
from ..errors import (AdapterCrashed, AdapterOutputError, AdapterRaised, AdapterTimeout,
                     CaseFileError)
from ..invariants.evidence import Evidence

__all__ = ["write_witness", "replay"]


def write_witness(case, *, invariant: str, verdict: str, message: str, report_dir: str,
                  seed, adapter_source: str, replay_hint: str = "", name: str | None = None) -> dict:
    folder = os.path.join(report_dir, "witnesses")
    base = os.path.join(folder, name or invariant)
    npz, meta = case.save(base, invariant=invariant, verdict=verdict, message=message,
                          run_seed=seed, adapter=adapter_source, run_dir=os.getcwd())
    rel = os.path.relpath(meta)
    # the witness records its adapter: no --adapter needed (give one to replay elsewhere)
    command = f"convwitness replay {shlex.quote(rel)}"
    if not adapter_source:
        command += " --adapter ADAPTER"
    if replay_hint:
        command += f" {replay_hint}"
    return {"path": os.path.relpath(meta, report_dir), "arrays": os.path.relpath(npz, report_dir),
            "spec": case.spec.to_dict(), "geometry": case.spec.describe(), "kind": case.kind,
            "replay": command}


def recorded_adapter(meta: dict, witness_path: str) -> str:
    """The adapter spec a witness was found with, made to work from here: a file path
    that does not exist relative to this directory is tried relative to the directory
    the run started in (recorded as ``run_dir``)."""
    spec = meta.get("adapter")
    if not spec:
        raise CaseFileError(f"witness {witness_path!r} records no adapter; pass --adapter SPEC")
    if spec.startswith("exec:") or ".py:" not in spec:
        return spec
    file, _, attr = spec.rpartition(":")
    run_dir = meta.get("run_dir")
    if not os.path.isfile(file) and run_dir and os.path.isfile(os.path.join(run_dir, file)):
        return f"{os.path.join(run_dir, file)}:{attr}"
    return spec


def describe_arrays(case) -> list[str]:
    """One line per array of a case: name, shape, dtype, and its range."""
    import numpy as np
    lines = []
    for name, a in case.arrays().items():
        f = np.asarray(a, dtype=np.float64) if a.size else np.zeros(0)
        finite = f[np.isfinite(f)]
        rng = (f"min {finite.min():.6g} max {finite.max():.6g}" if finite.size else "no finite value")
        extra = "" if finite.size == f.size else f", {f.size - finite.size} non-finite"
        lines.append(f"  {name:7s} shape {tuple(a.shape)} {a.dtype}: {rng}{extra}")
    return lines


def replay(path: str, adapter, invariant_id: str | None = None):
    """Re-run the invariant of a witness on ``adapter`` without hypothesis.

    Returns (verdict, Evidence-or-None, message, meta).
    """
    from ..invariants import Context, get
    case, meta = load_case(path)
    inv_id = invariant_id or meta.get("invariant")
    if not inv_id:
        raise CaseFileError(f"witness {path!r} names no invariant; pass --invariant ID")
    inv = get(inv_id)
    refusal = inv.refusal(adapter.capabilities)
    if refusal:
        return "not-applicable", None, f"{inv_id} does not apply to {adapter.name}: {refusal}", meta
    claims = inv.claims(adapter.capabilities)
    if meta.get("quant"):        # a quantized case: judged on the quantized claims
        why = (claims.quant.refusal(case.spec) if claims.quant is not None
               else "the adapter declares no quantized pass")
    else:
        why = claims.refusal(case.spec)
    if why:
        return ("not-applicable", None, f"{adapter.name} does not claim this geometry: {why}", meta)
    try:
        ev: Evidence = inv.check(adapter, case, Context())
    except AdapterOutputError as exc:
        return "fail", None, str(exc), meta
    except AdapterRaised as exc:
        return "error", None, f"{exc}\n{exc.traceback_text}", meta
    except AdapterCrashed as exc:
        return "crash", None, str(exc), meta
    except AdapterTimeout as exc:
        return "timeout", None, str(exc), meta
    if ev.skipped:
        return "not-applicable", ev, f"{inv_id} could not be checked on this case: {ev.skipped}", meta
    return ("pass" if ev.ok else "fail"), ev, ev.message, meta
