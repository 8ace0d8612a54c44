"""Frequency bands given as (low, high) pairs: parsed once for the signal stages that take them.

Nothing here is public: each stage checks the values against its own limits and says so in its messages.
"""
from __future__ import annotations

__all__ = ["frequency_pairs"]


def frequency_pairs(value, name: str, example: str) -> tuple[tuple[float, float], ...]:
    """``value`` as a tuple of (low, high) float pairs; a ValueError naming ``name`` and showing ``example``
    for anything else (the ranges are the caller's to check)."""
    try:
        return tuple((float(low), float(high)) for low, high in value)
    except (TypeError, ValueError):
        raise ValueError(f"{name} must be a sequence of (low, high) pairs of frequencies in Hz, such as {example}; "
                         f"got {value!r}") from None
