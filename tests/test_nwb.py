"""Tests for calcium/io/nwb.py: export of results to NWB and reading ROI traces back."""
import builtins
import json

import numpy as np
import pytest

pynwb = pytest.importorskip("pynwb")

from calcium._checks import CalciumInputError  # noqa: E402
from calcium.io.nwb import export_nwb, list_nwb_series, read_nwb_traces  # noqa: E402
from calcium.pipeline import stages  # noqa: E402
from calcium.pipeline.store import ResultStore  # noqa: E402

RATE = 20.0


def _results(tmp_path, n_rois=5, n_frames=120, *, masks_path=None):
    """A complete results file with known arrays (written through the store, as the pipeline does)."""
    rng = np.random.default_rng(3)
    dff = rng.normal(0, 0.1, (n_rois, n_frames)).astype(np.float32)
    dff[1, 7] = np.nan  # a missing frame survives the export
    activity = np.abs(rng.normal(0, 1, (n_rois, n_frames))).astype(np.float32)
    specs = stages.result_datasets(n_rois, n_frames, filtered=False)
    inputs = {"masks": {"path": str(masks_path), "sha256": "0" * 64}} if masks_path else {}
    path = tmp_path / "results.h5"
    with ResultStore.open(path, datasets=specs, chunk_bounds=[0, 2, n_rois], run_hash="abc123",
                          attrs={"frame_rate": RATE, "n_rois": n_rois, "n_frames": n_frames,
                                 "input_kind": "movie" if masks_path else "traces",
                                 "inputs_json": json.dumps(inputs), "calcium_version": "test",
                                 "config_toml": "[inputs]\n"},
                          parameters={}) as store:
        for chunk in range(2):
            rows = store.chunk_rows(chunk)
            n = rows.stop - rows.start
            store.write_chunk(chunk, {"dff": dff[rows], "activity": activity[rows],
                                      "noise_sd": np.full(n, 0.1), "snr": np.full(n, 5.0),
                                      "n_spikes": np.arange(n), "quality_flags": np.zeros(n, np.uint16),
                                      "flags": np.array([""] * n, dtype=object)})
        store.mark_complete()
    return path, dff, activity


def test_round_trip_gives_back_dff_and_activity_and_the_frame_rate(tmp_path):
    path, dff, activity = _results(tmp_path)
    nwb_path = export_nwb(path, tmp_path / "session.nwb", session_start="2024-03-01T10:15:00+01:00",
                          experimenter="A. Researcher", indicator="GCaMP6s")
    traces, rate = read_nwb_traces(nwb_path, series="dff")
    assert rate == RATE
    assert np.array_equal(traces, dff.astype(np.float64), equal_nan=True)
    traces, _ = read_nwb_traces(nwb_path, series="ophys/InferredActivity/activity")
    assert np.array_equal(traces, activity.astype(np.float64))


def test_the_file_follows_the_nwb_layout_read_by_pynwb_itself(tmp_path):
    # Reference: pynwb's own reader (and its schema validation on read) opens the file.
    path, dff, _ = _results(tmp_path)
    nwb_path = export_nwb(path, tmp_path / "session.nwb", session_start="2024-03-01T10:15:00+01:00")
    with pynwb.NWBHDF5IO(str(nwb_path), "r") as io:
        nwb = io.read()
        series = nwb.processing["ophys"]["DfOverF"]["dff"]
        assert series.data.shape == (dff.shape[1], dff.shape[0])  # NWB: (frames, rois)
        assert series.rate == RATE
        assert len(series.rois) == dff.shape[0]
        table = nwb.processing["ophys"]["ImageSegmentation"]["rois"]
        assert list(table["n_spikes"][:]) == [0, 1, 0, 1, 2]
        assert nwb.identifier == "abc123"
        assert nwb.session_start_time.utcoffset().total_seconds() == 3600
    # Reference: the NWB schema validator shipped with pynwb.
    assert pynwb.validate(path=str(nwb_path)) == []


def test_masks_of_a_movie_run_become_pixel_masks(tmp_path):
    masks = np.zeros((5, 8, 9), dtype=bool)
    for k in range(5):
        masks[k, k, k:k + 3] = True
    masks_path = tmp_path / "masks.npy"
    np.save(masks_path, masks)
    path, _, _ = _results(tmp_path, masks_path=masks_path)
    nwb_path = export_nwb(path, tmp_path / "session.nwb")
    with pynwb.NWBHDF5IO(str(nwb_path), "r") as io:
        table = io.read().processing["ophys"]["ImageSegmentation"]["rois"]
        pixels = table["pixel_mask"][2]
        assert sorted((int(p[0]), int(p[1])) for p in pixels) == [(2, 2), (3, 2), (4, 2)]  # (x, y)


def test_several_series_without_a_name_are_refused_listing_them(tmp_path):
    path, _, _ = _results(tmp_path)
    nwb_path = export_nwb(path, tmp_path / "session.nwb")
    assert list_nwb_series(nwb_path) == ["ophys/DfOverF/dff", "ophys/InferredActivity/activity"]
    with pytest.raises(ValueError, match="ophys/DfOverF/dff, ophys/InferredActivity/activity"):
        read_nwb_traces(nwb_path)
    with pytest.raises(CalciumInputError, match="no ROI response series 'raw'"):
        read_nwb_traces(nwb_path, series="raw")


def test_timestamps_give_the_frame_rate_when_no_rate_is_stored(tmp_path):
    # Reference: pynwb writes a series with explicit timestamps; 1 / step must come back.
    from datetime import datetime, timezone

    from pynwb.ophys import Fluorescence, ImageSegmentation, OpticalChannel

    nwb = pynwb.NWBFile(session_description="t", identifier="t", session_start_time=datetime.now(timezone.utc))
    device = nwb.create_device(name="scope")
    plane = nwb.create_imaging_plane(name="plane", optical_channel=OpticalChannel(name="c", description="c", emission_lambda=500.0), device=device,
                                     description="p", excitation_lambda=900.0, indicator="x", location="x")
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
    real_import = builtins.__import__

    def no_pynwb(name, *args, **kwargs):
        if name == "pynwb" or name.startswith("pynwb."):
            raise ImportError("No module named 'pynwb'")
        return real_import(name, *args, **kwargs)

    monkeypatch.setattr(builtins, "__import__", no_pynwb)
    with pytest.raises(ImportError, match=r"pip install 'calcium\[nwb\]'"):
        read_nwb_traces(tmp_path / "any.nwb")


def test_an_incomplete_results_file_is_not_exported(tmp_path):
    specs = stages.result_datasets(2, 10, filtered=False)
    path = tmp_path / "results.h5"
    ResultStore.open(path, datasets=specs, chunk_bounds=[0, 2], run_hash="x",
                     attrs={"frame_rate": RATE, "n_rois": 2, "n_frames": 10}, parameters={}).close()
    with pytest.raises(CalciumInputError, match="incomplete"):
        export_nwb(path, tmp_path / "out.nwb")
    assert not (tmp_path / "out.nwb").exists()
