"""Profiles: named, immutable budgets for a run.

``examples`` is the number of geometries hypothesis draws per invariant, ``values``
the value sets checked per geometry (several per geometry amortise per-shape
compilation in libraries such as jax). Size caps bound every drawn geometry.
"""
from __future__ import annotations

from dataclasses import asdict, dataclass

from ..errors import ConvWitnessError

__all__ = ["Profile", "PROFILES", "get_profile"]


@dataclass(frozen=True)
class Profile:
    name: str
    examples: int            # geometries per invariant
    values: int              # value sets per geometry
    max_batch: int
    max_channels: int        # channels per group, outside the vector-width sweep
    max_groups: int
    max_kernel: int
    max_stride: int
    max_dilation: int
    max_padding: int
    max_spatial: tuple       # per ndim: largest input length per axis for 1-, 2-, 3-D
    max_elements: int        # largest x, w or y
    repeats: int             # repetitions in determinism checks
    deadline_ms: int | None  # hypothesis deadline per example (None: off)
    call_timeout: float      # seconds per adapter call under process isolation
    budget_s: float = 120.0  # wall-time budget of one invariant, shrinking included
    stress: bool = False     # long accumulations (nightly)
    further_causes: int = 0  # after a failure, reruns with its region excluded (run/further.py)

    def to_dict(self) -> dict:
        d = asdict(self)
        d["max_spatial"] = list(self.max_spatial)
        return d


PROFILES = {
    p.name: p
    for p in (
        Profile("quick", examples=20, values=2, max_batch=3, max_channels=4, max_groups=3,
                max_kernel=4, max_stride=3, max_dilation=3, max_padding=3,
                max_spatial=(17, 9, 5), max_elements=8192, repeats=4, deadline_ms=None,
                call_timeout=30.0, budget_s=90.0),
        Profile("standard", examples=80, values=3, max_batch=4, max_channels=6, max_groups=4,
                max_kernel=5, max_stride=4, max_dilation=3, max_padding=4,
                max_spatial=(33, 17, 7), max_elements=32768, repeats=10, deadline_ms=None,
                call_timeout=120.0, budget_s=600.0, further_causes=2),
        Profile("nightly", examples=300, values=4, max_batch=6, max_channels=9, max_groups=4,
                max_kernel=7, max_stride=4, max_dilation=4, max_padding=5,
                max_spatial=(65, 33, 11), max_elements=262144, repeats=20, deadline_ms=None,
                call_timeout=300.0, budget_s=3600.0, stress=True, further_causes=3),
    )
}


def get_profile(name) -> Profile:
    if isinstance(name, Profile):
        return name
    try:
        return PROFILES[name]
    except KeyError:
        raise ConvWitnessError(f"unknown profile {name!r}; expected one of {', '.join(PROFILES)}") from None
