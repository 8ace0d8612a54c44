"""Tests for the NWB export (calcium/pipeline/nwb.py) and for reading ROI traces back (calcium/io/nwb.py).

The outside truth is pynwb itself: its reader (``NWBHDF5IO``) gives back what the file holds, and its schema
validator (``pynwb.validate``) checks the file against the NWB standard (Rübel et al. 2022, eLife 11:e78362).
"""
import builtins
import json

import numpy as np
import pytest

pynwb = pytest.importorskip("pynwb")

from calcium._checks import CalciumInputError  # noqa: E402
from calcium.io import read_spike_times  # noqa: E402
from calcium.io.nwb import list_nwb_series, read_nwb_traces  # noqa: E402
from calcium.io.results import file_sha256  # noqa: E402
from calcium.pipeline import stages, write_spike_table_from_results  # noqa: E402
from calcium.pipeline.nwb import export_nwb, nwb_contents  # noqa: E402
from calcium.pipeline.store import ResultStore  # noqa: E402

RATE = 20.0
START = "2024-03-01T10:15:00+01:00"


def _spikes(n_rois, n_frames, rng):
    """Spike counts (some frames with 2 spikes, ROI 3 silent) and sub-frame offsets within half a frame."""
    counts = (rng.random((n_rois, n_frames)) < 0.05).astype(np.uint16)
    counts[0, 10] = 2
    counts[0, 0] = 1  # with a negative offset: the time is clipped at the first frame, as in spikes.csv
    counts[3] = 0
    offsets = np.where(counts > 0, rng.uniform(-0.45, 0.45, (n_rois, n_frames)) / RATE, 0.0).astype(np.float32)
    offsets[0, 0] = -0.2 / RATE
    return counts, offsets


def _expected_times(counts, offsets, roi):
    """Spike times of one ROI written out from the definition (docs/hdf5-layout.md): k / frame_rate + offset,
    at least 0, repeated count times."""
    frames = np.flatnonzero(counts[roi])
    times = np.maximum(frames / RATE + offsets[roi, frames].astype(np.float64), 0.0)
    return np.repeat(times, counts[roi, frames].astype(int))


def _results(tmp_path, n_rois=5, n_frames=120, *, masks_path=None, infer=False, f0=False, name="results.h5"):
    """A complete results file with known arrays (written through the store, as the pipeline does).

    ``infer=True``: the layout of calcium infer (no dff, f0; input_kind "dff").
    """
    rng = np.random.default_rng(3)
    arrays = {"dff": rng.normal(0, 0.1, (n_rois, n_frames)).astype(np.float32),
              "denoised": rng.normal(0, 0.1, (n_rois, n_frames)).astype(np.float32),
              "activity": np.abs(rng.normal(0, 1, (n_rois, n_frames))).astype(np.float32),
              "f0": rng.uniform(90, 110, (n_rois, n_frames)).astype(np.float32)}
    arrays["dff"][1, 7] = np.nan  # a missing frame survives the export
    arrays["spike_counts"], arrays["spike_time_offset_s"] = _spikes(n_rois, n_frames, rng)
    specs = stages.result_datasets(n_rois, n_frames, filtered=False, with_dff=not infer, with_f0=f0)
    names = {spec.name for spec in specs}
    if masks_path:
        inputs = {"movie": {"path": str(tmp_path / "movie.tif"), "sha256": "0" * 64},
                  "masks": {"path": str(masks_path), "sha256": file_sha256(masks_path)}}
        kind = "movie"
    elif infer:
        inputs, kind = {"dff": {"path": str(tmp_path / "dff.h5"), "sha256": "0" * 64}}, "dff"
    else:
        inputs, kind = {"traces": {"path": str(tmp_path / "traces.h5"), "sha256": "0" * 64}}, "traces"
    path = tmp_path / name
    with ResultStore.open(path, datasets=specs, chunk_bounds=[0, 2, n_rois], run_hash="abc123",
                          attrs={"frame_rate": RATE, "n_rois": n_rois, "n_frames": n_frames, "input_kind": kind,
                                 "inputs_json": json.dumps(inputs), "calcium_version": "test",
                                 "config_toml": "[inputs]\n"},
                          parameters={}) as store:
        for chunk in range(2):
            rows = store.chunk_rows(chunk)
            n = rows.stop - rows.start
            values = {k: v[rows] for k, v in arrays.items() if k in names}
            values.update({"noise_sd": np.full(n, 0.1), "snr": np.full(n, 5.0),
                           "n_spikes": arrays["spike_counts"][rows].sum(axis=1).astype(np.int64),
                           "quality_flags": np.zeros(n, np.uint16), "flags": np.array([""] * n, dtype=object),
                           "spike_size": np.full(n, 0.2), "count_low": np.arange(n), "calibrated": np.ones(n, np.uint8)})
            store.write_chunk(chunk, values)
        store.mark_complete()
    return path, arrays


# ------------------------------------------------------------------ round trip through pynwb's reader
def test_round_trip_gives_back_dff_the_model_fit_activity_and_the_frame_rate(tmp_path):
    path, arrays = _results(tmp_path)
    nwb_path = export_nwb(path, tmp_path / "session.nwb", session_start=START, experimenter="A. Researcher",
                          indicator="GCaMP6s")
    traces, rate = read_nwb_traces(nwb_path, series="ophys/DfOverF/dff")
    assert rate == RATE
    assert np.array_equal(traces, arrays["dff"].astype(np.float64), equal_nan=True)
    for name in ("activity", "denoised"):
        traces, _ = read_nwb_traces(nwb_path, series=f"ophys/{name}")
        assert np.array_equal(traces, arrays[name].astype(np.float64))


def test_spike_times_of_each_roi_are_its_events_in_the_units_table_linked_to_its_roi(tmp_path):
    # Reference: pynwb's reader; the times written out from the definition in docs/hdf5-layout.md.
    path, arrays = _results(tmp_path)
    nwb_path = export_nwb(path, tmp_path / "session.nwb", session_start=START)
    counts, offsets = arrays["spike_counts"], arrays["spike_time_offset_s"]
    with pynwb.NWBHDF5IO(str(nwb_path), "r") as io:
        nwb = io.read()
        units = nwb.units
        rois = nwb.processing["ophys"]["ImageSegmentation"]["rois"]
        assert list(units.id[:]) == list(range(5)) == list(rois.id[:])
        assert units["roi"].table is rois  # the link goes to the ROI table of the imaging plane
        assert rois.imaging_plane is nwb.imaging_planes["imaging_plane"]
        for roi in range(5):
            times = units.get_unit_spike_times(roi)
            assert np.array_equal(times, _expected_times(counts, offsets, roi))
            assert np.all(np.diff(times) >= 0)  # NWB: spike times in ascending order
            assert units["roi"].data[roi] == roi
            assert rois.id[units["roi"].data[roi]] == roi
        assert units.get_unit_spike_times(3).size == 0  # the silent ROI keeps its row
        first = units.get_unit_spike_times(0)
        assert first[0] == 0.0  # the spike of frame 0 with a negative offset: clipped at the first frame
        assert np.count_nonzero(first == 10 / RATE + np.float64(offsets[0, 10])) == 2  # a frame of 2 spikes
        assert list(units["spike_size"][:]) == [0.2] * 5
        assert list(units["count_low"][:]) == [0, 1, 0, 1, 2]
        assert list(units["calibrated"][:]) == [1] * 5
        # the fluorescence containers hold no spikes: spikes are in /units only
        assert "InferredActivity" not in nwb.processing["ophys"].data_interfaces


def test_units_agree_with_the_spike_table_written_from_the_same_results(tmp_path):
    # Reference: calcium.io.read_spike_times on spikes.csv (6 decimals) and pynwb's reader on the NWB file.
    path, _ = _results(tmp_path)
    nwb_path = export_nwb(path, tmp_path / "session.nwb", session_start=START)
    table = read_spike_times(write_spike_table_from_results(path, tmp_path / "spikes.csv"))
    with pynwb.NWBHDF5IO(str(nwb_path), "r") as io:
        units = io.read().units
        for roi in range(5):
            np.testing.assert_allclose(units.get_unit_spike_times(roi), table.get(roi, np.empty(0)), atol=1e-6)


def test_the_file_passes_the_nwb_validator_and_follows_the_layout(tmp_path):
    path, arrays = _results(tmp_path)
    nwb_path = export_nwb(path, tmp_path / "session.nwb", session_start=START)
    # Reference: the NWB schema validator shipped with pynwb.
    assert pynwb.validate(path=str(nwb_path)) == []
    with pynwb.NWBHDF5IO(str(nwb_path), "r") as io:
        nwb = io.read()
        series = nwb.processing["ophys"]["DfOverF"]["dff"]
        assert series.data.shape == (arrays["dff"].shape[1], arrays["dff"].shape[0])  # NWB: (frames, rois)
        assert series.rate == RATE
        assert series.rois.table is nwb.processing["ophys"]["ImageSegmentation"]["rois"]
        assert list(series.rois.data[:]) == list(range(5))
        assert nwb.imaging_planes["imaging_plane"].imaging_rate == RATE
        table = nwb.processing["ophys"]["ImageSegmentation"]["rois"]
        assert list(table["n_spikes"][:]) == list(arrays["spike_counts"].sum(axis=1))
        assert nwb.identifier == "abc123"
        assert nwb.session_start_time.utcoffset().total_seconds() == 3600


def test_a_kept_f0_goes_beside_the_fluorescence(tmp_path):
    path, arrays = _results(tmp_path, f0=True)
    nwb_path = export_nwb(path, tmp_path / "session.nwb", session_start=START)
    traces, _ = read_nwb_traces(nwb_path, series="ophys/Fluorescence/f0")
    assert np.array_equal(traces, arrays["f0"].astype(np.float64))
    assert pynwb.validate(path=str(nwb_path)) == []
    assert not any("F0" in sentence for sentence in nwb_contents(path).absent)


def test_a_movie_run_exports_its_masks_raw_fluorescence_and_spikes(tmp_path):
    # Reference: pynwb's validator and reader, against the run's own results file, masks and spikes.csv.
    import calcium
    from calcium.io import read_masks, write_masks, write_movie
    from calcium.pipeline import config_from_dict, read_results, run_pipeline

    recording = calcium.simulate_recording(3, 30.0, RATE, indicator="GCaMP6s", seed=4)
    rng = np.random.default_rng(2)
    masks = np.zeros((3, 24, 24), dtype=bool)
    for k, (y, x) in enumerate(((5, 5), (5, 17), (17, 11))):
        masks[k, y - 2:y + 2, x - 2:x + 2] = True
    n_frames = recording.raw.shape[1]
    movie = 50.0 + rng.normal(0.0, 1.0, (n_frames, 24, 24))
    for k in range(3):
        movie[:, masks[k]] = recording.raw[k][:, None] + rng.normal(0.0, 1.0, (n_frames, int(masks[k].sum())))
    write_movie(tmp_path / "movie.tif", movie.astype(np.float32))
    write_masks(tmp_path / "masks.tif", masks)
    config = config_from_dict({"inputs": {"movie": str(tmp_path / "movie.tif"), "masks": str(tmp_path / "masks.tif"),
                                          "frame_rate": RATE},
                               "inference": {"indicator": "GCaMP6s"},
                               "output": {"folder": str(tmp_path / "out")}, "report": {"enabled": False},
                               "nwb": {"enabled": True, "session_start": START},
                               "extraction": {"neuropil_radius_px": 5}, "execution": {"backend": "serial"}})
    summary = run_pipeline(config, progress=False)
    assert pynwb.validate(path=str(summary.nwb_path)) == []
    data, _ = read_results(summary.results_path)
    spikes = read_spike_times(summary.spikes_path)
    assert np.all(data["n_spikes"] > 0)
    raw, rate = read_nwb_traces(summary.nwb_path, series="ophys/Fluorescence/raw")
    assert rate == RATE and np.array_equal(raw, data["raw"].astype(np.float64))
    with pynwb.NWBHDF5IO(str(summary.nwb_path), "r") as io:
        nwb = io.read()
        table = nwb.processing["ophys"]["ImageSegmentation"]["rois"]
        for roi in range(3):
            stored = np.zeros((24, 24), dtype=bool)
            for x, y, weight in table["pixel_mask"][roi]:
                stored[int(y), int(x)] = weight > 0
            assert np.array_equal(stored, read_masks(tmp_path / "masks.tif")[roi])
            np.testing.assert_allclose(nwb.units.get_unit_spike_times(roi), spikes.get(roi, np.empty(0)),
                                       atol=1e-6)
        assert sum(len(nwb.units.get_unit_spike_times(roi)) for roi in range(3)) == int(data["n_spikes"].sum())


# ------------------------------------------------------------------ the results of calcium infer
def test_the_results_of_infer_are_exported_with_what_they_hold_and_say_what_is_not_there(tmp_path):
    path, arrays = _results(tmp_path, infer=True)
    nwb_path = export_nwb(path, tmp_path / "session.nwb", session_start=START)
    assert pynwb.validate(path=str(nwb_path)) == []  # Reference: pynwb's validator
    assert list_nwb_series(nwb_path) == ["ophys/activity", "ophys/denoised"]
    with pynwb.NWBHDF5IO(str(nwb_path), "r") as io:
        nwb = io.read()
        assert "DfOverF" not in nwb.processing["ophys"].data_interfaces
        for roi in range(5):
            assert np.array_equal(nwb.units.get_unit_spike_times(roi),
                                  _expected_times(arrays["spike_counts"], arrays["spike_time_offset_s"], roi))
        assert "calcium infer" in nwb.notes and "ΔF/F and F0" in nwb.notes and "ROI masks" in nwb.notes
    contents = nwb_contents(path)
    assert contents.kind == "infer" and contents.masks is None
    assert any(s.startswith("ΔF/F and F0") and str(tmp_path / "dff.h5") in s for s in contents.absent)
    assert "units" in dict(contents.written)


# ------------------------------------------------------------------ masks
def _masks(tmp_path, n=5):
    masks = np.zeros((n, 8, 9), dtype=bool)
    for k in range(n):
        masks[k, k, k:k + 3] = True
    masks_path = tmp_path / "masks.npy"
    np.save(masks_path, masks)
    return masks, masks_path


def test_masks_of_a_movie_run_become_pixel_masks(tmp_path):
    _, masks_path = _masks(tmp_path)
    path, _ = _results(tmp_path, masks_path=masks_path)
    nwb_path = export_nwb(path, tmp_path / "session.nwb")
    with pynwb.NWBHDF5IO(str(nwb_path), "r") as io:
        table = io.read().processing["ophys"]["ImageSegmentation"]["rois"]
        pixels = table["pixel_mask"][2]
        assert sorted((int(p[0]), int(p[1])) for p in pixels) == [(2, 2), (3, 2), (4, 2)]  # (x, y)
    assert nwb_contents(path).masks == str(masks_path)


def test_a_mask_file_changed_since_the_run_is_not_used_and_the_contents_say_so(tmp_path):
    masks, masks_path = _masks(tmp_path)
    path, _ = _results(tmp_path, masks_path=masks_path)
    np.save(masks_path, masks[::-1])  # the same shape, other ROIs: the SHA-256 recorded by the run differs
    contents = nwb_contents(path)
    assert contents.masks is None and any("has changed since the run" in s for s in contents.absent)
    nwb_path = export_nwb(path, tmp_path / "session.nwb")
    with pynwb.NWBHDF5IO(str(nwb_path), "r") as io:
        table = io.read().processing["ophys"]["ImageSegmentation"]["rois"]
        assert [tuple(p) for p in table["pixel_mask"][2]] == [(0, 0, 0.0)]


def test_masks_given_for_a_traces_run_are_stored_and_wrong_ones_are_refused(tmp_path):
    masks, masks_path = _masks(tmp_path)
    path, _ = _results(tmp_path)
    assert any("placeholder" in s for s in nwb_contents(path).absent)
    nwb_path = export_nwb(path, tmp_path / "session.nwb", masks=masks_path)
    with pynwb.NWBHDF5IO(str(nwb_path), "r") as io:
        table = io.read().processing["ophys"]["ImageSegmentation"]["rois"]
        assert sorted((int(p[0]), int(p[1])) for p in table["pixel_mask"][4]) == [(4, 4), (5, 4), (6, 4)]
    with pytest.raises(ValueError, match=r"masks must have shape \(rois=5, height, width\)"):
        export_nwb(path, tmp_path / "other.nwb", masks=masks[:3])
    assert not (tmp_path / "other.nwb").exists()


# ------------------------------------------------------------------ safety and the former name
def test_the_export_never_writes_over_its_results_file(tmp_path):
    path, _ = _results(tmp_path)
    before = file_sha256(path)
    with pytest.raises(ValueError, match="results.h5"):
        export_nwb(path, path)
    assert file_sha256(path) == before


def test_an_incomplete_results_file_is_not_exported(tmp_path):
    specs = stages.result_datasets(2, 10, filtered=False)
    path = tmp_path / "results.h5"
    ResultStore.open(path, datasets=specs, chunk_bounds=[0, 2], run_hash="x",
                     attrs={"frame_rate": RATE, "n_rois": 2, "n_frames": 10}, parameters={}).close()
    with pytest.raises(CalciumInputError, match="incomplete"):
        export_nwb(path, tmp_path / "out.nwb")
    assert not (tmp_path / "out.nwb").exists()


def test_the_former_name_in_calcium_io_still_exports_with_a_deprecation_warning(tmp_path):
    import calcium
    from calcium.io import nwb as io_nwb

    assert calcium.export_nwb is export_nwb
    path, arrays = _results(tmp_path)
    with pytest.warns(DeprecationWarning, match="calcium.pipeline.nwb.export_nwb"):
        nwb_path = io_nwb.export_nwb(path, tmp_path / "session.nwb", session_start=START)
    traces, _ = read_nwb_traces(nwb_path, series="dff")
    assert np.array_equal(traces, arrays["dff"].astype(np.float64), equal_nan=True)


# ------------------------------------------------------------------ the command line
def test_export_nwb_on_the_results_of_infer_says_what_is_not_there(tmp_path, capsys):
    from calcium.cli import main

    path, _ = _results(tmp_path, infer=True)
    out = tmp_path / "session.nwb"
    assert main(["export-nwb", str(path), "--out", str(out), "--session-start", START,
                 "--experimenter", "A. Researcher", "--location", "V1"]) == 0
    printed = capsys.readouterr().out
    assert f"NWB file written: {out}" in printed
    assert "not in the results, so not in the NWB file: ΔF/F and F0" in printed
    assert "--masks" in printed
    assert pynwb.validate(path=str(out)) == []  # Reference: pynwb's validator
    with pynwb.NWBHDF5IO(str(out), "r") as io:
        nwb = io.read()
        assert list(nwb.experimenter) == ["A. Researcher"]
        assert nwb.imaging_planes["imaging_plane"].location == "V1"


def test_export_nwb_refuses_an_output_over_its_masks(tmp_path, capsys):
    from calcium.cli import main

    _, masks_path = _masks(tmp_path)
    path, _ = _results(tmp_path)
    before = file_sha256(masks_path)
    assert main(["export-nwb", str(path), "--masks", str(masks_path), "--out", str(masks_path),
                 "--overwrite"]) == 1
    assert "--masks" in capsys.readouterr().err
    assert file_sha256(masks_path) == before


# ------------------------------------------------------------------ reading NWB traces
def test_several_series_without_a_name_are_refused_listing_them(tmp_path):
    path, _ = _results(tmp_path)
    nwb_path = export_nwb(path, tmp_path / "session.nwb")
    names = ["ophys/DfOverF/dff", "ophys/activity", "ophys/denoised"]
    assert list_nwb_series(nwb_path) == names
    with pytest.raises(ValueError, match=", ".join(names)):
        read_nwb_traces(nwb_path)
    with pytest.raises(CalciumInputError, match="no ROI response series 'raw'"):
        read_nwb_traces(nwb_path, series="raw")


def test_timestamps_give_the_frame_rate_when_no_rate_is_stored(tmp_path):
    # Reference: pynwb writes a series with explicit timestamps; 1 / step must come back.
    from datetime import datetime, timezone

    from pynwb.ophys import Fluorescence, ImageSegmentation, OpticalChannel

    nwb = pynwb.NWBFile(session_description="t", identifier="t", session_start_time=datetime.now(timezone.utc))
    device = nwb.create_device(name="scope")
    plane = nwb.create_imaging_plane(name="plane", optical_channel=OpticalChannel(name="c", description="c",
                                                                                  emission_lambda=500.0),
                                     device=device, description="p", excitation_lambda=900.0, indicator="x",
                                     location="x")
    module = nwb.create_processing_module("ophys", "x")
    segmentation = ImageSegmentation()
    module.add(segmentation)
    table = segmentation.create_plane_segmentation(description="r", imaging_plane=plane, name="rois")
    for _ in range(2):
        table.add_roi(pixel_mask=[(0, 0, 1.0)])
    region = table.create_roi_table_region(region=[0, 1], description="all")
    fluorescence = Fluorescence()
    module.add(fluorescence)
    data = np.arange(20, dtype=float).reshape(10, 2)
    fluorescence.create_roi_response_series(name="F", data=data, unit="a.u.", rois=region,
                                            timestamps=np.arange(10) / 12.5)
    path = tmp_path / "stamped.nwb"
    with pynwb.NWBHDF5IO(str(path), "w") as io:
        io.write(nwb)
    traces, rate = read_nwb_traces(path)
    assert rate == pytest.approx(12.5)
    assert np.array_equal(traces, data.T)


def test_a_missing_pynwb_gives_an_install_hint(tmp_path, monkeypatch):
    path, _ = _results(tmp_path)
    real_import = builtins.__import__

    def no_pynwb(name, *args, **kwargs):
        if name == "pynwb" or name.startswith("pynwb."):
            raise ImportError("No module named 'pynwb'")
        return real_import(name, *args, **kwargs)

    monkeypatch.setattr(builtins, "__import__", no_pynwb)
    with pytest.raises(ImportError, match=r"pip install 'calcium-counts\[nwb\]'"):
        read_nwb_traces(tmp_path / "any.nwb")
    with pytest.raises(ImportError, match=r"pip install 'calcium-counts\[nwb\]'"):
        export_nwb(path, tmp_path / "out.nwb")
    assert not (tmp_path / "out.nwb").exists()
