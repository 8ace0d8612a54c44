"""Reading ROI traces from Neurodata Without Borders (NWB) files: :func:`read_nwb_traces`, :func:`list_nwb_series`.

Any RoiResponseSeries of an NWB file (ΔF/F, fluorescence, the series :func:`calcium.export_nwb` writes) is
read back as (rois, frames) with its frame rate. Writing NWB from a results file is the pipeline's job:
:func:`calcium.pipeline.nwb.export_nwb` (``calcium.export_nwb``); the former name
``calcium.io.nwb.export_nwb`` still works for one release, with a DeprecationWarning.

Needs the optional dependency ``pynwb`` (``pip install 'calcium-counts[nwb]'``); it is imported only when
one of these functions is called.

References
----------
Rübel O, Tritt A, Ly R, et al. (2022). The Neurodata Without Borders ecosystem for neurophysiological data
science. eLife 11:e78362. https://doi.org/10.7554/eLife.78362
"""
from __future__ import annotations

import warnings

import numpy as np

from .._checks import CalciumInputError
from .results import _existing_file
from .traces import _SPACING_TOLERANCE

__all__ = ["read_nwb_traces", "list_nwb_series"]


def _pynwb():
    try:
        import pynwb
    except ImportError:
        raise ImportError("reading NWB files needs the optional dependency pynwb: pip install "
                          "'calcium-counts[nwb]' (or pip install pynwb)") from None
    return pynwb


def export_nwb(results_path, nwb_path, **options):
    """Deprecated alias of :func:`calcium.pipeline.nwb.export_nwb` (``calcium.export_nwb``), for one release.

    The export reads a results file, which is the pipeline's business, so it moved out of ``calcium.io``.
    Same arguments, same result; warns with a DeprecationWarning.
    """
    warnings.warn("calcium.io.nwb.export_nwb moved to calcium.pipeline.nwb.export_nwb (also calcium.export_nwb); "
                  "the old name goes in the next release", DeprecationWarning, stacklevel=2)
    from ..pipeline.nwb import export_nwb as moved  # (upward, inside the deprecated alias only: no cycle)

    return moved(results_path, nwb_path, **options)


def _all_series(nwb):
    from pynwb.ophys import RoiResponseSeries

    found = {}
    for obj in nwb.objects.values():
        if isinstance(obj, RoiResponseSeries):
            parts = [obj.name]
            parent = obj.parent
            while parent is not None and parent is not nwb:
                parts.append(parent.name)
                parent = parent.parent
            found["/".join(reversed(parts))] = obj
    return found


def list_nwb_series(path) -> list[str]:
    """Names (``module/interface/series``) of the ROI response series in an NWB file."""
    pynwb = _pynwb()
    path = _existing_file(path, "NWB file")
    with pynwb.NWBHDF5IO(str(path), "r") as io:
        return sorted(_all_series(io.read()))


def _rate_of(series, path, name) -> float:
    if series.rate is not None:
        return float(series.rate)
    stamps = np.asarray(series.timestamps[:], dtype=np.float64)
    if stamps.size < 2:
        raise CalciumInputError(f"{path}: series {name!r} has neither a rate nor two timestamps")
    steps = np.diff(stamps)
    step = float(np.median(steps))
    if not step > 0 or np.max(np.abs(steps - step)) > _SPACING_TOLERANCE * step:
        raise CalciumInputError(f"{path}: series {name!r} has unevenly spaced timestamps (median step "
                                f"{step:.6g} s); a constant frame rate is required")
    return 1.0 / step


def read_nwb_traces(path, *, series=None) -> tuple[np.ndarray, float]:
    """Read ROI traces from an NWB file.

    Parameters
    ----------
    path : path-like
        The ``.nwb`` file.
    series : str, optional
        Which RoiResponseSeries: its name (``"dff"``) or its full name
        ``module/interface/series`` (see :func:`list_nwb_series`). By
        default the only series of the file (with several, an error lists them).

    Returns
    -------
    traces : ndarray of float64, shape (rois, frames)
        Time is the last axis (NWB stores (frames, rois)).
    frame_rate : float
        From the series' ``rate``, or from evenly spaced ``timestamps``.

    Raises
    ------
    ImportError
        pynwb is not installed.
    calcium._checks.CalciumInputError
        Missing or unreadable file, no (or no matching) series, uneven
        timestamps.
    ValueError
        ``series`` is ambiguous (the message lists the full names).
    """
    pynwb = _pynwb()
    path = _existing_file(path, "NWB file")
    try:
        io = pynwb.NWBHDF5IO(str(path), "r")
        nwb = io.read()
    except Exception as exc:  # pynwb/hdmf raise many kinds for a file that is not NWB
        raise CalciumInputError(f"{path} is not a readable NWB file: {exc}") from None
    with io:
        found = _all_series(nwb)
        names = ", ".join(sorted(found)) or "none"
        if not found:
            raise CalciumInputError(f"{path} holds no RoiResponseSeries")
        if series is None:
            if len(found) != 1:
                raise ValueError(f"{path} holds several ROI response series ({names}); pass series=...")
            key = next(iter(found))
        else:
            matches = [k for k in found if k == series or k.rsplit("/", 1)[-1] == series]
            if not matches:
                raise CalciumInputError(f"{path} has no ROI response series {series!r} (series: {names})")
            if len(matches) > 1:
                raise ValueError(f"series={series!r} matches several series ({', '.join(matches)}); give the "
                                 f"full name")
            key = matches[0]
        chosen = found[key]
        data = np.asarray(chosen.data[:], dtype=np.float64)
        rate = _rate_of(chosen, path, key)
    traces = data.reshape(-1, 1) if data.ndim == 1 else data
    if traces.ndim != 2:
        raise CalciumInputError(f"{path}: series {key!r} has shape {data.shape}; expected (frames, rois)")
    return np.ascontiguousarray(traces.T), rate

