"""Lines ``roi,time,count`` of a spike table with the times in fixed decimals, written by compiled code.

A pipeline run writes one line per frame with spikes: about 600 lines per ROI
for a 20-minute session at 0.5 Hz. Formatting those times with Python's
``repr`` took ~1 ms per ROI, a tenth of all the per-ROI work; writing the
digits of whole numbers in a compiled loop takes a few microseconds.

A time t is written as the whole number ``u = rint(t * 10**decimals)``
(:func:`time_units`) split at the decimal point, so the compiled writer
(:func:`fixed_lines`) and its plain-Python reference
(:func:`fixed_lines_reference`; tests compare the two) only handle integers
and give the same text by construction.
"""
from __future__ import annotations

import numpy as np
from numba import njit

#: Most decimals a time may be written with (10**9 * the longest session still fits an int64).
MAX_DECIMALS = 9


def time_units(times: np.ndarray, decimals: int) -> np.ndarray:
    """Times (s, >= 0) as whole numbers of 10**-decimals s, rounded to the nearest (ties to even)."""
    return np.rint(np.asarray(times, dtype=np.float64) * 10.0 ** decimals).astype(np.int64)


def fixed_time_text(unit: int, decimals: int) -> str:
    """The text of one time of ``unit`` 10**-decimals s (empty for a negative unit: no time)."""
    if unit < 0:
        return ""
    if not decimals:
        return str(unit)
    scale = 10 ** decimals
    return f"{unit // scale}.{unit % scale:0{decimals}d}"


def fixed_lines_reference(rois, units, counts, decimals: int) -> str:
    """Plain-Python reference of :func:`fixed_lines`."""
    return "".join(f"{roi},{fixed_time_text(unit, decimals)},{count}\n" for roi, unit, count in
                   zip(np.asarray(rois).tolist(), np.asarray(units).tolist(), np.asarray(counts).tolist()))


def fixed_lines(rois, units, counts, decimals: int) -> str:
    """Lines ``roi,time,count``, the time written from ``units`` (see :func:`time_units`) with ``decimals``
    decimals; a negative unit leaves the time empty (a ROI without spikes).

    ``rois``, ``units`` and ``counts`` are equally long whole-number arrays; ``rois`` and ``counts`` >= 0.
    """
    rois = np.ascontiguousarray(rois, dtype=np.int64)
    units = np.ascontiguousarray(units, dtype=np.int64)
    counts = np.ascontiguousarray(counts, dtype=np.int64)
    if not rois.shape == units.shape == counts.shape or rois.ndim != 1:
        raise ValueError(f"rois, units and counts must be 1-D and equally long, got shapes {rois.shape}, "
                         f"{units.shape} and {counts.shape}")
    if not 0 <= decimals <= MAX_DECIMALS:
        raise ValueError(f"decimals must be in [0, {MAX_DECIMALS}], got {decimals}")
    if rois.size and (rois.min() < 0 or counts.min() < 0):
        raise ValueError("rois and counts must be >= 0")
    if rois.size == 0:
        return ""
    # at most 19 digits per whole number, a decimal point, two commas and the newline
    out = np.empty(rois.size * (3 * 19 + decimals + 4), dtype=np.uint8)
    end = _fixed_lines_numba(rois, units, counts, decimals, out)
    return out[:end].tobytes().decode("ascii")


@njit(cache=True)
def _put_digits(value, width, out, pos):
    """Decimal digits of ``value`` >= 0 at ``out[pos:]``, zero-padded to ``width``; returns the end."""
    digits = 1
    rest = value // 10
    while rest > 0:
        digits += 1
        rest //= 10
    if digits < width:
        digits = width
    end = pos + digits
    for i in range(digits):
        out[end - 1 - i] = 48 + value % 10  # '0' + digit
        value //= 10
    return end


@njit(cache=True)
def _fixed_lines_numba(rois, units, counts, decimals, out):
    scale = 1
    for _ in range(decimals):
        scale *= 10
    pos = 0
    for i in range(rois.size):
        pos = _put_digits(rois[i], 1, out, pos)
        out[pos] = 44  # ','
        pos += 1
        unit = units[i]
        if unit >= 0:
            if decimals > 0:
                pos = _put_digits(unit // scale, 1, out, pos)
                out[pos] = 46  # '.'
                pos = _put_digits(unit % scale, decimals, out, pos + 1)
            else:
                pos = _put_digits(unit, 1, out, pos)
        out[pos] = 44
        pos = _put_digits(counts[i], 1, out, pos + 1)
        out[pos] = 10  # '\n'
        pos += 1
    return pos
