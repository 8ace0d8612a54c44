"""The stages of a run, applied to one chunk of ROIs at a time.

Per chunk (in a worker): read the chunk's rows from the input -> ΔF/F ->
optional zero-phase filter -> noise -> spike inference -> quality checks.
Once, in the parent: extraction from a movie (before the chunks); kernel fit
and scoring for the ROIs with electrical spikes (after the chunks).

Every computation is a call to the public API of the science modules
(:mod:`calcium.signal`, :mod:`calcium.infer`, :mod:`calcium.fit`,
:mod:`calcium.score`, :mod:`calcium.extract`); this module only moves data
between them, keeps per-ROI failures from stopping the run, and says what
went wrong with each ROI.

A ROI that cannot be analysed (every frame missing, F0 <= 0, the inference
fails) is *flagged*: its results are NaN (counts 0), ``quality_flags`` has
:data:`FLAG_FAILED` set and ``flags`` says why. The other ROIs are unaffected.
"""
from __future__ import annotations

import math
import os
import sys
import threading
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from numba import njit

from .._checks import CalciumInputError
from .store import DatasetSpec

__all__ = [
    "TraceSource",
    "StageParams",
    "ChunkTask",
    "process_chunk",
    "result_datasets",
    "auto_chunk_rois",
    "chunk_bounds",
    "spike_table_text",
    "SPIKE_TABLE_KEY",
    "SPIKE_TIME_DECIMALS",
    "FLAG_FAILED",
    "FLAG_LOW_SNR",
    "FLAG_SATURATION",
    "FLAG_F0",
    "FLAG_MISSING",
    "FLAG_NOT_CONVERGED",
    "FLAG_UNCALIBRATED",
    "FLAG_NAMES",
    "describe_flags",
]

# Bits of the per-ROI ``quality_flags`` dataset.
FLAG_FAILED = 1          # no results for this ROI (reason in ``flags``)
FLAG_LOW_SNR = 2         # snr below quality.min_snr
FLAG_SATURATION = 4      # raw maximum repeated in many frames (clipping of the detector or digitiser)
FLAG_F0 = 8              # F0 <= 0 (ROI failed) or F0 clipped at dff.floor
FLAG_MISSING = 16        # more than quality.max_missing_fraction of the frames missing
FLAG_NOT_CONVERGED = 32  # the inference solver stopped before converging
FLAG_UNCALIBRATED = 64   # the single-spike size could not be identified: the spike counts are not to be trusted
FLAG_NAMES = {FLAG_FAILED: "failed", FLAG_LOW_SNR: "low SNR", FLAG_SATURATION: "saturation suspected",
              FLAG_F0: "F0 problem", FLAG_MISSING: "many missing frames", FLAG_NOT_CONVERGED: "not converged",
              FLAG_UNCALIBRATED: "uncalibrated counts"}
FLAG_TEXT_BYTES = 240
#: Decimals of the spike times in the spike table (microseconds; the results file keeps the exact offsets).
SPIKE_TIME_DECIMALS = 6

#: Key of the spike-table lines in the dict returned by :func:`process_chunk` (not a dataset).
SPIKE_TABLE_KEY = "spike_table_text"

# About this many values per chunk when execution.chunk_rois = 0: 2**21
# float64 values are 16 MiB per array, so a worker's temporaries stay in the
# tens of MiB whatever the length of the recording. At least 64 chunks when
# there are enough ROIs, so that the last chunks, computed while other workers
# are already idle, are short.
_AUTO_CHUNK_VALUES = 1 << 21
_AUTO_MIN_CHUNKS = 64
_AUTO_MAX_ROIS = 1024


def describe_flags(bits: int) -> str:
    """Names of the flags set in ``bits`` ("low SNR, many missing frames")."""
    return ", ".join(name for bit, name in FLAG_NAMES.items() if int(bits) & bit)


def auto_chunk_rois(n_rois: int, n_frames: int) -> int:
    """ROIs per chunk when not configured: bounded memory, and enough chunks to share out.

    Depends only on the data's shape (never on the number of workers), so a
    run resumed with another backend cuts the same chunks.
    """
    by_memory = max(1, _AUTO_CHUNK_VALUES // max(1, n_frames))
    by_count = max(1, math.ceil(n_rois / _AUTO_MIN_CHUNKS))
    return int(min(by_memory, by_count, _AUTO_MAX_ROIS))


def chunk_bounds(n_rois: int, chunk_rois: int) -> np.ndarray:
    """First ROI of each chunk and the end: ``[0, c, 2c, ..., n_rois]``."""
    return np.append(np.arange(0, n_rois, chunk_rois), n_rois).astype(np.int64)


# ---------------------------------------------------------------------------
# reading a chunk's rows (in the worker)
# ---------------------------------------------------------------------------
_OPEN_SOURCES: dict = {}
_MAX_OPEN_SOURCES = 4


@dataclass(frozen=True)
class TraceSource:
    """Where the traces are, so that each worker reads its own rows.

    Attributes
    ----------
    path : str
        A ``.npy`` file or an HDF5 file.
    kind : str
        "npy" or "hdf5".
    dataset : str or None
        HDF5 dataset name.
    n_rois, n_frames : int
    offset : int or None
        ``.npy`` in C order: byte offset of the data (rows are then read
        with plain file reads, which keep no pages mapped in the worker).
    dtype : str or None
        ``.npy``: the stored dtype.
    """

    path: str
    kind: str
    dataset: str | None
    n_rois: int
    n_frames: int
    offset: int | None = None
    dtype: str | None = None

    def _array(self):
        key = (self.path, self.kind, self.dataset)
        array = _OPEN_SOURCES.get(key)
        if array is None:
            if len(_OPEN_SOURCES) >= _MAX_OPEN_SOURCES:
                _OPEN_SOURCES.clear()  # (h5py closes files when their last reference goes)
            if self.kind == "npy":
                array = np.load(self.path, mmap_mode="r", allow_pickle=False)
            else:
                import h5py

                array = h5py.File(self.path, "r")[self.dataset]
            _OPEN_SOURCES[key] = array
        return array

    def read_rows(self, start: int, stop: int, out: np.ndarray | None = None) -> np.ndarray:
        """Rows ``start:stop`` as float64 (rois, frames), into ``out`` when given (a C-contiguous float64 array of
        that shape; then it is returned)."""
        shape = (stop - start, self.n_frames)
        if out is None:
            out = np.empty(shape)
        elif out.shape != shape or out.dtype != np.float64 or not out.flags.c_contiguous:
            raise ValueError(f"out must be a C-contiguous float64 array of shape {shape}, got {out.dtype} "
                             f"{out.shape}")
        if self.kind == "npy" and self.offset is not None:
            dtype = np.dtype(self.dtype)
            # float64 files are read straight into out; others through a byte buffer kept for the next chunk
            target = out if dtype == np.float64 else _spare_bytes(out.size * dtype.itemsize)
            with open(self.path, "rb") as handle:
                handle.seek(self.offset + start * self.n_frames * dtype.itemsize)
                wanted = out.size * dtype.itemsize
                got = handle.readinto(memoryview(target).cast("B")[:wanted])
            if got != wanted:
                raise CalciumInputError(f"{self.path} is shorter than its header says (truncated?)")
            if target is not out:
                np.copyto(out, target[:wanted].view(dtype).reshape(shape), casting="unsafe")
            return out
        array = self._array()
        if array.ndim == 1:
            rows = np.asarray(array[:]).reshape(1, -1)[start:stop]
        else:
            rows = array[start:stop]
        np.copyto(out, rows, casting="unsafe")
        return out


def _spare_bytes(n: int) -> np.ndarray:
    """A byte buffer of at least ``n`` bytes, kept for the next call (see _spare_arrays)."""
    spares = _spare_arrays()
    spare = spares.get("input bytes")
    if spare is None or spare.size < n:
        spare = spares["input bytes"] = np.empty(n, dtype=np.uint8)
    return spare


def _numeric_2d(shape, dtype, where: str) -> tuple[int, int]:
    if not (np.issubdtype(dtype, np.number) or dtype == bool) or np.issubdtype(dtype, np.complexfloating):
        raise CalciumInputError(f"{where}: traces must be real numbers, got dtype {dtype}")
    if len(shape) not in (1, 2) or 0 in shape:
        raise CalciumInputError(f"{where}: traces must have shape (rois, frames) or (frames,), got {shape}")
    return (1, int(shape[0])) if len(shape) == 1 else (int(shape[0]), int(shape[1]))


def _npy_data_offset(path: Path):
    """(byte offset of the data, C order?) from a .npy header (format versions 1.0 and 2.0)."""
    with open(path, "rb") as handle:
        version = np.lib.format.read_magic(handle)
        if version == (1, 0):
            _, fortran, _ = np.lib.format.read_array_header_1_0(handle)
        elif version == (2, 0):
            _, fortran, _ = np.lib.format.read_array_header_2_0(handle)
        else:
            return None, False
        return handle.tell(), not fortran


def npy_source(path) -> TraceSource:
    """A ``.npy`` traces file (rois, frames) or (frames,), read by rows without loading it."""
    path = Path(path)
    try:
        array = np.load(path, mmap_mode="r", allow_pickle=False)
        offset, c_order = _npy_data_offset(path)
    except (ValueError, OSError, EOFError) as exc:
        raise CalciumInputError(f"{path} is not a readable numeric .npy file: {exc}") from None
    n_rois, n_frames = _numeric_2d(array.shape, array.dtype, str(path))
    plain = c_order or array.ndim == 1
    # (an absolute path: workers of a dask cluster reached by address have folders of their own)
    return TraceSource(os.path.abspath(path), "npy", None, n_rois, n_frames, offset=offset if plain else None,
                       dtype=array.dtype.str)


def hdf5_source(path, dataset: str | None) -> tuple[TraceSource, float | None]:
    """An HDF5 traces dataset, found as :func:`calcium.io.read_traces` would, and its recorded frame rate."""
    from ..io import find_trace_dataset

    found = find_trace_dataset(path, dataset=dataset)
    n_rois, n_frames = _numeric_2d(found.shape, found.dtype, f"{found.path}:{found.dataset}")
    return TraceSource(os.path.abspath(found.path), "hdf5", found.dataset, n_rois, n_frames), found.frame_rate


# ---------------------------------------------------------------------------
# the per-chunk stages
# ---------------------------------------------------------------------------
@dataclass(frozen=True)
class StageParams:
    """Everything a worker needs besides the rows: the settings of each stage.

    Attributes
    ----------
    frame_rate : float
    dff : dict or None
        Keyword arguments of :func:`calcium.signal.delta_f_over_f`; None when
        the input already is ΔF/F (the stage is skipped).
    filter : calcium.signal.ZeroPhaseFilter or None
        Applied to ΔF/F before the inference (None: no filter).
    noise : dict
        Keyword arguments of :func:`calcium.signal.estimate_noise`.
    inference : dict
        Keyword arguments of :func:`calcium.infer.infer_spikes` (the noise
        level is passed per ROI).
    min_snr, max_missing_fraction : float
    saturation_frames : int
    keep_f0 : bool
        Return the per-frame baseline F0 (``f0``); its minimum ``f0_min``
        and the F0 flags are always computed.
    calibration : calcium.calibrate.SessionCalibration or None
        Count every ROI with this session calibration
        (:func:`calcium.calibrate.count_roi`; ``inference`` then only
        gives the threshold); None: :func:`calcium.infer_spikes` per ROI.
    uncalibrated : str
        When not "": why no calibration could be made; every ROI's counts
        are flagged as uncalibrated with this reason.
    check_dff : bool
        The input is ΔF/F given by the user: a ROI that looks like raw
        fluorescence (:func:`calcium._checks.check_dff_like`) is flagged
        "uncalibrated counts".
    rhythms : dict or None
        Keyword arguments of :func:`calcium.signal.rhythms.remove_rhythms`
        (``bands_hz``, ``method``, ``reference``): the session's shared
        rhythms, removed from each ROI after the filter and before the noise
        and the inference; None: nothing removed.
    """

    frame_rate: float
    dff: dict | None = field(default_factory=dict)
    filter: object = None
    noise: dict = field(default_factory=dict)
    inference: dict = field(default_factory=dict)
    min_snr: float = 3.0
    max_missing_fraction: float = 0.1
    saturation_frames: int = 3
    keep_f0: bool = True
    calibration: object = None
    uncalibrated: str = ""
    check_dff: bool = False
    rhythms: dict | None = None


@dataclass(frozen=True)
class ChunkTask:
    """One unit of work: rows ``start:stop`` of ``source``.

    With a ``writer`` (:class:`calcium.pipeline.store.RowWriter`) the worker
    writes the results into the results file itself and returns only the
    chunk's spike-table lines; without one it returns everything.
    """

    chunk_id: int
    start: int
    stop: int
    source: TraceSource
    params: StageParams
    writer: object = None


def result_datasets(n_rois: int, n_frames: int, *, filtered: bool, with_dff: bool = True,
                    with_f0: bool = True) -> list[DatasetSpec]:
    """Layout of the per-ROI results (see docs/hdf5-layout.md); ``with_dff=False`` for ΔF/F input,
    ``with_f0=False`` without the per-frame F0."""
    big = (n_rois, n_frames)
    one = (n_rois,)
    specs = []
    if with_dff:
        specs.append(DatasetSpec("dff", big, "f4", "ΔF/F = (F - F0) / F0; NaN at missing frames and for failed "
                                                   "ROIs", "ΔF/F"))
        if with_f0:
            specs.append(DatasetSpec("f0", big, "f4", "baseline fluorescence F0", "a.u."))
        specs.append(DatasetSpec("f0_min", one, "f8", "smallest F0 of the ROI", "a.u."))
    if filtered:
        specs.append(DatasetSpec("dff_filtered", big, "f4", "ΔF/F as the inference saw it: zero-phase filtered "
                                 "([filter]) and without the session's shared rhythms ([rhythms] action = remove)",
                                 "ΔF/F"))
    specs += [
        DatasetSpec("denoised", big, "f4", "denoised ΔF/F: the inferred activity convolved with the kernel, "
                                           "plus the baseline", "ΔF/F"),
        DatasetSpec("activity", big, "f4", "inferred spiking activity per frame (non-negative, in spikes)",
                    "spikes"),
        DatasetSpec("spike_counts", big, "u2", "whole spikes per frame; frame k is at k / frame_rate s", "spikes"),
        DatasetSpec("spike_time_offset_s", big, "f4", "sub-frame time of the spikes counted in frame k, relative "
                                                      "to k / frame_rate (their mean when several; 0 where none)",
                    "s"),
        DatasetSpec("baseline", one, "f8", "baseline of ΔF/F fitted by the inference", "ΔF/F"),
        DatasetSpec("noise_sd", one, "f8", "noise standard deviation of the (filtered) ΔF/F", "ΔF/F"),
        DatasetSpec("snr", one, "f8", "peak of (denoised - baseline) divided by noise_sd", ""),
        DatasetSpec("penalty", one, "f8", "sparsity penalty used by the inference", ""),
        DatasetSpec("n_spikes", one, "i8", "total whole spikes", "spikes"),
        DatasetSpec("kernel_rise_s", one, "f8", "rise time constant of the kernel used (0 = instantaneous)", "s"),
        DatasetSpec("kernel_decay_s", one, "f8", "decay time constant of the kernel used", "s"),
        DatasetSpec("kernel_amplitude", one, "f8", "peak ΔF/F of one spike in the kernel used", "ΔF/F"),
        DatasetSpec("converged", one, "u1", "1 if the inference solver converged", ""),
        DatasetSpec("spike_size", one, "f8", "ΔF/F (peak) of one spike used to count (calibrated runs; NaN "
                                             "otherwise)", "ΔF/F"),
        DatasetSpec("spike_size_low", one, "f8", "lower end of the 90 % interval of spike_size", "ΔF/F"),
        DatasetSpec("spike_size_high", one, "f8", "upper end of the 90 % interval of spike_size", "ΔF/F"),
        DatasetSpec("size_z", one, "f8", "spike_size in standard deviations of an event's size noise", ""),
        DatasetSpec("count_low", one, "i8", "spike count at the upper end of the spike-size interval", "spikes"),
        DatasetSpec("count_high", one, "i8", "spike count at the lower end of the spike-size interval", "spikes"),
        DatasetSpec("calibrated", one, "u1", "1 if the counts are calibrated (single-spike size identified), 0 "
                                             "if they are not to be trusted", ""),
        DatasetSpec("missing_frames", one, "i8", "number of missing (NaN/inf) frames of the input", "frames"),
        DatasetSpec("saturated_frames", one, "i8", "frames at which the raw trace equals its maximum", "frames"),
        DatasetSpec("quality_flags", one, "u2", "bit field: 1 failed, 2 low SNR, 4 saturation suspected, 8 F0 "
                                                "problem, 16 many missing frames, 32 not converged, 64 "
                                                "uncalibrated counts", ""),
        DatasetSpec("flags", one, f"text{FLAG_TEXT_BYTES}", "reasons for the flags, in words ('' = none)", ""),
    ]
    return specs


# (rois, frames) results and the value of a ROI that has none (ΔF/F failed, or the inference)
_FRAME_RESULTS = {"denoised": (np.float32, np.nan), "activity": (np.float32, np.nan),
                  "spike_counts": (np.uint16, 0), "spike_time_offset_s": (np.float32, 0.0),
                  "dff": (np.float32, np.nan), "f0": (np.float32, np.nan), "dff_filtered": (np.float32, np.nan)}
_INFERENCE_RESULTS = ("denoised", "activity", "spike_counts", "spike_time_offset_s")
# The (rois, frames) arrays of the last chunk this thread wrote to the results file, and its input rows, for the
# next chunk: fresh arrays of that size would each be new memory, and on a virtual machine every page of it costs a
# fault. One set per thread (a dask worker may run chunks in several threads).
_SPARES = threading.local()


def _spare_arrays() -> dict:
    """This thread's arrays kept for its next chunk (name -> array)."""
    arrays = getattr(_SPARES, "arrays", None)
    if arrays is None:
        arrays = _SPARES.arrays = {}
    return arrays


def _frame_array(name: str, n: int, n_frames: int) -> np.ndarray:
    """An uninitialised (n, n_frames) array for result ``name`` (the spare one when it fits)."""
    return _spare_array(name, n, n_frames, _FRAME_RESULTS[name][0])


def _spare_array(name: str, n: int, n_frames: int, dtype=np.float64) -> np.ndarray:
    """An uninitialised (n, n_frames) array: the spare one kept under ``name`` when it fits."""
    spare = _spare_arrays().pop(name, None)
    if spare is not None and spare.shape == (n, n_frames) and spare.dtype == dtype:
        return spare
    return np.empty((n, n_frames), dtype=dtype)


def release_spare_arrays() -> None:
    """Drop the arrays this thread kept for its next chunk (at the end of a run in this process)."""
    _spare_arrays().clear()


def _empty_results(n: int, n_frames: int, filtered: bool, with_dff: bool, with_f0: bool) -> dict:
    """The results of a chunk before its ROIs are processed; the (rois, frames) arrays are not initialised:
    :func:`_fill_unset_rows` gives the rows no stage wrote their value for 'none'."""
    out = {name: _frame_array(name, n, n_frames) for name in _INFERENCE_RESULTS}
    if with_dff:
        out.update(dff=_frame_array("dff", n, n_frames), f0_min=np.full(n, np.nan))
        if with_f0:
            out["f0"] = _frame_array("f0", n, n_frames)
    if filtered:
        out["dff_filtered"] = _frame_array("dff_filtered", n, n_frames)
    for name in ("baseline", "noise_sd", "snr", "penalty", "kernel_rise_s", "kernel_decay_s", "kernel_amplitude",
                 "spike_size", "spike_size_low", "spike_size_high", "size_z"):
        out[name] = np.full(n, np.nan)
    for name in ("n_spikes", "missing_frames", "saturated_frames", "count_low", "count_high"):
        out[name] = np.zeros(n, dtype=np.int64)
    out["converged"] = np.zeros(n, dtype=np.uint8)
    out["calibrated"] = np.zeros(n, dtype=np.uint8)
    out["quality_flags"] = np.zeros(n, dtype=np.uint16)
    return out


def _fill_unset_rows(out: dict, with_dff: np.ndarray, inferred: np.ndarray) -> None:
    """Rows of the (rois, frames) results that no stage wrote get the value of 'none' (NaN, or 0 spikes):
    ``with_dff`` marks the ROIs with ΔF/F (and filtered ΔF/F), ``inferred`` those with inference results."""
    for name, (_, none) in _FRAME_RESULTS.items():
        if name in out:
            unset = ~(inferred if name in _INFERENCE_RESULTS else with_dff)
            if unset.any():
                out[name][unset] = none


def _first_line(exc: BaseException) -> str:
    """The first sentence of an error message (the rest goes to the log of the run, not the flags)."""
    lines = str(exc).strip().splitlines()
    text = lines[0] if lines else type(exc).__name__
    return text.split(", so ")[0].split(". ")[0][:160]


def _dff_rows(raw: np.ndarray, params: StageParams, reasons: list, flags: np.ndarray, rows: np.ndarray):
    """ΔF/F of ``raw[rows]``; on an F0 failure, redo ROI by ROI to find (and flag) the bad ones.

    Returns (rows kept, their ΔF/F, F0 or None unless ``params.keep_f0``, lowest F0 of each, frames at the
    F0 floor of each) (:func:`calcium.signal.delta_f_over_f_rows`: F0 at every frame is only built
    when it is kept).
    """
    from ..signal import delta_f_over_f_rows

    try:
        # (rows are increasing: all of them means the whole block, which needs no copy)
        result = delta_f_over_f_rows(raw if rows.size == raw.shape[0] else raw[rows], params.frame_rate,
                                     keep_f0=params.keep_f0, **params.dff)
        return rows, result.dff, result.f0, result.f0_min, result.at_floor
    except ValueError:
        pass
    kept, parts = [], []
    for i in rows:
        try:
            result = delta_f_over_f_rows(raw[i], params.frame_rate, keep_f0=params.keep_f0, **params.dff)
        except ValueError as exc:
            flags[i] |= FLAG_FAILED | (FLAG_F0 if "F0" in str(exc) else 0)
            reasons[i].append(("F0 <= 0: " if "F0" in str(exc) else "ΔF/F failed: ") + _first_line(exc))
            continue
        kept.append(i)
        parts.append(result)
    if not kept:
        return np.zeros(0, dtype=np.intp), None, None, None, None
    return (np.asarray(kept), np.vstack([r.dff for r in parts]),
            np.vstack([r.f0 for r in parts]) if params.keep_f0 else None,
            np.concatenate([r.f0_min for r in parts]), np.concatenate([r.at_floor for r in parts]))


def process_chunk(task: ChunkTask) -> dict:
    """Run the per-chunk stages on rows ``task.start:task.stop``; return the results by dataset name.

    Arrays have the chunk's ROIs as first axis; (rois, frames) results are
    float32, counts uint16. Per-ROI failures are flagged, never raised.
    The entry :data:`SPIKE_TABLE_KEY` holds the chunk's lines of the spike
    table (:func:`spike_table_text`). With ``task.writer`` the results it
    covers (every per-ROI dataset) are written to the results file here and
    left out of the returned dict.
    """
    raw = task.source.read_rows(task.start, task.stop, out=_spare_array("input", task.stop - task.start,
                                                                       task.source.n_frames))
    out = _process_rows(raw, task.start, task.params)
    _spare_arrays()["input"] = raw  # (no result refers to it)
    if task.writer is not None:
        task.writer.write(task.start, out)
        for name in task.writer.names:
            if name in _FRAME_RESULTS:
                _spare_arrays()[name] = out[name]  # written: the next chunk may fill it again
            del out[name]
    return out


def _process_rows(raw: np.ndarray, first_roi: int, params: StageParams) -> dict:
    """The stages of :func:`process_chunk` on rows already read (ROIs ``first_roi``, ``first_roi + 1``, ...)."""
    n, n_frames = raw.shape
    filtered = params.filter is not None or params.rhythms is not None
    with_dff = params.dff is not None
    out = _empty_results(n, n_frames, filtered, with_dff, with_dff and params.keep_f0)
    flags = out["quality_flags"]
    reasons: list[list[str]] = [[] for _ in range(n)]
    inferred = np.zeros(n, dtype=bool)

    n_finite, top, at_top = _scan_rows(raw)
    n_missing = n_frames - n_finite
    out["missing_frames"][:] = n_missing
    too_many = n_missing > params.max_missing_fraction * n_frames
    for i in np.flatnonzero(too_many):
        flags[i] |= FLAG_MISSING
        if n_missing[i] == n_frames:
            flags[i] |= FLAG_FAILED
            reasons[i].append("every frame is missing")
        else:
            reasons[i].append(f"{n_missing[i]} of {n_frames} frames missing ({n_missing[i] / n_frames:.0%})")
    _saturation(top, at_top, params, out, flags, reasons)

    usable = np.flatnonzero(n_missing < n_frames)
    if with_dff:
        rows, dff, f0, f0_min, at_floor = _dff_rows(raw, params, reasons, flags, usable)
    else:
        rows, dff = usable, raw[usable]
    if rows.size and with_dff:
        out["dff"][rows] = dff
        if "f0" in out:
            out["f0"][rows] = f0
        out["f0_min"][rows] = f0_min
        floor = params.dff.get("floor")
        if floor is not None:
            for k, i in enumerate(rows):
                clipped = int(at_floor[k])
                if clipped:
                    flags[i] |= FLAG_F0
                    reasons[i].append(f"F0 clipped at the floor {floor:g} in {clipped} frames")
    if rows.size:
        signal = _inference_input(dff, params)
        if filtered:
            out["dff_filtered"][rows] = signal
        noise = _noise_rows(signal, params, rows, reasons)
        for k, i in enumerate(rows):
            inferred[i] = _infer_roi(signal[k], noise[k], i, params, out, flags, reasons, roi=first_roi + i)
    with_dff_rows = np.zeros(n, dtype=bool)
    with_dff_rows[rows] = True
    _fill_unset_rows(out, with_dff_rows, inferred)

    out["flags"] = np.array(["; ".join(r) for r in reasons], dtype=object)
    out[SPIKE_TABLE_KEY] = spike_table_text(first_roi, out["spike_counts"], out["spike_time_offset_s"],
                                            params.frame_rate)
    return out


def warm_up() -> None:
    """Run the per-chunk stages once on a small invented chunk, so that later chunks start at full speed.

    Loads every compiled (numba) function a chunk needs from its cache, and
    the libraries behind the stages. Called once in the process that forks
    the workers (see :mod:`calcium.pipeline._preload`): every worker then
    starts with all of it loaded instead of loading it on its first chunk.
    """
    rng = np.random.default_rng(0)
    frame_rate, n_frames = 30.0, 1200
    t = np.arange(60) / frame_rate
    response = 0.3 * (np.exp(-t / 0.8) - np.exp(-t / 0.08))
    spikes = (rng.random((2, n_frames)) < 0.02).astype(np.float64)
    dff = np.array([np.convolve(row, response)[:n_frames] for row in spikes])
    raw = 100.0 * (1.0 + dff + rng.normal(0.0, 0.02, dff.shape))
    raw[1, 300:310] = np.nan  # the weighted (missing frames) variants of the solvers as well
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        _process_rows(raw, 0, StageParams(frame_rate=frame_rate))


def spike_table_text(first_roi: int, counts: np.ndarray, offsets_s: np.ndarray, frame_rate: float) -> str:
    """Lines ``roi,time_s,count`` of the spike table for consecutive ROIs from ``first_roi``.

    One line per frame with spikes, at ``k / frame_rate + offset`` (at least
    0) with the frame's count; a ROI without spikes gets ``roi,,0``. The
    times are written to :data:`SPIKE_TIME_DECIMALS` decimals (the exact
    values are in the results file), as :func:`calcium.io.write_spike_table`
    writes them with that many ``decimals``.
    """
    from ..io.spike_text import fixed_lines, time_units

    # (np.nonzero on a 2-D uint16 array is ten times slower than on a flat boolean one)
    rows, frames = np.divmod(np.flatnonzero(counts != 0), counts.shape[1])
    times = np.maximum(frames / frame_rate + offsets_s[rows, frames].astype(np.float64), 0.0)
    units = time_units(times, SPIKE_TIME_DECIMALS)
    n = counts[rows, frames]
    quiet = np.flatnonzero(~np.any(counts, axis=1))
    if quiet.size:  # one line "roi,,0" each, in ROI order among the others (rows come in order)
        rows = np.concatenate([rows, quiet])
        order = np.argsort(rows, kind="stable")
        rows = rows[order]
        units = np.concatenate([units, np.full(quiet.size, -1, np.int64)])[order]
        n = np.concatenate([n, np.zeros(quiet.size, n.dtype)])[order]
    return fixed_lines(rows + int(first_roi), units, n, SPIKE_TIME_DECIMALS)


def _saturation(top: np.ndarray, at_top: np.ndarray, params: StageParams, out: dict, flags, reasons) -> None:
    """Frames at each row's maximum (from :func:`_scan_rows`); a ROI with too many is flagged."""
    if params.saturation_frames <= 0:
        return
    out["saturated_frames"][:] = at_top
    for i in np.flatnonzero(at_top >= params.saturation_frames):
        flags[i] |= FLAG_SATURATION
        reasons[i].append(f"raw maximum {top[i]:g} reached in {at_top[i]} frames (saturation?)")


@njit(cache=True)
def _scan_rows(raw):  # pragma: no cover - compiled
    """One pass over each row: its finite frames, its largest finite value (NaN if none) and the frames
    equal to that value (0 if none)."""
    n_rows, n_frames = raw.shape
    n_finite = np.zeros(n_rows, dtype=np.int64)
    top = np.full(n_rows, np.nan)
    at_top = np.zeros(n_rows, dtype=np.int64)
    for r in range(n_rows):
        row = raw[r]
        count = 0
        best = -np.inf
        for t in range(n_frames):
            x = row[t]
            if np.isfinite(x):
                count += 1
                if x > best:
                    best = x
        n_finite[r] = count
        if count:
            top[r] = best
            same = 0
            for t in range(n_frames):
                if row[t] == best:
                    same += 1
            at_top[r] = same
    return n_finite, top, at_top


def _inference_input(dff: np.ndarray, params: StageParams) -> np.ndarray:
    """ΔF/F as the inference sees it: through the configured filter, then without the session's shared rhythms."""
    signal = dff if params.filter is None else params.filter.apply(dff)
    if params.rhythms is not None and len(params.rhythms.get("bands_hz", ())):
        from ..signal.rhythms import remove_rhythms

        signal = remove_rhythms(signal, params.frame_rate, **params.rhythms).cleaned
    return signal


def _noise_rows(signal: np.ndarray, params: StageParams, rows: np.ndarray, reasons: list) -> np.ndarray:
    """Noise s.d. of each row (NaN where it cannot be estimated; the inference then estimates its own).

    One call for the chunk (estimate_noise works row by row: a ROI's value does not depend on the other
    ROIs of its chunk); if it fails, one call per ROI, so that only the ROIs that fail lose their value.
    """
    from ..signal import estimate_noise

    try:
        return np.asarray(estimate_noise(signal, params.frame_rate, **params.noise), dtype=np.float64)
    except ValueError:
        pass
    noise = np.full(len(rows), np.nan)
    for k, i in enumerate(rows):
        try:
            noise[k] = float(estimate_noise(signal[k], params.frame_rate, **params.noise))
        except ValueError as exc:
            reasons[i].append("noise not estimated: " + _first_line(exc))
    return noise


def _infer_roi(trace: np.ndarray, noise_sd: float, i: int, params: StageParams, out: dict, flags,
               reasons, *, roi: int) -> bool:
    from ..infer import infer_spikes

    counted = None
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # per-ROI trouble is reported through the flags instead
            if params.calibration is not None:
                from ..calibrate import count_roi

                counted = count_roi(trace, params.frame_rate, params.calibration, roi,
                                    noise_sd=noise_sd if noise_sd > 0 else None,
                                    threshold=params.inference.get("threshold", 0.5))
                result = counted.result
            else:
                # (raw-looking ΔF/F input is refused or flagged for the run, below and in infer_file)
                result = infer_spikes(trace, params.frame_rate, noise_sd=noise_sd if noise_sd > 0 else None,
                                      allow_raw=True, **params.inference)
    except (ValueError, ArithmeticError, RuntimeError, np.linalg.LinAlgError) as exc:
        flags[i] |= FLAG_FAILED
        reasons[i].append("inference failed: " + _first_line(exc))
        return False
    if counted is not None:
        out["spike_size"][i] = counted.spike_size
        out["spike_size_low"][i] = counted.spike_size_low
        out["spike_size_high"][i] = counted.spike_size_high
        out["size_z"][i] = counted.size_z
        out["count_low"][i] = counted.count_low
        out["count_high"][i] = counted.count_high
        out["calibrated"][i] = counted.calibrated
        if not counted.calibrated:
            flags[i] |= FLAG_UNCALIBRATED
            reasons[i].append("uncalibrated counts: " + counted.reason)
    elif params.uncalibrated:
        flags[i] |= FLAG_UNCALIBRATED
        reasons[i].append("uncalibrated counts: " + params.uncalibrated)
    if params.check_dff:
        from .._checks import check_dff_like

        if check_dff_like(trace, "ΔF/F", allow_raw=True).any():
            flags[i] |= FLAG_UNCALIBRATED
            reasons[i].append("uncalibrated counts: the values look like raw fluorescence, not ΔF/F")
    counts = np.asarray(result.spike_counts, dtype=np.int64)
    out["activity"][i] = result.activity
    out["denoised"][i] = result.denoised
    out["spike_counts"][i] = np.clip(counts, 0, np.iinfo(np.uint16).max)
    times = np.asarray(result.spike_times, dtype=np.float64)
    if not _offsets_into(times, float(params.frame_rate), out["spike_time_offset_s"][i]):
        out["spike_time_offset_s"][i] = _time_offsets(times, counts.size, params.frame_rate)
    out["n_spikes"][i] = int(counts.sum())
    out["baseline"][i] = float(result.baseline)
    noise = float(result.noise_sd)
    out["noise_sd"][i] = noise
    out["penalty"][i] = float(result.penalty)
    kernel = result.kernel
    if kernel is not None:
        out["kernel_rise_s"][i] = kernel.rise_s
        out["kernel_decay_s"][i] = kernel.decay_s
        out["kernel_amplitude"][i] = kernel.amplitude
    out["converged"][i] = bool(result.converged)
    if not result.converged:
        flags[i] |= FLAG_NOT_CONVERGED
        reasons[i].append("inference did not converge")
    denoised = np.asarray(result.denoised, dtype=np.float64)
    peak = float(np.max(denoised - result.baseline)) if np.isfinite(denoised).all() else np.nan
    snr = peak / noise if noise > 0 and np.isfinite(peak) else np.nan
    out["snr"][i] = snr
    if not snr >= params.min_snr:
        flags[i] |= FLAG_LOW_SNR
        reasons[i].append(f"SNR {snr:.2g} below {params.min_snr:g}" if np.isfinite(snr) else
                          "SNR undefined (no signal or no noise estimate)")
    return True


@njit(cache=True, inline="always")
def _frame_of(t, frame_rate, n_frames):  # pragma: no cover - compiled
    """The frame a time falls in, round(t * frame_rate) (halves to even) clipped to the recording."""
    return min(max(np.int64(np.rint(t * frame_rate)), 0), n_frames - 1)


@njit(cache=True)
def _offsets_into(times, frame_rate, out):  # pragma: no cover - compiled
    """:func:`_time_offsets` of increasing spike times, written into the row ``out`` in one pass (no
    per-frame sums: the spikes of a frame are neighbours), with the same operations in the same order.
    Returns False, writing nothing, when the times are not increasing or not all numbers."""
    n_frames = out.shape[0]
    m = times.shape[0]
    for k in range(m):
        if times[k] != times[k] or (k > 0 and times[k] < times[k - 1]):
            return False
    out[:] = 0.0
    k = 0
    while k < m:
        frame = _frame_of(times[k], frame_rate, n_frames)
        total = 0.0
        number = 0
        while k < m and _frame_of(times[k], frame_rate, n_frames) == frame:
            total += times[k] - frame / frame_rate
            number += 1
            k += 1
        out[frame] = total / number
    return True


def _time_offsets(times: np.ndarray, n_frames: int, frame_rate: float) -> np.ndarray:
    """Mean of (t - k / frame_rate) over the spikes counted in frame k = round(t * frame_rate)."""
    offsets = np.zeros(n_frames)
    if times.size:
        frames = np.clip(np.round(times * frame_rate).astype(np.int64), 0, n_frames - 1)
        total = np.bincount(frames, weights=times - frames / frame_rate, minlength=n_frames)
        number = np.bincount(frames, minlength=n_frames)
        np.divide(total, number, out=offsets, where=number > 0)
    return offsets


# ---------------------------------------------------------------------------
# after the chunks, in the parent: ROIs with electrically recorded spikes
# ---------------------------------------------------------------------------
_FIT_FIELDS = (("rise_s", "s", "rise time constant of the fitted kernel"),
               ("decay_s", "s", "decay time constant of the fitted kernel"),
               ("amplitude", "ΔF/F", "peak ΔF/F of one spike in the fitted kernel"),
               ("half_rise_s", "s", "time from the spike to half the peak, fitted kernel"),
               ("half_decay_s", "s", "time from the peak to half the peak, fitted kernel"),
               ("time_to_peak_s", "s", "time from the spike to the peak, fitted kernel"),
               ("lag_s", "s", "clock offset to add to the electrical spike times"),
               ("r_squared", "", "fraction of the ΔF/F variance explained by the fit"),
               ("half_decay_low_s", "s", "lower end of the bootstrap interval of half_decay_s"),
               ("half_decay_high_s", "s", "upper end of the bootstrap interval of half_decay_s"))
_SCORE_FIELDS = (("precision", "", "fraction of inferred spikes matched to an electrical spike"),
                 ("recall", "", "fraction of electrical spikes matched by an inferred spike"),
                 ("f1", "", "harmonic mean of precision and recall"),
                 ("timing_error_mean_s", "s", "mean of t_inferred - t_electrical over matched pairs"),
                 ("timing_error_sd_s", "s", "s.d. of t_inferred - t_electrical over matched pairs"),
                 ("van_rossum", "", "van Rossum distance between the trains"))
_SCORE_COUNTS = (("n_true", "electrical spikes"), ("n_inferred", "inferred spikes"),
                 ("n_matched", "matched pairs"))


def electrical_datasets(n_electrical: int, n_bins: int) -> list[DatasetSpec]:
    """Layout of the ``electrical/`` group (one row per ROI with electrical spikes)."""
    if n_electrical == 0:
        return []
    one = (n_electrical,)
    specs = [DatasetSpec("electrical/roi", one, "i8", "ROI index of each row", per_roi=False)]
    specs += [DatasetSpec(f"electrical/fit_{name}", one, "f8", text, unit, per_roi=False, fill=np.nan)
              for name, unit, text in _FIT_FIELDS]
    specs += [DatasetSpec("electrical/fit_n_isolated", one, "i8", "isolated spikes used by the fit", "spikes",
                          per_roi=False, fill=0),
              DatasetSpec("electrical/kinetics_ok", one, "u1", "1 if the fitted kinetics lie within the reference "
                          "range of inference.indicator (0 if outside or not checked)", per_roi=False, fill=0)]
    specs += [DatasetSpec(f"electrical/score_{name}", one, "f8", text, unit, per_roi=False, fill=np.nan)
              for name, unit, text in _SCORE_FIELDS]
    specs += [DatasetSpec(f"electrical/score_{name}", one, "i8", text, "spikes", per_roi=False, fill=0)
              for name, text in _SCORE_COUNTS]
    specs += [
        DatasetSpec("electrical/score_correlation", (n_electrical, n_bins), "f8",
                    "Pearson correlation of binned spike counts, one column per bin width", per_roi=False,
                    fill=np.nan),
        DatasetSpec("electrical/bin_widths_s", (n_bins,), "f8", "bin widths of score_correlation", "s",
                    per_roi=False),
        DatasetSpec("electrical/note", one, f"text{FLAG_TEXT_BYTES}",
                    "kinetics outside the reference range, or why a fit or score is missing ('' = fine)",
                    per_roi=False),
    ]
    return specs


def inferred_spike_times(counts: np.ndarray, offsets_s: np.ndarray, frame_rate: float) -> np.ndarray:
    """Spike times (s) of one ROI from its results: k / frame_rate + offset, repeated count times, sorted."""
    frames = np.flatnonzero(counts)
    times = frames / frame_rate + np.asarray(offsets_s, dtype=np.float64)[frames]
    return np.repeat(np.maximum(times, 0.0), np.asarray(counts)[frames].astype(np.int64))


def _fit_values(result) -> dict:
    kernel = result.kernel
    values = {name: float(getattr(kernel, name)) for name in
              ("rise_s", "decay_s", "amplitude", "half_rise_s", "half_decay_s", "time_to_peak_s")}
    values["lag_s"] = float(result.lag_s)
    values["r_squared"] = float(result.r_squared)
    if result.confidence is not None:
        values["half_decay_low_s"], values["half_decay_high_s"] = map(float, result.confidence.half_decay_s)
    return values


def electrical_step(store, electrical: dict, frame_rate: float, n_frames: int, *, fit_options: dict, scoring,
                    indicator=None, progress=False) -> None:
    """Kernel fit and scoring of every ROI with electrical spikes; written to ``electrical/``.

    ``fit_options`` are keyword arguments of :func:`calcium.fit.fit_kernel`;
    the fitted kinetics are checked against ``indicator`` (if given) with
    :func:`calcium.fit.check_kinetics`. A ROI whose fit or score fails gets
    NaN and a note; the others are unaffected.
    """
    from ..fit import check_kinetics, fit_kernel
    from ..score import score_spikes
    from .executors import progress_bar

    rois = sorted(electrical)
    bar = progress_bar("kernel fit + scoring" if progress else False, total=len(rois), unit="ROI")
    duration_s = n_frames / frame_rate
    fit = {name: np.full(len(rois), np.nan) for name, _, _ in _FIT_FIELDS}
    n_isolated = np.zeros(len(rois), dtype=np.int64)
    kinetics_ok = np.zeros(len(rois), dtype=np.uint8)
    score = {name: np.full(len(rois), np.nan) for name, _, _ in _SCORE_FIELDS}
    counts = {name: np.zeros(len(rois), dtype=np.int64) for name, _ in _SCORE_COUNTS}
    correlation = np.full((len(rois), len(scoring.bin_widths_s)), np.nan)
    notes = [[] for _ in rois]
    for row, roi in enumerate(rois):
        true_times = np.asarray(electrical[roi], dtype=np.float64)
        dff = store.read("dff", roi).astype(np.float64)
        inferred = inferred_spike_times(store.read("spike_counts", roi), store.read("spike_time_offset_s", roi),
                                        frame_rate)
        if store.read("quality_flags", roi) & FLAG_FAILED:
            notes[row].append("ROI failed in the per-ROI stages (see flags)")
        else:
            try:
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore")
                    result = fit_kernel(dff, true_times, frame_rate, **fit_options)
                for name, value in _fit_values(result).items():
                    fit[name][row] = value
                n_isolated[row] = int(result.n_isolated)
                if indicator is not None:
                    check = check_kinetics(result, indicator)
                    kinetics_ok[row] = bool(check.ok)
                    if not check.ok:
                        outside = [r.quantity for r in check.rows if not r.ok]
                        notes[row].append(f"kinetics outside the {check.indicator} range: " + ", ".join(outside))
            except (ValueError, ArithmeticError, RuntimeError, np.linalg.LinAlgError) as exc:
                notes[row].append("kernel fit failed: " + _first_line(exc))
            # on the imaging clock: the fitted lag is what must be added to the electrical times
            lag = fit["lag_s"][row]
            aligned = true_times + (lag if np.isfinite(lag) else 0.0)
            if not np.isfinite(lag):
                notes[row].append("scored without a clock lag (the kernel fit failed)")
            try:
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore")
                    result = score_spikes(inferred, aligned[aligned >= 0], tolerance_s=scoring.tolerance_s,
                                          bin_widths_s=scoring.bin_widths_s, duration_s=duration_s,
                                          van_rossum_tau_s=scoring.van_rossum_tau_s)
                for name, _, _ in _SCORE_FIELDS:
                    score[name][row] = float(getattr(result, name))
                for name, _ in _SCORE_COUNTS:
                    counts[name][row] = int(getattr(result, name))
                correlation[row] = [r for _, r in result.correlations]
            except (ValueError, ArithmeticError) as exc:
                notes[row].append("scoring failed: " + _first_line(exc))
        if bar is not None:
            bar.update(1)
    if bar is not None:
        bar.close()
    store.write_rows("electrical/roi", (), np.asarray(rois, dtype=np.int64))
    for name, values in fit.items():
        store.write_rows(f"electrical/fit_{name}", (), values)
    store.write_rows("electrical/fit_n_isolated", (), n_isolated)
    store.write_rows("electrical/kinetics_ok", (), kinetics_ok)
    for name, values in score.items():
        store.write_rows(f"electrical/score_{name}", (), values)
    for name, values in counts.items():
        store.write_rows(f"electrical/score_{name}", (), values)
    store.write_rows("electrical/score_correlation", (), correlation)
    store.write_rows("electrical/bin_widths_s", (), np.asarray(scoring.bin_widths_s, dtype=np.float64))
    store.write_rows("electrical/note", (), np.array(["; ".join(n) for n in notes], dtype=object))
    store.set_flag("electrical")


# ---------------------------------------------------------------------------
# the session calibration (once, in the parent, before the chunks)
# ---------------------------------------------------------------------------
#: The session calibration of a run (kinetics, prior of the sizes, paired ROIs, summary; JSON text), written once.
CALIBRATION_DATASET = DatasetSpec("calibration/session_json", (1,), "text16000",
                                  "session calibration the counts were made with (JSON: source, kinetics, "
                                  "distribution of single-spike sizes, paired ROIs, summary); '' when none",
                                  per_roi=False, fill=0)


def calibration_rois(n_rois: int, max_rois: int, keep=()) -> np.ndarray:
    """At most ``max_rois`` ROI indices spread evenly over ``n_rois``, always including ``keep``."""
    keep = sorted({int(r) for r in keep if 0 <= int(r) < n_rois})
    room = max(max_rois - len(keep), 0)
    spread = np.unique(np.linspace(0, n_rois - 1, min(room, n_rois)).round().astype(np.int64)) if room else []
    return np.unique(np.concatenate([np.asarray(spread, dtype=np.int64), np.asarray(keep, dtype=np.int64)]))


def calibration_signal(source: TraceSource, params: StageParams, rois: np.ndarray):
    """The inference's input (ΔF/F, filtered as configured) of the ROIs ``rois``: (rois kept, rows)."""
    raw = np.vstack([source.read_rows(int(i), int(i) + 1) for i in rois])
    reasons = [[] for _ in rois]
    flags = np.zeros(len(rois), dtype=np.uint16)
    finite = np.isfinite(raw).any(axis=1)
    usable = np.flatnonzero(finite)
    if params.dff is not None:
        kept, signal, _, _, _ = _dff_rows(raw, params, reasons, flags, usable)
    else:
        kept, signal = usable, raw[usable]
    if kept.size:
        signal = _inference_input(signal, params)
    return np.asarray(rois)[kept], signal


def session_calibration(source: TraceSource, params: StageParams, *, how: str, electrical=None, indicator=None,
                        kernel=None, size_given=False, calibration_file=None, max_rois: int = 64, fit_options=None,
                        progress=False):
    """The session calibration a run counts with (None for ``how = "per-roi"``).

    ``how`` is the configuration's ``calibration.source``; with ``how =
    "given"`` and ``size_given``, ``kernel`` (its amplitude the single-spike
    size) counts every ROI as it is.  The kinetics and
    the prior of the sizes are learned on at most ``max_rois`` ROIs (the
    paired ones always among them); :meth:`SessionCalibration.for_session`
    then leaves every other ROI's size to :func:`calcium.calibrate.count_roi`
    in the workers.
    """
    from ..calibrate import SessionCalibration, calibrate_session, load_calibration

    n = source.n_rois
    if how == "per-roi":
        return None
    if how == "file":
        cal = load_calibration(calibration_file)
        if abs(cal.frame_rate - params.frame_rate) > 1e-6 * params.frame_rate:
            raise ValueError(f"{calibration_file}: the calibration was made at {cal.frame_rate:g} Hz, the recording "
                             f"is at {params.frame_rate:g} Hz")
        # (a calibration of another session brings its kinetics and its distribution of sizes, not sizes)
        return cal if cal.n_rois == n else cal.for_session(n, rois=())
    if how == "given" and size_given:
        return SessionCalibration.fixed(kernel, n, params.frame_rate, indicator=indicator)
    paired = {int(k): v for k, v in (electrical or {}).items()} if how in ("auto", "paired") else {}
    rois = calibration_rois(n, max_rois, keep=paired)
    kept, signal = calibration_signal(source, params, rois)
    if not kept.size:
        raise ValueError("no ROI has a usable ΔF/F to calibrate the session with")
    own = {int(np.flatnonzero(kept == roi)[0]): times for roi, times in paired.items() if roi in kept}
    fixed_kernel = kernel if how in ("given", "indicator") else None
    if how == "indicator" and fixed_kernel is None and indicator is not None:
        from ..kernel import Kernel

        fixed_kernel = Kernel.from_indicator(indicator)
    cal = calibrate_session(signal, params.frame_rate, electrical_spikes=own or None, indicator=indicator,
                            kernel=fixed_kernel, fit_options=fit_options, progress=progress)
    if how == "indicator" and cal.source == "given":
        import dataclasses

        cal = dataclasses.replace(cal, source="indicator")
    return cal.for_session(n, rois=kept)


# ---------------------------------------------------------------------------
# the session's shared rhythms (once, in the parent, before the chunks and the calibration)
# ---------------------------------------------------------------------------
#: What the rhythm search found (JSON: settings, ROIs searched, every rhythm with its verdict), written once.
RHYTHMS_RECORD = "rhythms/summary_json"
#: Per-frequency results of the search, each (bins,): name -> description.
RHYTHM_SPECTRA = {
    "freq_hz": "frequencies of the spectra",
    "median_power": "median over the ROIs searched of the Welch power spectral density of the inference's input",
    "power_low": "10th percentile over the ROIs searched of that density",
    "power_high": "90th percentile over the ROIs searched of that density",
    "background": "median over the ROIs searched of the aperiodic background of their spectra",
    "coherence": "median magnitude-squared coherence of the ROIs with the average of the others",
    "statistic": "power over background in the ROIs sharing a peak most (quantile 1 - min_share)",
    "threshold": "level the statistic had to exceed (NaN outside the frequencies searched)",
    "median_power_after": "median power spectral density after removal (NaN unless [rhythms] action = remove)",
}
# estimate_noise takes its spectrum from 256-frame Welch segments (its documented default), whose Hann main lobe
# spreads a line over two of its bins on each side: the bands left out of the noise are widened by that much.
_NOISE_SEGMENT = 256


def rhythm_bins(n_frames: int, frame_rate: float, segment_s: float) -> int:
    """Frequencies of the rhythm spectra of a session (1 when the recording is too short for any)."""
    from ..signal.rhythms import segment_frames

    try:
        return segment_frames(segment_s, frame_rate, n_frames) // 2 + 1
    except ValueError:
        return 1


def rhythm_datasets(n_frames: int, frame_rate: float, segment_s: float, *, neuropil_rois: int = 0) -> list[DatasetSpec]:
    """Layout of the ``rhythms/`` group: the record, the spectra, the average of the ROIs searched and, for a
    movie, the neuropil of the ROIs searched (``neuropil_rois`` of them)."""
    bins = (rhythm_bins(n_frames, frame_rate, segment_s),)
    specs = [DatasetSpec(RHYTHMS_RECORD, (1,), "text64000", "shared rhythms found in the session (JSON: settings, "
                         "ROIs searched, each rhythm's frequency, band, share, amplitude, coherence, steadiness and "
                         "verdict); '' when the search was not run", per_roi=False, fill=0)]
    specs += [DatasetSpec(f"rhythms/{name}", bins, "f8", text, "Hz" if name == "freq_hz" else "", per_roi=False,
                          fill=np.nan) for name, text in RHYTHM_SPECTRA.items()]
    specs.append(DatasetSpec("rhythms/session_average", (n_frames,), "f4", "average over the ROIs searched of the "
                             "inference's input before removal (for the scalogram and the phase of each rhythm)",
                             "ΔF/F", per_roi=False, fill=np.nan))
    if neuropil_rois:
        specs += [DatasetSpec("rhythms/neuropil", (neuropil_rois, n_frames), "f4", "neuropil ring of each ROI searched "
                              "(movie input), relative to its mean: F / mean(F) - 1", "", per_roi=False, fill=np.nan),
                  DatasetSpec("rhythms/neuropil_power", bins, "f8", "median over the ROIs searched of the power "
                              "spectral density of their neuropil", "", per_roi=False, fill=np.nan)]
    return specs


def keep_searched_neuropil(store, neuropil_f: np.ndarray, max_rois: int) -> None:
    """Write the neuropil of the ROIs the rhythm search will use (rows of :func:`calibration_rois`), relative to
    its mean, into ``rhythms/neuropil`` (at the extraction, the only time it is at hand)."""
    rows = np.asarray(neuropil_f, dtype=np.float64)[calibration_rois(neuropil_f.shape[0], max_rois)]
    with np.errstate(invalid="ignore", divide="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        relative = rows / np.nanmean(rows, axis=1, keepdims=True) - 1.0
    store.write_rows("rhythms/neuropil", (), relative.astype(np.float32))


def _rhythm_record(found, rois, action: str, method: str, removal) -> dict:
    """The JSON record of a search (plain numbers and words)."""
    spectra = found.spectra
    return {"action": action, "method": method, "n_rois": int(len(rois)), "rois": [int(r) for r in rois],
            "reference": spectra.reference,
            "segment_s": spectra.segment_s, "resolution_hz": spectra.resolution_hz, "min_share": found.min_share,
            "false_alarm": found.false_alarm, "lowest_hz": found.lowest_hz, "summary": found.summary(),
            "removal": "" if removal is None else removal.describe(),
            "rhythms": [{"frequency_hz": r.frequency_hz, "band_hz": list(r.band_hz), "power_ratio": r.power_ratio,
                         "z": r.z, "share": r.share, "amplitude": r.amplitude,
                         "amplitude_to_noise": r.amplitude_to_noise, "coherence": r.coherence,
                         "coherence_null": r.coherence_null, "stability": r.stability,
                         "present": [bool(x) for x in r.present], "harmonic_of": r.harmonic_of,
                         "example_roi": int(rois[int(np.argmax(r.roi_amplitude))]), "verdict": r.verdict}
                        for r in found.rhythms]}


def with_rhythms(source: TraceSource, params: StageParams, store, *, action: str, method: str, max_rois: int,
                 segment_s: float, min_share: float, false_alarm: float, lowest_hz: float, neuropil=None,
                 progress=False):
    """params with what the chunks need about the session's shared rhythms, found once and recorded in ``store``.

    The search (:func:`calcium.signal.rhythms.find_rhythms`) runs on the inference's input (ΔF/F, filtered as
    configured) of at most ``max_rois`` ROIs spread evenly over the session. The bands found are left out of
    every ROI's noise estimate; with ``action = "remove"`` they are also removed from every ROI
    (:func:`calcium.signal.rhythms.remove_rhythms`; a regression is made against the shared component of the
    ROIs searched, :func:`calcium.signal.rhythms.shared_component`). With ``neuropil`` (one row per ROI of
    :func:`calibration_rois`, from :func:`keep_searched_neuropil`) the coherence of each ROI is taken with its own
    neuropil and the neuropil's spectrum is recorded too. A session too short to search is said so in the record
    and left as it is.
    """
    import dataclasses
    import json

    from ..signal.rhythms import find_rhythms, remove_rhythms, session_spectra, shared_component

    rois = calibration_rois(source.n_rois, max_rois)
    kept, signal = calibration_signal(source, params, rois)    # (kept: the ROIs with a usable ΔF/F)
    empty = {"bands_hz": [], "method": method, "reference": None} if action == "remove" else None
    try:
        if kept.size < 2:
            raise ValueError(f"{kept.size} ROI(s) with a usable ΔF/F; the search needs at least 2")
        rings = None
        if neuropil is not None:
            rings = np.asarray(neuropil, dtype=np.float64)[np.searchsorted(rois, kept)]
            rings = None if (~np.isfinite(rings)).all(axis=1).any() else rings
        found = find_rhythms(signal, params.frame_rate, segment_s=segment_s, min_share=min_share,
                             false_alarm=false_alarm, lowest_hz=lowest_hz, neuropil=rings)
    except ValueError as exc:
        text = f"shared rhythms not searched: {_first_line(exc)}"
        if progress:
            print(f"rhythms: {text}", file=sys.stderr, flush=True)
        store.write_rows(RHYTHMS_RECORD, slice(0, 1), [json.dumps({"action": action, "summary": text, "rhythms": []})])
        return dataclasses.replace(params, rhythms=empty)
    spectra = found.spectra
    arrays = {"freq_hz": spectra.freq_hz, "median_power": spectra.median_power,
              "power_low": spectra.quantile_power(0.1), "power_high": spectra.quantile_power(0.9),
              "background": found.median_background, "coherence": spectra.median_coherence,
              "statistic": found.statistic, "threshold": found.threshold}
    if spectra.neuropil_power is not None:
        arrays["neuropil_power"] = np.nanmedian(spectra.neuropil_power, axis=0)
    removal = None
    changes = {"rhythms": empty}
    if found.rhythms:
        margin = 2.0 * params.frame_rate / _NOISE_SEGMENT
        exclude = [(max(low - margin, 0.0), high + margin) for low, high in found.bands_hz]
        changes["noise"] = {**params.noise, "exclude_hz": exclude}
        if action == "remove":
            reference = shared_component(signal, params.frame_rate, found) if method == "regression" else None
            kwargs = {"bands_hz": found.bands_hz, "method": method, "reference": reference}
            removal = remove_rhythms(signal, params.frame_rate, **kwargs)
            arrays["median_power_after"] = session_spectra(removal.cleaned, params.frame_rate,
                                                           segment_s=segment_s).median_power
            changes["rhythms"] = kwargs
    if progress:
        lines = found.summary().splitlines()
        print("rhythms: " + lines[1] + ("" if not found.rhythms else " " + "; ".join(
            f"{r.frequency_hz:.2f} Hz in {r.share:.0%} of the ROIs" for r in found.rhythms)), file=sys.stderr,
              flush=True)
    store.write_rows(RHYTHMS_RECORD, slice(0, 1), [json.dumps(_rhythm_record(found, kept, action, method, removal))])
    for name, values in arrays.items():
        store.write_rows(f"rhythms/{name}", (), np.asarray(values, dtype=np.float64))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # (frames where no ROI searched has a value)
        store.write_rows("rhythms/session_average", (), np.nanmean(signal, axis=0).astype(np.float32))
    return dataclasses.replace(params, **changes)
