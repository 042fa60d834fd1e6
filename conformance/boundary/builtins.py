"""``convwitness adapters``: the built-ins, available or not, with their claims."""
from __future__ import annotations

__all__ = ["list_builtins", "builtin_status"]


def builtin_status() -> list[dict]:
    from ..adapters import BUILTINS
    from ..errors import AdapterLoadError
    from .loading import load_adapter
    out = []
    for name in BUILTINS:
        try:
            a = load_adapter(name)
        except AdapterLoadError as exc:
            out.append({"name": name, "available": False, "version": "", "summary": str(exc)})
            continue
        out.append({"name": name, "available": True, "version": a.version,
                    "summary": a.capabilities.summary()})
    return out


def list_builtins() -> list[str]:
    rows = builtin_status()
    width = max(len(r["name"]) for r in rows)
    lines = []
    for r in rows:
        state = "available  " if r["available"] else "unavailable"
        lines.append(f"{r['name']:{width}s}  {state}  {r['version']:10s}  {r['summary']}")
    return lines
