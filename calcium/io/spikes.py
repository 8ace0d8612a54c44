"""Reading and writing spike times (seconds from the first frame) as CSV.

Two layouts are read:

* a table with a header naming the columns ``roi`` and ``time_s`` (``time``
  is accepted too) and optionally ``count`` (the spike at that time is
  repeated ``count`` times, for bursts faster than the frame rate)::

      roi,time_s,count
      0,1.25,1
      0,3.5,2
      2,,0        <- ROI 2 is known but fired no spike

* one time per line (an optional single header cell ``time_s``), all for ROI 0.

:func:`write_spike_table` writes the first layout, folding equal times into
``count`` and writing a ``count`` of 0 for a ROI without spikes.
"""
from __future__ import annotations

import csv
from collections.abc import Mapping
from pathlib import Path

import numpy as np

from .._checks import CalciumInputError, check_memory
from .results import _existing_file, write_csv

__all__ = ["read_spike_times", "write_spike_table"]

from .traces import _TIME_COLUMNS as _TIME_NAMES  # one spelling of the time column for every CSV


def _header_index(header: list[str], path: Path) -> tuple[int | None, int, int | None]:
    lowered = [name.strip().lower() for name in header]
    times = [i for i, name in enumerate(lowered) if name in _TIME_NAMES]
    if len(times) != 1:
        raise CalciumInputError(f"{path}: the header must name exactly one time column "
                                f"('time_s' or 'time'), got {header}")
    roi = lowered.index("roi") if "roi" in lowered else None
    count = lowered.index("count") if "count" in lowered else None
    if roi is None and count is not None:
        raise CalciumInputError(f"{path}: a 'count' column needs a 'roi' column too (header {header})")
    return roi, times[0], count


def _is_float(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def _parse_int(text: str, what: str, minimum: int, path: Path, line: int) -> int:
    try:
        value = float(text)
    except ValueError:
        raise CalciumInputError(f"{path}, line {line}: {what} {text!r} is not a number") from None
    if not np.isfinite(value) or value != int(value) or value < minimum:
        raise CalciumInputError(f"{path}, line {line}: {what} must be a whole number >= {minimum}, got {text!r}")
    return int(value)


def _parse_time(text: str, path: Path, line: int) -> float:
    try:
        value = float(text)
    except ValueError:
        raise CalciumInputError(f"{path}, line {line}: spike time {text!r} is not a number") from None
    if not np.isfinite(value):
        raise CalciumInputError(f"{path}, line {line}: spike time {text!r} is not finite")
    if value < 0:
        raise CalciumInputError(f"{path}, line {line}: spike time {value!r} s is negative "
                                f"(times are seconds from the first frame)")
    return value


def read_spike_times(path) -> dict[int, np.ndarray]:
    """Read spike times from a CSV file.

    Parameters
    ----------
    path : str or path-like
        CSV file in one of the two layouts described in the module notes.

    Returns
    -------
    dict of int -> ndarray of float64
        ROI index -> sorted spike times in seconds from the first frame; a
        spike with ``count`` n appears n times. Keys are in increasing order;
        a ROI listed with ``count`` 0 maps to an empty array.

    Raises
    ------
    CalciumInputError
        Missing or empty file; a negative, non-finite or non-numeric time;
        a bad ROI index or count. The message names the file and line.
        Also counts adding up to more spikes than fit in the memory
        available (checked before the times are expanded; the message names
        the line with the largest count).

    Examples
    --------
    >>> import tempfile, os
    >>> with tempfile.TemporaryDirectory() as folder:
    ...     name = os.path.join(folder, "spikes.csv")
    ...     _ = open(name, "w").write("roi,time_s,count\\n1,0.5,1\\n0,2.0,2\\n1,0.25,1\\n")
    ...     spikes = read_spike_times(name)
    >>> {roi: times.tolist() for roi, times in spikes.items()}
    {0: [2.0, 2.0], 1: [0.25, 0.5]}
    """
    path = _existing_file(path, "spike file", allow_empty=False)
    try:
        with open(path, newline="", encoding="utf-8-sig") as handle:
            rows = [(number, [c.strip() for c in cells])
                    for number, cells in enumerate(csv.reader(handle), start=1)
                    if cells and any(c.strip() for c in cells) and not cells[0].lstrip().startswith("#")]
    except UnicodeDecodeError:
        raise CalciumInputError(f"{path} is not a text (UTF-8) CSV file") from None
    if not rows:
        raise CalciumInputError(f"{path} holds no lines")
    first = rows[0][1]
    if all(_is_float(c) for c in first):
        if len(first) != 1:
            raise CalciumInputError(f"{path}, line {rows[0][0]}: without a header each line must hold one "
                                    f"spike time; use a header 'roi,time_s' for several ROIs")
        roi_col, time_col, count_col, width = None, 0, None, 1
    else:
        roi_col, time_col, count_col = _header_index(first, path)
        rows, width = rows[1:], len(first)
    collected: dict[int, list[tuple[float, int]]] = {}  # ROI -> (time, count) per line
    total, largest = 0, (0, 0)  # spikes in all, and the largest count with its line
    for number, cells in rows:
        if len(cells) != width:
            raise CalciumInputError(f"{path}, line {number}: {len(cells)} value(s), expected {width}")
        roi = 0 if roi_col is None else _parse_int(cells[roi_col], "roi", 0, path, number)
        count = 1 if count_col is None else _parse_int(cells[count_col], "count", 0, path, number)
        times = collected.setdefault(roi, [])
        if count == 0 and cells[time_col] == "":
            continue  # a ROI without spikes
        times.append((_parse_time(cells[time_col], path, number), count))
        total += count
        largest = max(largest, (count, number))
    # the counts are expanded into one time per spike: check that the result fits before building it
    try:
        check_memory(2 * 8.0 * total, f"{path}: the spike counts add up to {total:,} spikes (line {largest[1]} has "
                     f"count {largest[0]:,}), which", remedy="check the count column")
    except ValueError as exc:
        raise CalciumInputError(str(exc)) from None
    return {roi: np.sort(np.repeat([t for t, _ in collected[roi]], [n for _, n in collected[roi]]).astype(np.float64))
            for roi in sorted(collected)}


def _as_mapping(spike_times) -> Mapping:
    if isinstance(spike_times, Mapping):
        return spike_times
    if isinstance(spike_times, (list, tuple)):
        return dict(enumerate(spike_times))
    raise ValueError(f"spike_times must be a dict of ROI index -> times, or a list of time arrays per ROI; "
                     f"got {type(spike_times).__name__}")


def write_spike_table(path, spike_times, *, decimals=None, inputs=()) -> Path:
    """Write spike times as a CSV table ``roi,time_s,count``, atomically.

    Parameters
    ----------
    path : str or path-like
        Output CSV file.
    spike_times : dict of int -> array_like, or list of array_like
        Spike times in seconds (finite, >= 0) per ROI index; a list is
        indexed by position. Equal times of one ROI are folded into one line
        with their ``count``; a ROI with no spikes gets one line with an empty
        time and count 0, so :func:`read_spike_times` still lists it.
    decimals : int, optional
        Write the times rounded to this many decimals (0-9; times equal once
        rounded are folded). By default they are written in full (``repr``),
        so that they read back exactly.
    inputs : sequence of path-like, optional
        Input files; ``path`` may not be one of them.

    Returns
    -------
    pathlib.Path
        ``path``.

    Raises
    ------
    ValueError
        A ROI key that is not a whole number >= 0, or a time that is negative,
        non-finite or not a number (the message names the ROI).
    """
    mapping = _as_mapping(spike_times)
    if decimals is not None:
        from .spike_text import MAX_DECIMALS

        if isinstance(decimals, bool) or not isinstance(decimals, (int, np.integer)) or \
                not 0 <= decimals <= MAX_DECIMALS:
            raise ValueError(f"decimals must be a whole number in [0, {MAX_DECIMALS}], got {decimals!r}")
    rows = []
    for key in mapping:
        if isinstance(key, bool) or not isinstance(key, (int, np.integer)) or key < 0:
            raise ValueError(f"spike_times keys must be ROI indices (whole numbers >= 0), got {key!r}")
    for key in sorted(mapping):
        try:
            times = np.asarray(mapping[key], dtype=np.float64).ravel()
        except (TypeError, ValueError):
            raise ValueError(f"spike_times[{key}] must be numbers, got {mapping[key]!r}") from None
        bad = times[~np.isfinite(times) | (times < 0)]
        if bad.size:
            raise ValueError(f"spike_times[{key}] must be finite times >= 0 s, got {bad[0]!r}")
        if times.size == 0:
            rows.append((int(key), "", 0))
            continue
        if decimals is None:
            unique, counts = np.unique(times, return_counts=True)
            rows.extend((int(key), float(t), int(n)) for t, n in zip(unique, counts))
            continue
        from .spike_text import fixed_time_text, time_units

        units, counts = np.unique(time_units(times, int(decimals)), return_counts=True)
        rows.extend((int(key), fixed_time_text(u, int(decimals)), int(n)) for u, n in zip(units.tolist(), counts))
    return write_csv(path, ["roi", "time_s", "count"], rows, inputs=inputs)
