"""Resource limits of adapter calls: sizes written as people write them."""
from __future__ import annotations

__all__ = ["parse_bytes"]

_UNITS = {"k": 1 << 10, "m": 1 << 20, "g": 1 << 30, "t": 1 << 40}


def parse_bytes(value) -> int | None:
    """512, "512M", "512MiB", "4GiB", "2g" -> bytes (None stays None).

    Raises ValueError, with what was expected, for anything else."""
    if value is None or isinstance(value, int):
        return value
    if isinstance(value, float):
        return int(value)
    text = str(value).strip().lower().removesuffix("b").removesuffix("i")
    scale = _UNITS.get(text[-1:], 1)
    try:
        return int(float(text[:-1] if scale > 1 else text) * scale)
    except ValueError:
        raise ValueError(f"{value!r}: expected bytes as an integer or a size such as "
                         "'512M', '512MiB' or '4GiB'") from None
