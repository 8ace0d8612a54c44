"""Export of a results file to Neurodata Without Borders (NWB): :func:`export_nwb`, :func:`nwb_contents`.

NWB is the community standard for neurophysiology data (Rübel et al. 2022). The export puts every result in
the structure the standard defines for it, so that any NWB reader finds it where it looks:

================================================  =============================================================
place in the NWB file                             what it holds
================================================  =============================================================
``general/optophysiology/imaging_plane``          ImagingPlane: frame rate, indicator and brain area when given
                                                  (device, wavelengths: not recorded)
``processing/ophys/ImageSegmentation/rois``       PlaneSegmentation of that plane: one row per ROI, id = ROI
                                                  index; its pixel mask (a placeholder pixel of weight 0 when the
                                                  geometry is unknown); columns ``noise_sd``, ``snr``,
                                                  ``n_spikes``, ``quality_flags``, ``flags``
``processing/ophys/DfOverF/dff``                  RoiResponseSeries (frames, rois): ΔF/F (``calcium run``)
``processing/ophys/Fluorescence/raw``, ``f0``     RoiResponseSeries: neuropil-corrected F of a movie run; the
                                                  baseline F0 when the run kept it
``processing/ophys/denoised``                     RoiResponseSeries: the model fit (ΔF/F)
``processing/ophys/activity``                     RoiResponseSeries: inferred activity per frame (spikes)
``units``                                         Units: one row per ROI, id = ROI index; ``spike_times`` (the
                                                  inferred spikes, s); ``roi``: the row of ``rois`` it comes from;
                                                  the count and single-spike size with their intervals
================================================  =============================================================

Every RoiResponseSeries is linked to the rows of ``rois`` (its ``rois`` region), and through them to the
imaging plane. The inferred spikes are events of each ROI, so they go where the standard keeps the events of
each observed unit, the Units table (Rübel et al. 2022), not into a fluorescence series: a frame
holding *n* spikes gives *n* equal times at ``k / frame_rate`` plus the frame's sub-frame offset, as in
``spikes.csv``. The arrays are streamed from the results file in blocks, so the export needs little memory
whatever the size of the session.

The results of ``calcium infer`` (:func:`calcium.pipeline.infer_file`) hold no ΔF/F, F0 or masks (their input
was ΔF/F): their export has the ROIs, the model fit, the activity and the spikes, and the file's ``notes`` say
what is not there (so does :func:`nwb_contents`, which the command line prints).

Needs the optional dependency ``pynwb``, imported only when a file is written. Reading traces back from an
NWB file is :func:`calcium.io.nwb.read_nwb_traces`.

References
----------
Rübel O, Tritt A, Ly R, et al. (2022). The Neurodata Without Borders ecosystem for neurophysiological data
science. eLife 11:e78362. https://doi.org/10.7554/eLife.78362
"""
from __future__ import annotations

import os
import uuid
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from ..io.masks import read_masks
from ..io.results import atomic_output, file_sha256
from .stages import inferred_spike_times
from .store import open_results

__all__ = ["export_nwb", "nwb_contents", "NwbContents"]

# Memory for one block of a series (or of the spike counts) while streaming it into the NWB file.
_BUFFER_BYTES = 100_000_000

# (results dataset, container or None, NWB name, unit, what it is, description) of each ROI response series
_SERIES = (
    ("dff", "DfOverF", "dff", "n/a", "ΔF/F",
     "ΔF/F = (F - F0) / F0 (dimensionless); NaN at missing frames and for failed ROIs"),
    ("raw", "Fluorescence", "raw", "a.u.", "raw fluorescence",
     "neuropil-corrected ROI fluorescence F, extracted from the movie"),
    ("f0", "Fluorescence", "f0", "a.u.", "baseline F0", "baseline fluorescence F0 of ΔF/F"),
    ("denoised", None, "denoised", "n/a", "model fit (ΔF/F)",
     "model fit (ΔF/F, dimensionless): the inferred activity convolved with the kernel, plus the baseline"),
    ("activity", None, "activity", "spikes", "inferred activity per frame (spikes)",
     "inferred spiking activity per frame (non-negative, in spikes), from non-negative deconvolution of ΔF/F; "
     "the whole spikes' times are in /units"),
)

# per-ROI columns of the ROI table, and of the Units table beside the spike times: (results dataset, description)
_ROI_COLUMNS = (
    ("noise_sd", "noise standard deviation of the ΔF/F the inference saw"),
    ("snr", "peak of the denoised ΔF/F above its baseline, over noise_sd"),
    ("n_spikes", "number of inferred spikes"),
    ("quality_flags", "bit field: 1 failed, 2 low SNR, 4 saturation suspected, 8 F0 problem, 16 many missing "
                      "frames, 32 not converged, 64 uncalibrated counts"),
    ("flags", "reasons for the quality flags, in words ('' = none)"),
)
_UNIT_COLUMNS = (
    ("count_low", "spike count at the upper end of the 90 % interval of spike_size (a bigger spike means fewer)"),
    ("count_high", "spike count at the lower end of the 90 % interval of spike_size"),
    ("spike_size", "ΔF/F (peak) of one spike the count was made with (NaN: counted per ROI, uncalibrated)"),
    ("spike_size_low", "lower end of the 90 % interval of spike_size"),
    ("spike_size_high", "upper end of the 90 % interval of spike_size"),
    ("calibrated", "1 if the count can be read as a number of spikes; 0: the single-spike size could not be "
                   "identified (reason in the ROI table's flags)"),
)


@dataclass(frozen=True)
class NwbContents:
    """What :func:`export_nwb` writes from a results file, and what the results do not hold.

    Attributes
    ----------
    kind : str
        ``"run"`` (results of :func:`calcium.pipeline.run_pipeline`) or ``"infer"``
        (of :func:`calcium.pipeline.infer_file`: the input was ΔF/F).
    written : tuple of (str, str)
        Each part of the NWB file: its place in the file and what it holds.
    absent : tuple of str
        One sentence per result the NWB file does not hold because the results file does not, saying where
        it can be found or how to add it (empty when nothing is missing).
    masks : str or None
        Where the ROIs' pixel masks come from (a mask file, or ``"given"``); None when each ROI has one
        placeholder pixel of weight 0 (the geometry is unknown).
    """

    kind: str
    written: tuple
    absent: tuple
    masks: str | None


def _import_pynwb():
    try:
        import pynwb
    except ImportError:
        raise ImportError("NWB export needs the optional dependency pynwb: pip install 'calcium-counts[nwb]' "
                          "(or pip install pynwb)") from None
    return pynwb


_PLACEHOLDER = "each ROI has one placeholder pixel of weight 0; give the masks to store them (--masks; masks= in Python)"


def _masks_of(results, masks, n_rois: int):
    """(masks as bool array or None, their source or None, the sentence saying why they are absent, mask file)."""
    if masks is not None:
        path = None
        if isinstance(masks, (str, os.PathLike)):
            path = Path(masks)
            masks = read_masks(path)
        masks = np.asarray(masks, dtype=bool)
        if masks.ndim != 3 or masks.shape[0] != n_rois:
            raise ValueError(f"masks must have shape (rois={n_rois}, height, width) like the results, got "
                             f"{masks.shape}; give the masks the ROIs were extracted with")
        return masks, str(path) if path else "given", None, path
    entry = (results.attrs.get("inputs") or {}).get("masks")
    if not entry:
        return None, None, f"ROI masks: the input was traces, so the ROIs' shapes are unknown ({_PLACEHOLDER})", None
    path = Path(entry.get("path", ""))
    if not path.is_file():
        return None, None, f"ROI masks: the run's mask file {path} is not found ({_PLACEHOLDER})", None
    if entry.get("sha256") and file_sha256(path) != entry["sha256"]:
        return None, None, (f"ROI masks: the run's mask file {path} has changed since the run (its SHA-256 differs), "
                            f"so it is not used ({_PLACEHOLDER})"), None
    found = read_masks(path)
    if found.shape[0] != n_rois:
        return None, None, (f"ROI masks: the run's mask file {path} holds {found.shape[0]} ROIs, not {n_rois} "
                            f"({_PLACEHOLDER})"), None
    return found, str(path), None, path


def _plan(results, masks):
    """The contents of the export (:class:`NwbContents`), the masks and the mask file read."""
    attrs = results.attrs
    kind = "infer" if attrs.get("input_kind") == "dff" else "run"
    masks, source, masks_absent, masks_path = _masks_of(results, masks, results.n_rois)
    written = [("general/optophysiology/imaging_plane", "the imaging plane (frame rate; indicator and location "
                                                        "when given)"),
               ("processing/ophys/ImageSegmentation/rois",
                f"{results.n_rois} ROIs, " + (f"pixel masks from {source}" if source else "no pixel masks") +
                ", per-ROI " + ", ".join(name for name, _ in _ROI_COLUMNS if name in results))]
    for name, container, nwb_name, _, what, _ in _SERIES:
        if name in results:
            written.append(("/".join(["processing/ophys", *([container] if container else []), nwb_name]), what))
    written.append(("units", "the inferred spike times of each ROI, linked to its row of rois; " +
                    ", ".join(name for name, _ in _UNIT_COLUMNS if name in results)))
    absent = []
    if "dff" not in results:
        source_file = (attrs.get("inputs") or {}).get("dff", {}).get("path")
        absent.append("ΔF/F and F0: results of calcium infer hold the inference of a ΔF/F input, not the ΔF/F "
                      "itself" + (f" (it is in {source_file})" if source_file else "") +
                      "; the model fit is in processing/ophys/denoised")
    elif "f0" not in results:
        absent.append("F0: the run did not keep it ([output] f0 = false); F0 = F / (1 + ΔF/F) where F is known")
    if masks_absent:
        absent.append(masks_absent)
    if kind == "run" and "raw" not in results:
        traces = (attrs.get("inputs") or {}).get("traces", {}).get("path")
        absent.append("raw fluorescence: only a run from a movie stores it" +
                      (f" (the run's input traces are {traces})" if traces else ""))
    contents = NwbContents(kind=kind, written=tuple(written), absent=tuple(absent), masks=source)
    return contents, masks, masks_path


def nwb_contents(results_path, *, masks=None) -> NwbContents:
    """What :func:`export_nwb` would write from a results file, and what is not there.

    Parameters
    ----------
    results_path : path-like
        A complete results file of :func:`calcium.pipeline.run_pipeline` or
        :func:`calcium.pipeline.infer_file`.
    masks : array_like of bool or path-like, optional
        As in :func:`export_nwb`.

    Returns
    -------
    NwbContents

    Raises
    ------
    calcium._checks.CalciumInputError
        The results file (or the mask file) is missing, unreadable or incomplete.
    ValueError
        ``masks`` do not match the ROIs of the results.

    References
    ----------
    Rübel O, Tritt A, Ly R, et al. (2022). The Neurodata Without Borders ecosystem for neurophysiological
    data science. eLife 11:e78362.
    """
    with open_results(results_path) as results:
        return _plan(results, masks)[0]


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

    return _Transposed(dataset, buffer_gb=_BUFFER_BYTES / 1e9, display_progress=False)


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


def _column_values(values):
    return [str(v) for v in values] if values.dtype.kind in "SUO" else values


def _spike_trains(results):
    """Each ROI's inferred spike times (s, ascending), read from the results in blocks of ROIs."""
    rate = results.frame_rate
    rows = max(1, _BUFFER_BYTES // max(1, 6 * results.n_frames))  # uint16 counts + float32 offsets per frame
    trains = []
    for start in range(0, results.n_rois, rows):
        block = np.s_[start:min(start + rows, results.n_rois)]
        for counts, offsets in zip(results.read("spike_counts", block), results.read("spike_time_offset_s", block)):
            trains.append(np.sort(inferred_spike_times(counts, offsets, rate)))
    return trains


def export_nwb(results_path, nwb_path, *, session_description="calcium imaging session", session_start=None,
               experimenter=None, location=None, indicator=None, masks=None) -> Path:
    """Write a results file as an NWB file: ROIs, ΔF/F, model fit, activity and the spike times of each ROI.

    Works on the results of :func:`calcium.pipeline.run_pipeline` (``calcium run``) and of
    :func:`calcium.pipeline.infer_file` (``calcium infer``, which hold no ΔF/F, F0 or masks: the file has
    what there is, and its ``notes`` say what is not there). The layout is in the module's docstring.

    Parameters
    ----------
    results_path : path-like
        A complete results file (``results.h5`` of a run, or the ``.h5`` of ``calcium infer``).
    nwb_path : path-like
        The ``.nwb`` file to write (atomically; an existing file is replaced, never an input).
    session_description : str
    session_start : str, optional
        ISO 8601 date-time of the session start. Default: the modification
        time of the first input file still present (or the time the results were created).
    experimenter, location, indicator : str, optional
        Recorded in the file (``location``: brain area of the imaging plane).
    masks : array_like of bool, shape (rois, height, width), or path-like, optional
        ROI masks (an array, or a mask file read with :func:`calcium.io.read_masks`) stored as the ROIs'
        pixel masks. Default: the run's mask file when it started from a movie (if it is unchanged since the
        run); otherwise one placeholder pixel (0, 0) of weight 0 per ROI (the geometry is unknown).

    Returns
    -------
    pathlib.Path
        ``nwb_path``.

    Raises
    ------
    ImportError
        pynwb is not installed.
    calcium._checks.CalciumInputError
        The results file (or the mask file) is missing, unreadable or incomplete.
    ValueError
        ``session_start`` is not ISO 8601, ``masks`` do not match the ROIs, or ``nwb_path`` is an input.

    See Also
    --------
    nwb_contents : what the file will hold, and what the results do not.
    calcium.io.nwb.read_nwb_traces : read a ROI response series back.

    Notes
    -----
    Spike times are seconds from the first frame, which is the session start (``starting_time`` 0 of every
    series). The ids of the ROI table and of the Units table are the ROI indices of the results.

    References
    ----------
    Rübel O, Tritt A, Ly R, et al. (2022). The Neurodata Without Borders ecosystem for neurophysiological
    data science. eLife 11:e78362. https://doi.org/10.7554/eLife.78362
    """
    pynwb = _import_pynwb()
    from pynwb.misc import Units
    from pynwb.ophys import DfOverF, Fluorescence, ImageSegmentation, OpticalChannel, RoiResponseSeries

    nwb_path = Path(nwb_path)
    with open_results(results_path) as results:
        attrs = results.attrs
        n_rois, rate = results.n_rois, results.frame_rate
        contents, masks, masks_path = _plan(results, masks)
        command = "calcium infer" if contents.kind == "infer" else "calcium run"
        notes = [f"Results of `{command}` ({Path(results_path).name}), exported by calcium "
                 f"{attrs.get('calcium_version', '')}."]
        if contents.absent:
            notes.append("Not in this file (not in the results): " + "; ".join(contents.absent) + ".")
        if attrs.get("config_toml"):
            notes.append("Processing parameters (TOML):\n" + str(attrs["config_toml"]))
        nwb = pynwb.NWBFile(
            session_description=str(session_description),
            identifier=str(attrs.get("run_hash") or uuid.uuid4()),
            session_start_time=_session_start(session_start, attrs),
            experimenter=[experimenter] if experimenter else None,
            source_script=f"calcium {attrs.get('calcium_version', '')} ({command})",
            source_script_file_name="calcium.pipeline",
            notes="\n".join(notes),
        )
        device = nwb.create_device(name="microscope", description="imaging device (not recorded)")
        channel = OpticalChannel(name="channel", description="emission channel (not recorded)",
                                 emission_lambda=float("nan"))
        plane = nwb.create_imaging_plane(
            name="imaging_plane", optical_channel=channel, device=device, description="imaging plane",
            excitation_lambda=float("nan"), indicator=indicator or "unknown", location=location or "unknown",
            imaging_rate=float(rate))
        module = nwb.create_processing_module(
            "ophys", "calcium results: ROIs, ΔF/F, the model fit and the inferred activity (spike times in /units)")
        segmentation = ImageSegmentation(name="ImageSegmentation")
        module.add(segmentation)
        rois = segmentation.create_plane_segmentation(
            name="rois", imaging_plane=plane,
            description=(f"ROIs of the results; row i is ROI i; pixel masks from {contents.masks}" if contents.masks
                         else "ROIs of the results; row i is ROI i; the ROIs' shapes are unknown (the input was "
                              "traces): each ROI has one placeholder pixel (0, 0) of weight 0"))
        for roi in range(n_rois):
            if masks is None:
                pixels = [(0, 0, 0.0)]
            else:
                yy, xx = np.nonzero(masks[roi])
                pixels = [(int(x), int(y), 1.0) for x, y in zip(xx, yy)]  # NWB pixel masks are (x, y, weight)
            rois.add_roi(pixel_mask=pixels, id=roi)
        for name, description in _ROI_COLUMNS:
            if name in results:
                rois.add_column(name=name, description=description, data=_column_values(results.read(name)))
        region = rois.create_roi_table_region(region=list(range(n_rois)), description="every ROI, in order")

        containers = {}
        for name, container, nwb_name, unit, _, description in _SERIES:
            if name not in results:
                continue
            series = RoiResponseSeries(name=nwb_name, data=_transposed_iterator(results.dataset(name)), unit=unit,
                                       rois=region, rate=float(rate), starting_time=0.0, description=description)
            if container is None:
                module.add(series)
                continue
            if container not in containers:
                containers[container] = (DfOverF if container == "DfOverF" else Fluorescence)(name=container)
                module.add(containers[container])
            containers[container].add_roi_response_series(series)

        units = Units(name="units", description=(
            f"spikes inferred from each ROI's ΔF/F by {command} (non-negative deconvolution, counted in whole "
            f"spikes); one row per ROI, its id the ROI index and its column roi the ROI's row in "
            f"processing/ophys/ImageSegmentation/rois; a frame k holding n spikes gives n equal times "
            f"k / frame_rate + the frame's sub-frame offset (s, from the first frame)"))
        nwb.units = units
        units.add_column(name="roi", description="the ROI whose ΔF/F the spikes were inferred from", table=rois)
        columns = {name: results.read(name) for name, _ in _UNIT_COLUMNS if name in results}
        for name, description in _UNIT_COLUMNS:
            if name in columns:
                units.add_column(name=name, description=description)
        for roi, times in enumerate(_spike_trains(results)):
            units.add_unit(spike_times=times, roi=roi, id=roi,
                           **{name: values[roi].item() for name, values in columns.items()})
        inputs = [results_path] + ([masks_path] if masks_path is not None else [])
        with atomic_output(nwb_path, inputs=inputs) as tmp:
            with pynwb.NWBHDF5IO(str(tmp), "w") as io:
                io.write(nwb)
    return nwb_path
