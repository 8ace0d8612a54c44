"""Neurodata Without Borders (NWB) export of results, and reading ROI traces from NWB files.

Needs the optional dependency ``pynwb`` (``pip install 'calcium[nwb]'``); it
is imported only when one of these functions is called.

:func:`export_nwb` writes the results of a pipeline run
(:func:`calcium.pipeline.run_pipeline`) as an NWB file with a processing
module ``ophys`` holding

* ``ImageSegmentation/rois``: one row per ROI, with its pixel mask when the
  run started from a movie and masks (otherwise a placeholder pixel of weight
  0: the geometry is unknown), and the per-ROI columns ``noise_sd``, ``snr``,
  ``n_spikes``, ``quality_flags`` and ``flags``;
* ``DfOverF/dff``: ΔF/F as a RoiResponseSeries (frames, rois);
* ``InferredActivity/activity``: the inferred spiking activity per frame;
* ``Fluorescence/raw`` when the run extracted traces from a movie.

The arrays are streamed from the results file in blocks, so the export needs
little memory whatever the size of the session.

:func:`read_nwb_traces` reads any RoiResponseSeries back as (rois, frames).
"""
from __future__ import annotations

import uuid
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from .._checks import CalciumInputError
from .results import _existing_file, atomic_output
from .traces import _SPACING_TOLERANCE

__all__ = ["export_nwb", "read_nwb_traces", "list_nwb_series"]

# Memory for one block of a series while streaming it into the NWB file.
_BUFFER_GB = 0.1


def _pynwb():
    try:
        import pynwb
    except ImportError:
        raise ImportError("NWB support needs the optional dependency pynwb: pip install 'calcium[nwb]'") from None
    return pynwb


def _transposed_iterator(dataset):
    """An hdmf chunk iterator giving (frames, rois) blocks of a (rois, frames) HDF5 dataset."""
    from hdmf.data_utils import GenericDataChunkIterator

    class _Transposed(GenericDataChunkIterator):
        def __init__(self, source, **kwargs):
            self._source = source
            super().__init__(**kwargs)

        def _get_data(self, selection):
            frames, rois = selection
            return np.ascontiguousarray(self._source[rois, frames].T)

        def _get_maxshape(self):
            rois, frames = self._source.shape
            return (frames, rois)

        def _get_dtype(self):
            return self._source.dtype

    return _Transposed(dataset, buffer_gb=_BUFFER_GB, display_progress=False)


def _session_start(text, attrs) -> datetime:
    if text:
        try:
            value = datetime.fromisoformat(text)
        except ValueError:
            raise ValueError(f"session_start must be an ISO 8601 date-time such as 2024-03-01T10:15:00+01:00, "
                             f"got {text!r}") from None
        return value if value.tzinfo else value.astimezone()
    for entry in (attrs.get("inputs") or {}).values():
        path = Path(entry.get("path", ""))
        if path.is_file():
            return datetime.fromtimestamp(path.stat().st_mtime, tz=timezone.utc)
    created = attrs.get("created_utc")
    return datetime.fromisoformat(created) if created else datetime.now(timezone.utc)


def export_nwb(results_path, nwb_path, *, session_description="calcium imaging session", session_start=None,
               experimenter=None, location=None, indicator=None, masks=None) -> Path:
    """Write the results of a pipeline run as an NWB file.

    Parameters
    ----------
    results_path : path-like
        A complete ``results.h5`` of :func:`calcium.pipeline.run_pipeline`.
    nwb_path : path-like
        The ``.nwb`` file to write (atomically; an existing file is replaced).
    session_description : str
    session_start : str, optional
        ISO 8601 date-time of the session start. Default: the modification
        time of the input file (or the time the results were created).
    experimenter, location, indicator : str, optional
        Recorded in the file (``location``: brain area of the imaging plane).
    masks : array_like of bool, shape (rois, height, width), optional
        ROI masks stored as pixel masks. Default: the run's mask file when it
        started from a movie; otherwise one placeholder pixel of weight 0 per
        ROI (the geometry is unknown).

    Returns
    -------
    pathlib.Path
        ``nwb_path``.

    Raises
    ------
    ImportError
        pynwb is not installed.
    calcium._checks.CalciumInputError
        The results file is missing, unreadable or incomplete.
    """
    pynwb = _pynwb()
    from pynwb.ophys import DfOverF, Fluorescence, ImageSegmentation, OpticalChannel

    from ..pipeline.store import open_results

    nwb_path = Path(nwb_path)
    with open_results(results_path) as results:
        attrs = results.attrs
        n_rois, rate = results.n_rois, results.frame_rate
        if masks is None and attrs.get("input_kind") == "movie":
            masks_path = (attrs.get("inputs") or {}).get("masks", {}).get("path")
            if masks_path and Path(masks_path).is_file():
                from .masks import read_masks

                masks = read_masks(masks_path)
        if masks is not None:
            masks = np.asarray(masks, dtype=bool)
            if masks.ndim != 3 or masks.shape[0] != n_rois:
                raise ValueError(f"masks must have shape (rois={n_rois}, height, width), got {masks.shape}")

        nwb = pynwb.NWBFile(
            session_description=str(session_description),
            identifier=str(attrs.get("run_hash") or uuid.uuid4()),
            session_start_time=_session_start(session_start, attrs),
            experimenter=[experimenter] if experimenter else None,
            source_script=f"calcium {attrs.get('calcium_version', '')} pipeline",
            source_script_file_name="calcium.pipeline",
            notes="Processing parameters (TOML):\n" + str(attrs.get("config_toml", "")),
        )
        device = nwb.create_device(name="microscope", description="imaging device (not recorded)")
        channel = OpticalChannel(name="channel", description="emission channel (not recorded)",
                                 emission_lambda=float("nan"))
        plane = nwb.create_imaging_plane(
            name="imaging_plane", optical_channel=channel, device=device, description="imaging plane",
            excitation_lambda=float("nan"), indicator=indicator or "unknown", location=location or "unknown",
            imaging_rate=float(rate))
        module = nwb.create_processing_module("ophys", "calcium pipeline results: ΔF/F and inferred activity")
        segmentation = ImageSegmentation(name="ImageSegmentation")
        module.add(segmentation)
        placeholder = masks is None
        table = segmentation.create_plane_segmentation(
            name="rois", imaging_plane=plane,
            description=("ROIs of the run; pixel masks from the mask file" if not placeholder else
                         "ROIs of the run; the analysed input was traces, so the ROI geometry is unknown: each "
                         "ROI has one placeholder pixel (0, 0) of weight 0"))
        for roi in range(n_rois):
            if placeholder:
                pixels = [(0, 0, 0.0)]
            else:
                yy, xx = np.nonzero(masks[roi])
                pixels = [(int(x), int(y), 1.0) for x, y in zip(xx, yy)]
            table.add_roi(pixel_mask=pixels, id=roi)
        for name, description in (("noise_sd", "noise standard deviation of ΔF/F"),
                                  ("snr", "peak of the denoised ΔF/F over noise_sd"),
                                  ("n_spikes", "number of inferred spikes"),
                                  ("quality_flags", "bit field: 1 failed, 2 low SNR, 4 saturation suspected, 8 F0 "
                                                    "problem, 16 many missing frames, 32 not converged"),
                                  ("flags", "reasons for the quality flags")):
            values = results.read(name)
            table.add_column(name=name, description=description,
                             data=[str(v) for v in values] if values.dtype.kind in "SUO" else values)
        region = table.create_roi_table_region(region=list(range(n_rois)), description="all ROIs")

        if "dff" not in results:
            raise ValueError(f"{results_path} holds no ΔF/F (dataset 'dff'): NWB export needs the results of a "
                             f"whole-session run (calcium run), not of inference alone (calcium infer)")
        handle = {name: results.dataset(name) for name in ("dff", "activity", "raw") if name in results}
        dff = DfOverF(name="DfOverF")
        module.add(dff)
        dff.create_roi_response_series(name="dff", data=_transposed_iterator(handle["dff"]), unit="n/a",
                                       rois=region, rate=float(rate), starting_time=0.0,
                                       description="ΔF/F = (F - F0) / F0; NaN at missing frames")
        activity = Fluorescence(name="InferredActivity")
        module.add(activity)
        activity.create_roi_response_series(
            name="activity", data=_transposed_iterator(handle["activity"]), unit="spikes", rois=region,
            rate=float(rate), starting_time=0.0,
            description="inferred spiking activity per frame (non-negative, in spikes), from non-negative "
                        "deconvolution of ΔF/F")
        if "raw" in handle:
            raw = Fluorescence(name="Fluorescence")
            module.add(raw)
            raw.create_roi_response_series(name="raw", data=_transposed_iterator(handle["raw"]), unit="a.u.",
                                           rois=region, rate=float(rate), starting_time=0.0,
                                           description="neuropil-corrected ROI fluorescence from the movie")
        with atomic_output(nwb_path, inputs=[results_path]) as tmp:
            with pynwb.NWBHDF5IO(str(tmp), "w") as io:
                io.write(nwb)
    return nwb_path


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

