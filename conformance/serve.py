"""Serve a Python adapter to the wire protocol: ``python -m convwitness.serve SPEC``.

The public entry point of :mod:`convwitness.boundary.wire.serve` (docs/wire-protocol.md).
"""
from .boundary.wire.serve import main

if __name__ == "__main__":
    raise SystemExit(main())
