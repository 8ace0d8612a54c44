"""Tests for calcium/pipeline/run.py, stages.py and executors.py: whole-session runs.

The session is simulated with the forward model (calcium.forward.simulate_recording), so the true spikes are
known; the per-ROI stages are checked against the public stage functions called directly, and every way of
running (processes, resumed after a kill, after Ctrl-C, after a full disk) against one uninterrupted serial run.
"""
import errno
import os
import re
import signal
import subprocess
import sys
import textwrap
import time

import h5py
import numpy as np
import pytest

from calcium._checks import CalciumInputError
from calcium.forward import simulate_recording
from calcium.io import read_spike_times, write_movie, write_spike_table, write_traces
from calcium.pipeline import (
    ConfigError,
    OutputError,
    OutputMismatchError,
    config_from_dict,
    open_results,
    read_results,
    run_pipeline,
)
from calcium.pipeline import stages
from calcium.pipeline.executors import ProcessExecutor, SerialExecutor
from calcium.pipeline.store import ResultStore

RATE = 20.0
N_ROIS = 12
ALL_MISSING, NEGATIVE = 2, 5  # ROIs made unusable on purpose
ELECTRICAL = (0, 1)
CLOCK_OFFSET_S = 0.2


def _config(folder, traces, **sections):
    data = {"inputs": {"traces": str(traces)}, "output": {"folder": str(folder)},
            "report": {"enabled": False}, "execution": {"backend": "serial", "chunk_rois": 1},
            "kernel_fit": {"n_bootstrap": 0}}
    for name, values in sections.items():
        data.setdefault(name, {}).update(values)
    return config_from_dict(data)


def _datasets(path):
    data, _ = read_results(path)
    return {name: value for name, value in data.items() if not name.startswith("progress/finished")}


def _assert_same_results(a, b):
    first, second = _datasets(a), _datasets(b)
    assert sorted(first) == sorted(second)
    for name in first:
        assert np.array_equal(first[name], second[name], equal_nan=first[name].dtype.kind == "f"), name


@pytest.fixture(scope="module")
def session(tmp_path_factory):
    """Inputs (HDF5 traces with frame_rate, electrical spikes of two ROIs) and one serial reference run."""
    root = tmp_path_factory.mktemp("session")
    recording = simulate_recording(N_ROIS, 60.0, RATE, indicator="GCaMP6f", rate_hz=0.4, noise_sd=0.03, seed=7)
    raw = recording.raw.copy()
    raw[ALL_MISSING] = np.nan
    raw[NEGATIVE] = raw[NEGATIVE] - 2 * raw[NEGATIVE].max()  # F0 < 0 everywhere
    raw[3, 100:130] = np.nan                                   # a few missing frames
    traces = write_traces(root / "traces.h5", raw, frame_rate=RATE)
    # the electrophysiology clock starts CLOCK_OFFSET_S after the first frame
    on_ephys_clock = {r: recording.spike_times[r] - CLOCK_OFFSET_S for r in ELECTRICAL}
    electrical = write_spike_table(root / "ephys.csv", {r: t[t >= 0] for r, t in on_ephys_clock.items()})
    config = _config(root / "reference", traces, inputs={"electrical_spikes": str(electrical)},
                     report={"enabled": True, "n_examples": 3}, nwb={"enabled": True}, output={"f0": True})
    summary = run_pipeline(config, progress=False)
    return {"root": root, "raw": raw, "recording": recording, "traces": traces, "electrical": electrical,
            "config": config, "summary": summary}


def _same_config(session, folder, **sections):
    sections.setdefault("output", {}).setdefault("f0", True)  # as the reference run
    return _config(folder, session["traces"], inputs={"electrical_spikes": str(session["electrical"])},
                   **sections)


# ---------------------------------------------------------------------------
# what a run computes
# ---------------------------------------------------------------------------
def test_each_roi_gets_the_results_of_the_stage_functions_called_directly(session):
    # Reference: the public stage functions applied to one ROI by hand: ΔF/F, noise, the session calibration
    # (paired: ROIs 0 and 1 have electrical spikes) and the count of the ROI with it.
    from calcium.calibrate import calibrate_session, count_roi
    from calcium.io import read_spike_times
    from calcium.signal import delta_f_over_f, estimate_noise

    summary = session["summary"]
    assert (summary.n_rois, summary.n_frames, summary.frame_rate) == (N_ROIS, 1200, RATE)  # rate from the file
    data, attrs = read_results(summary.results_path)
    roi = 4
    direct = delta_f_over_f(session["raw"][roi], RATE)
    assert np.array_equal(data["dff"][roi], direct.dff.astype(np.float32))
    assert np.array_equal(data["f0"][roi], direct.f0.astype(np.float32))
    noise_sd = estimate_noise(direct.dff, RATE)
    usable = [r for r in range(N_ROIS) if r not in (ALL_MISSING, NEGATIVE)]
    dff = delta_f_over_f(session["raw"][usable], RATE).dff
    calibration = calibrate_session(dff, RATE, electrical_spikes=read_spike_times(session["electrical"]),
                                    fit_options={"n_bootstrap": 0})
    assert calibration.source == "paired" and calibration.paired_rois == (0, 1)
    inferred = count_roi(direct.dff, RATE, calibration.for_session(N_ROIS, rois=usable), roi,
                         noise_sd=noise_sd).result
    assert data["noise_sd"][roi] == noise_sd
    assert np.array_equal(data["activity"][roi], np.asarray(inferred.activity, dtype=np.float32))
    assert np.array_equal(data["spike_counts"][roi], np.asarray(inferred.spike_counts))
    times = stages.inferred_spike_times(data["spike_counts"][roi], data["spike_time_offset_s"][roi], RATE)
    assert np.allclose(times, inferred.spike_times, atol=0.5 / RATE)
    assert attrs["inputs"]["traces"]["sha256"] == __import__("calcium").io.file_sha256(session["traces"])
    assert "[inputs]" in attrs["config_toml"] and data["progress/complete"][0] == 1


def test_by_default_f0_is_left_out_and_the_report_draws_it_from_f_and_dff(session, tmp_path):
    config = _config(tmp_path / "out", session["traces"], report={"enabled": True, "n_examples": 2},
                     inputs={"electrical_spikes": str(session["electrical"])})
    summary = run_pipeline(config, progress=False)
    data, _ = read_results(summary.results_path)
    reference, _ = read_results(session["summary"].results_path)
    assert "f0" not in data and "f0" in reference
    # the rest is the reference run's (its electrical step aside)
    for name in ("dff", "f0_min", "spike_counts", "quality_flags", "activity"):
        assert np.array_equal(data[name], reference[name], equal_nan=data[name].dtype.kind == "f"), name
    # 4 bytes per ROI-frame less on disk (contiguous datasets, allocated at creation)
    size, reference_size = summary.results_path.stat().st_size, session["summary"].results_path.stat().st_size
    assert reference_size - size >= 4 * N_ROIS * data["dff"].shape[1]
    # F0 = F / (1 + ΔF/F) (ΔF/F = (F - F0) / F0) where F is known: what the report draws for an example ROI
    roi = 0
    f0 = session["raw"][roi] / (1.0 + data["dff"][roi].astype(np.float64))
    np.testing.assert_allclose(f0, reference["f0"][roi], rtol=1e-5)
    assert (summary.report_path.parent / "figures").is_dir() and summary.report_path.is_file()


def test_spikes_of_the_simulated_session_are_recovered(session):
    # Reference: the true spike times of the forward-model simulation, scored with calcium.score.
    from calcium.score import score_spikes

    spikes = read_spike_times(session["summary"].spikes_path)
    good = [r for r in range(N_ROIS) if r not in (ALL_MISSING, NEGATIVE)]
    f1 = [score_spikes(spikes[r], session["recording"].spike_times[r], tolerance_s=0.15).f1 for r in good]
    assert np.median(f1) >= 0.8


def test_unusable_rois_are_flagged_with_the_reason_and_the_rest_completes(session):
    data, _ = read_results(session["summary"].results_path)
    flags, reasons = data["quality_flags"], data["flags"]
    assert flags[ALL_MISSING] & stages.FLAG_FAILED and "every frame is missing" in reasons[ALL_MISSING]
    assert flags[NEGATIVE] & stages.FLAG_FAILED and flags[NEGATIVE] & stages.FLAG_F0
    assert reasons[NEGATIVE].startswith("F0 <= 0")
    assert np.isnan(data["dff"][NEGATIVE]).all() and data["spike_counts"][NEGATIVE].sum() == 0
    assert data["missing_frames"][3] == 30 and not flags[3] & stages.FLAG_FAILED
    others = [r for r in range(N_ROIS) if r not in (ALL_MISSING, NEGATIVE)]
    assert not np.any(flags[others] & stages.FLAG_FAILED)
    assert session["summary"].n_failed == 2



def test_missing_frames_and_saturation_are_counted_per_roi():
    # Reference: numpy (isfinite counts, max over the finite frames and frames equal to it); a trace held at
    # its maximum for several frames is the usual sign of a saturated detector (common practice).
    rng = np.random.default_rng(8)
    raw = 100.0 + rng.normal(0.0, 1.0, (4, 600))
    raw[0, 100:108] = 120.0                      # clipped: 8 frames at the maximum
    raw[1, :40] = np.nan
    raw[1, 50] = np.inf                          # missing too; not a maximum
    raw[1, 200:202] = 110.0                      # 2 frames at the maximum: below the flag's 3
    raw[2, :] = np.nan                           # nothing at all
    out = stages._process_rows(raw, 0, stages.StageParams(frame_rate=30.0))
    finite = np.isfinite(raw)
    np.testing.assert_array_equal(out["missing_frames"], raw.shape[1] - finite.sum(axis=1))
    expected = [int(np.count_nonzero(r == np.max(r[f]))) if f.any() else 0 for r, f in zip(raw, finite)]
    np.testing.assert_array_equal(out["saturated_frames"], expected)
    assert expected[:3] == [8, 2, 0]
    flagged = (out["quality_flags"] & stages.FLAG_SATURATION) != 0
    np.testing.assert_array_equal(flagged, [True, False, False, expected[3] >= 3])
    assert "raw maximum 120 reached in 8 frames" in out["flags"][0]

def test_spike_table_lists_the_counts_of_the_results_file(session, tmp_path):
    # Reference: the spike-table reader and writer of calcium.io.
    data, _ = read_results(session["summary"].results_path)
    spikes = read_spike_times(session["summary"].spikes_path)
    assert sorted(spikes) == list(range(N_ROIS))
    for roi in range(N_ROIS):
        frames = np.round(spikes[roi] * RATE).astype(int)
        assert np.array_equal(np.bincount(frames, minlength=1200), data["spike_counts"][roi])
    trains = {roi: stages.inferred_spike_times(data["spike_counts"][roi], data["spike_time_offset_s"][roi], RATE)
              for roi in range(N_ROIS)}
    reference = write_spike_table(tmp_path / "reference.csv", trains, decimals=stages.SPIKE_TIME_DECIMALS)
    assert session["summary"].spikes_path.read_bytes() == reference.read_bytes()


def test_rois_with_electrical_spikes_get_kernel_fits_and_scores(session):
    # Reference: calcium.score.score_spikes called directly on the same trains.
    from calcium.score import score_spikes

    data, _ = read_results(session["summary"].results_path)
    assert data["electrical/roi"].tolist() == list(ELECTRICAL)
    inferred = read_spike_times(session["summary"].spikes_path)
    electrical = read_spike_times(session["electrical"])
    for row, roi in enumerate(ELECTRICAL):
        lag = data["electrical/fit_lag_s"][row]
        assert lag == pytest.approx(CLOCK_OFFSET_S, abs=1 / RATE)  # the fitted clock offset, within a frame
        direct = score_spikes(inferred[roi], electrical[roi] + lag, tolerance_s=0.1, duration_s=60.0)
        assert data["electrical/score_f1"][row] == pytest.approx(direct.f1)
        assert data["electrical/score_n_matched"][row] == direct.n_matched
        assert direct.f1 > 0.8  # scored on the imaging clock (unshifted, the 0.2 s offset exceeds the tolerance)
        # GCaMP6f simulated: the fitted half-decay is within a factor 2 of the simulated kernel's.
        truth = session["recording"].kernel.half_decay_s
        assert truth / 2 < data["electrical/fit_half_decay_s"][row] < 2 * truth


def test_report_has_every_figure_and_a_row_per_roi(session):
    page = session["summary"].report_path
    html = page.read_text(encoding="utf-8")
    for name in ("raster", "noise", "snr", "calibration", "fit-half-decay", "scores", "fit-data-0", "fit-data-1"):
        assert f"figures/{name}.png" in html and (page.parent / "figures" / f"{name}.png").is_file()
    assert html.count('id="fig-roi-') == 3 + 2  # the failed ROI has no close-up
    for roi in (0,):
        assert (page.parent / "figures" / f"roi-{roi}-close-up.png").is_file()
    table = html[html.index("All 12 ROIs"):]
    assert table.count("<tr") == N_ROIS + 1
    assert "every frame is missing" in html


def test_report_tables_give_times_in_ms_with_three_significant_digits(session):
    html = session["summary"].report_path.read_text(encoding="utf-8")
    headers = re.findall(r"<th[^>]*>(.*?)</th>", html, flags=re.S)
    assert not [h for h in headers if "(s)" in h or "_s" in h]
    assert "kernel decay (ms)" in html and "half-decay (ms)" in html
    with h5py.File(session["summary"].results_path, "r") as results:
        calibrated = results["calibrated"][:].astype(bool)
    # each calibrated ROI names the source of its count calibration (electrical spikes in this session)
    assert "calibration source" in html
    assert calibrated.any() and html.count(">paired</td>") == int(calibrated.sum())
    with h5py.File(session["summary"].results_path, "r") as results:
        decay_ms = float(results["kernel_decay_s"][0]) * 1e3
    table = html[html.index("All 12 ROIs"):]
    first_row = re.findall(r"<td[^>]*>(.*?)</td>", table.split("<tr")[2])
    assert f"{decay_ms:.3g}" in first_row
    # (whole numbers are counts: spikes, missing frames)
    fractions = re.findall(r"<td[^>]*>(-?[0-9]*\.[0-9]+)</td>", table)
    assert fractions and all(len(c.lstrip("-").replace(".", "").lstrip("0")) <= 3 for c in fractions)


def test_report_opens_in_a_browser_with_every_image_loaded(session, browse, tmp_path):
    # the page counts, on <body>, the images whose naturalWidth > 0 once the window has loaded
    seen = browse(session["summary"].report_path, tmp_path / "profile")
    assert int(seen["images-total"]) >= 6
    assert seen["images-loaded"] == seen["images-total"]
    # nothing sticks out of its container on a wide screen or on a phone (the page marks what does on <body>)
    for width in (1400, 375):
        seen = browse(session["summary"].report_path, tmp_path / f"profile-{width}", width=width)
        assert seen["viewport-width"] == str(width)
        assert seen["overflowing"] == "0", seen["overflowing-what"]


def test_nwb_export_holds_the_dff_of_the_results(session):
    pytest.importorskip("pynwb")
    from calcium.io.nwb import read_nwb_traces

    data, _ = read_results(session["summary"].results_path)
    traces, rate = read_nwb_traces(session["summary"].nwb_path, series="dff")
    assert rate == RATE and np.array_equal(traces, data["dff"].astype(np.float64), equal_nan=True)


# ---------------------------------------------------------------------------
# ways of running give the same results
# ---------------------------------------------------------------------------
def test_worker_processes_give_results_identical_to_serial(session, tmp_path):
    config = _same_config(session, tmp_path / "out", execution={"backend": "processes", "workers": 2})
    summary = run_pipeline(config, progress=False)
    assert summary.backend == "processes" and summary.workers == 2
    _assert_same_results(session["summary"].results_path, summary.results_path)


def test_worker_processes_run_the_numerical_libraries_on_one_thread_each():
    # Common practice for process-level parallelism: with a worker per core, the libraries' own thread pools
    # (OpenBLAS, OpenMP, MKL) would only compete with the other workers. A user's own setting is kept, and this
    # process's environment is left as it was.
    from calcium.pipeline.executors import _SINGLE_THREAD_VARIABLES

    before = dict(os.environ)
    with ProcessExecutor(1) as executor:
        seen = dict(executor.map_chunks(os.getenv, list(enumerate(_SINGLE_THREAD_VARIABLES))))
    assert [seen[i] for i in range(3)] == [before.get(name, "1") for name in _SINGLE_THREAD_VARIABLES]
    assert dict(os.environ) == before


def test_a_run_killed_part_way_resumes_to_identical_results(session, tmp_path):
    folder = tmp_path / "out"
    config_path = tmp_path / "run.toml"
    config_path.write_text(f'[inputs]\ntraces = "{session["traces"].as_posix()}"\n'
                           f'electrical_spikes = "{session["electrical"].as_posix()}"\n'
                           f'[output]\nfolder = "{folder.as_posix()}"\nf0 = true\n[report]\nenabled = false\n'
                           f'[kernel_fit]\nn_bootstrap = 0\n[execution]\nbackend = "serial"\nchunk_rois = 1\n')
    # The child slows every chunk down so that it can be killed part-way.
    script = textwrap.dedent(f"""
        import time
        import calcium.pipeline.stages as stages
        from calcium.pipeline import run_pipeline
        compute = stages.process_chunk
        def slow(task):
            time.sleep(0.25)
            return compute(task)
        stages.process_chunk = slow
        run_pipeline({str(config_path)!r}, progress=False)
    """)
    child = subprocess.Popen([sys.executable, "-c", script])
    results = folder / "results.h5"
    done, deadline = 0, time.monotonic() + 60
    try:
        while done < 3 and time.monotonic() < deadline and child.poll() is None:
            time.sleep(0.05)
            try:
                with h5py.File(results, "r", locking=False) as handle:
                    done = int(handle["progress/chunk_done"][()].sum())
            except (OSError, KeyError):
                pass
    finally:
        child.send_signal(signal.SIGKILL)
        child.wait()
    assert 3 <= done < N_ROIS, "the child was not caught part-way"
    with open_results(results, allow_incomplete=True) as view:
        assert not view.complete and view.chunk_done.sum() >= 3

    summary = run_pipeline(config_path, progress=False)
    assert summary.chunks_resumed >= 3
    _assert_same_results(session["summary"].results_path, summary.results_path)


def test_ctrl_c_stops_cleanly_and_the_rerun_finishes_identically(session, tmp_path, monkeypatch):
    config = _same_config(session, tmp_path / "out")
    compute, calls = stages.process_chunk, []

    def interrupted_on_the_third_chunk(task):
        calls.append(task.chunk_id)
        if len(calls) == 3:
            raise KeyboardInterrupt
        return compute(task)

    monkeypatch.setattr(stages, "process_chunk", interrupted_on_the_third_chunk)
    with pytest.raises(KeyboardInterrupt):
        run_pipeline(config, progress=False)
    with open_results(tmp_path / "out" / "results.h5", allow_incomplete=True) as view:
        assert view.chunk_done.tolist() == [True, True] + [False] * (N_ROIS - 2) and not view.complete
    monkeypatch.setattr(stages, "process_chunk", compute)
    summary = run_pipeline(config, progress=False)
    assert summary.chunks_resumed == 2
    _assert_same_results(session["summary"].results_path, summary.results_path)


def test_a_full_disk_stops_the_run_clearly_and_the_rerun_completes(session, tmp_path, monkeypatch):
    config = _same_config(session, tmp_path / "out")
    write, calls = ResultStore._write, []

    def disk_fills_up(self, name, selection, values):
        # (the workers write the results themselves: here the disk fills up under the parent's done flags)
        calls.append(name)
        if calls.count("progress/chunk_done") > 4:
            raise OSError(errno.ENOSPC, "No space left on device")
        write(self, name, selection, values)

    monkeypatch.setattr(ResultStore, "_write", disk_fills_up)
    with pytest.raises(OutputError, match="disk is full"):
        run_pipeline(config, progress=False)
    with pytest.raises(CalciumInputError, match="incomplete"):
        open_results(tmp_path / "out" / "results.h5")
    assert not (tmp_path / "out" / "spikes.csv").exists()
    monkeypatch.setattr(ResultStore, "_write", write)
    run_pipeline(config, progress=False)
    _assert_same_results(session["summary"].results_path, tmp_path / "out" / "results.h5")


def test_a_disk_that_fills_up_under_the_rows_written_by_the_workers_stops_clearly(session, tmp_path, monkeypatch):
    # The results go from the worker straight into the file (store.RowWriter); a full disk there
    # must end the run as clearly as one under the parent's writes, and the rerun must complete.
    from calcium.pipeline import store as store_module

    config = _same_config(session, tmp_path / "out")
    pwrite, calls = store_module._pwrite_all, []

    def disk_fills_up(fd, data, offset):
        calls.append(offset)
        if len(calls) > 60:  # (a few chunks of one ROI: each writes every per-ROI dataset)
            raise OSError(errno.ENOSPC, "No space left on device")
        pwrite(fd, data, offset)

    monkeypatch.setattr(store_module, "_pwrite_all", disk_fills_up)
    with pytest.raises(OutputError, match="disk is full.*rerun the same command"):
        run_pipeline(config, progress=False)
    with open_results(tmp_path / "out" / "results.h5", allow_incomplete=True) as view:
        assert 0 < view.chunk_done.sum() < N_ROIS and not view.complete
    assert not (tmp_path / "out" / "spikes.csv").exists()
    monkeypatch.setattr(store_module, "_pwrite_all", pwrite)
    summary = run_pipeline(config, progress=False)
    assert 0 < summary.chunks_resumed < N_ROIS
    _assert_same_results(session["summary"].results_path, summary.results_path)


def test_a_finished_run_is_not_computed_again(session, tmp_path, monkeypatch):
    config = _same_config(session, tmp_path / "out")
    run_pipeline(config, progress=False)
    monkeypatch.setattr(stages, "process_chunk", lambda task: pytest.fail("recomputed a finished chunk"))
    summary = run_pipeline(config, progress=False)
    assert summary.chunks_resumed == summary.chunks_total == N_ROIS


def test_a_rerun_with_other_parameters_is_refused_unless_overwrite(session, tmp_path):
    run_pipeline(_same_config(session, tmp_path / "out"), progress=False)
    changed = _same_config(session, tmp_path / "out", dff={"window_s": 20.0})
    with pytest.raises(OutputMismatchError, match=r"dff\.window_s: 60\.0 -> 20\.0"):
        run_pipeline(changed, progress=False)
    summary = run_pipeline(changed, overwrite=True, progress=False)
    with open_results(summary.results_path) as view:
        assert view.attrs["parameters"]["config"]["dff"]["window_s"] == 20.0


# ---------------------------------------------------------------------------
# inputs
# ---------------------------------------------------------------------------
def test_npy_and_csv_traces_give_the_results_of_the_hdf5_file(session, tmp_path):
    raw = session["raw"]
    npy = write_traces(tmp_path / "t.npy", raw)
    csv = write_traces(tmp_path / "t.csv", raw, frame_rate=RATE)
    h5 = write_traces(tmp_path / "t.h5", raw, frame_rate=RATE)
    # the same values in Fortran order, and big-endian (read through the reader's byte buffer)
    fortran = tmp_path / "fortran.npy"
    np.save(fortran, np.asfortranarray(raw))
    swapped = tmp_path / "swapped.npy"
    np.save(swapped, raw.astype(">f8"))
    outputs = []
    for path, extra in ((h5, {}), (npy, {"frame_rate": RATE}), (csv, {}), (fortran, {"frame_rate": RATE}),
                        (swapped, {"frame_rate": RATE})):
        config = _config(tmp_path / path.name.replace(".", "_"), path, inputs=extra, execution={"chunk_rois": 4})
        outputs.append(run_pipeline(config, progress=False).results_path)
    assert not (tmp_path / "t_csv" / ".calcium-work").exists()  # the binary copy of the CSV is removed
    data = [_datasets(p) for p in outputs]
    for other in data[1:]:
        for name in ("dff", "activity", "denoised", "snr", "spike_counts", "quality_flags"):
            assert np.array_equal(data[0][name], other[name], equal_nan=True), name


def test_frame_rate_must_be_known_and_agree_with_the_file(session, tmp_path):
    with pytest.raises(ConfigError, match=r"inputs\.frame_rate = 25 Hz but .*traces\.h5 records 20 Hz"):
        run_pipeline(_config(tmp_path / "a", session["traces"], inputs={"frame_rate": 25.0}), progress=False)
    npy = write_traces(tmp_path / "t.npy", session["raw"][:2])
    with pytest.raises(ConfigError, match="does not record the frame rate"):
        run_pipeline(_config(tmp_path / "b", npy), progress=False)


def test_electrical_spikes_of_a_roi_that_does_not_exist_are_refused(session, tmp_path):
    bad = write_spike_table(tmp_path / "e.csv", {N_ROIS + 3: [1.0, 2.0]})
    with pytest.raises(CalciumInputError, match=f"names ROI {N_ROIS + 3}"):
        run_pipeline(_config(tmp_path / "a", session["traces"], inputs={"electrical_spikes": str(bad)}),
                     progress=False)


def test_filter_cutoff_above_half_the_frame_rate_is_refused_before_any_work(session, tmp_path):
    config = _config(tmp_path / "a", session["traces"], filter={"kind": "lowpass", "cutoff_hz": 15.0})
    with pytest.raises(ConfigError, match=r"\[filter\].*20 Hz"):
        run_pipeline(config, progress=False)
    assert not (tmp_path / "a" / "results.h5").exists()


def test_a_movie_with_masks_is_extracted_once_and_analysed(tmp_path):
    # Reference: calcium.extract.extract_traces called directly on the same movie and masks.
    from calcium.extract import extract_traces
    from calcium.io import write_masks

    rng = np.random.default_rng(2)
    masks = np.zeros((3, 24, 24), dtype=bool)
    for k, (y, x) in enumerate(((5, 5), (5, 17), (17, 11))):
        masks[k, y - 2:y + 2, x - 2:x + 2] = True
    movie = 50.0 + rng.normal(0.0, 1.0, (400, 24, 24))
    movie[:, masks[1]] += 30.0 * (rng.random((400, 1)) < 0.02)
    write_movie(tmp_path / "movie.tif", movie.astype(np.float32))
    write_masks(tmp_path / "masks.tif", masks)
    config = config_from_dict({"inputs": {"movie": str(tmp_path / "movie.tif"), "masks": str(tmp_path / "masks.tif"),
                                          "frame_rate": RATE},
                               "output": {"folder": str(tmp_path / "out")}, "report": {"enabled": False},
                               "extraction": {"neuropil_radius_px": 5}, "execution": {"backend": "serial"}})
    summary = run_pipeline(config, progress=False)
    direct = extract_traces(movie.astype(np.float32), masks, neuropil_radius_px=5)
    data, attrs = read_results(summary.results_path)
    assert attrs["input_kind"] == "movie" and data["progress/extraction_done"][0] == 1
    assert np.array_equal(data["raw"], direct.corrected.astype(np.float32))
    assert np.array_equal(data["extraction/neuropil_factor"], direct.neuropil_factor)
    assert data["dff"].shape == (3, 400)


def test_an_output_folder_under_a_regular_file_fails_clearly(session, tmp_path):
    blocker = tmp_path / "results.txt"
    blocker.write_text("not a folder")
    with pytest.raises(OutputError, match="is a file, not a folder"):
        run_pipeline(_config(blocker / "out", session["traces"]), progress=False)


def test_a_read_only_output_folder_fails_clearly(session, tmp_path, monkeypatch):
    # Root ignores permission bits, so a read-only folder is simulated through os.access.
    folder = tmp_path / "out"
    folder.mkdir()
    real_access = os.access
    monkeypatch.setattr(os, "access", lambda p, mode, **kw: False if os.fspath(p) == os.fspath(folder)
                        else real_access(p, mode, **kw))
    with pytest.raises(OutputError, match="read-only"):
        run_pipeline(_config(folder, session["traces"]), progress=False)
    assert list(folder.iterdir()) == []


# ---------------------------------------------------------------------------
# executors
# ---------------------------------------------------------------------------
@pytest.mark.parametrize("executor", [SerialExecutor, lambda: ProcessExecutor(2)], ids=["serial", "processes"])
def test_executors_return_every_chunk_and_raise_worker_errors(executor):
    with executor() as pool:
        finished = []
        results = dict(pool.map_chunks(abs, [(k, -k) for k in range(9)], progress=finished.append))
        assert results == {k: k for k in range(9)} and sorted(finished) == list(range(9))
        with pytest.raises(ValueError, match="invalid literal"):
            dict(pool.map_chunks(int, [(0, "1"), (1, "x"), (2, "3")]))


def test_auto_chunks_bound_the_memory_and_leave_work_for_every_worker():
    # 2**21 values per chunk at most; at least 64 chunks when there are enough ROIs.
    assert stages.auto_chunk_rois(10_000, 100_000) == 20
    assert stages.auto_chunk_rois(20_000, 36_000) == 58
    assert stages.auto_chunk_rois(2000, 36_000) == 32
    assert stages.auto_chunk_rois(40, 1000) == 1
    assert stages.chunk_bounds(7, 3).tolist() == [0, 3, 6, 7]


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="workers start from a forkserver on Linux only")
def test_workers_leave_when_the_parent_is_killed_outright(tmp_path):
    # A SIGKILLed parent cannot shut its pool down; the workers must notice and exit by themselves.
    psutil = pytest.importorskip("psutil")
    script = textwrap.dedent("""
        import time
        from calcium.pipeline.executors import ProcessExecutor
        pool = ProcessExecutor(2)
        results = pool.map_chunks(time.sleep, [(0, 30.0), (1, 30.0)])
        next(results)
    """)
    child = subprocess.Popen([sys.executable, "-c", script])
    try:
        deadline = time.monotonic() + 30
        workers = []
        while time.monotonic() < deadline and len(workers) < 2:
            time.sleep(0.1)
            workers = [p for p in psutil.Process(child.pid).children(recursive=True)
                       if "forkserver" in " ".join(p.cmdline()) and p.ppid() != child.pid]
    finally:
        child.send_signal(signal.SIGKILL)
        child.wait()
    assert len(workers) == 2
    gone, alive = psutil.wait_procs(workers, timeout=10)
    for process in alive:  # do not leave them behind if the test fails
        process.kill()
    assert not alive


def test_infer_file_gives_the_inference_of_each_dff_row_and_resumes(session, tmp_path):
    # Reference: calcium.signal.estimate_noise, the session calibration of the file's rows and count_roi on each
    # ΔF/F row by hand; calibration="per-roi": calcium.infer.infer_spikes on each row.
    from calcium.calibrate import calibrate_session, count_roi
    from calcium.infer import infer_spikes
    from calcium.pipeline import infer_file
    from calcium.signal import estimate_noise

    dff = session["recording"].dff[:4]
    source = write_traces(tmp_path / "dff.h5", dff, frame_rate=RATE)
    summary = infer_file(source, tmp_path / "spikes.h5", backend="serial", chunk_rois=1, progress=False)
    assert summary.spikes_path == tmp_path / "spikes.csv" and summary.report_path is None
    data, attrs = read_results(summary.results_path)
    assert "dff" not in data and attrs["input_kind"] == "dff"
    calibration = calibrate_session(dff, RATE).for_session(4)
    for roi in range(4):
        direct = count_roi(dff[roi], RATE, calibration, roi, noise_sd=estimate_noise(dff[roi], RATE)).result
        assert np.array_equal(data["spike_counts"][roi], direct.spike_counts)
        assert np.array_equal(data["activity"][roi], direct.activity.astype(np.float32))
    alone = infer_file(source, tmp_path / "alone.h5", backend="serial", chunk_rois=1, progress=False,
                       calibration="per-roi")
    data, _ = read_results(alone.results_path)
    for roi in range(4):
        direct = infer_spikes(dff[roi], RATE, noise_sd=estimate_noise(dff[roi], RATE))
        assert np.array_equal(data["spike_counts"][roi], direct.spike_counts)
    again = infer_file(source, tmp_path / "spikes.h5", backend="serial", chunk_rois=1, progress=False)
    assert again.chunks_resumed == 4
    with pytest.raises(OutputMismatchError, match="indicator"):
        infer_file(source, tmp_path / "spikes.h5", indicator="GCaMP6f", backend="serial", chunk_rois=1,
                   progress=False)



def test_reused_chunk_arrays_leave_no_stale_values_in_failed_rois():
    # The (rois, frames) arrays of a written chunk are reused for the next one: a ROI without results must
    # still read as none (NaN, or 0 spikes; docs/hdf5-layout.md), whatever the array held before.
    rng = np.random.default_rng(3)
    raw = 100.0 + rng.normal(0.0, 1.0, (3, 900))
    raw[1] = np.nan          # every frame missing: no ΔF/F, no inference
    raw[2, :] = -5.0         # F0 <= 0: no ΔF/F
    params = stages.StageParams(frame_rate=30.0)
    for name in ("denoised", "activity", "spike_counts", "spike_time_offset_s", "dff"):
        stages._spare_arrays()[name] = np.full((3, 900), 7, dtype=stages._FRAME_RESULTS[name][0])
    try:
        out = stages._process_rows(raw, 0, params)
    finally:
        stages.release_spare_arrays()
    for roi in (1, 2):
        assert np.isnan(out["dff"][roi]).all() and np.isnan(out["denoised"][roi]).all()
        assert np.isnan(out["activity"][roi]).all()
        assert not out["spike_counts"][roi].any() and not out["spike_time_offset_s"][roi].any()
    assert np.isfinite(out["dff"][0]).all() and np.isfinite(out["denoised"][0]).all()
    assert not np.any(out["denoised"][0] == 7) and not np.any(out["spike_time_offset_s"][0] == 7)


@pytest.mark.parametrize("dtype", ["<f8", "<f4", ">f4", "<i2", ">u2"])
@pytest.mark.parametrize("order", ["C", "F"])
def test_rows_read_into_a_reused_array_equal_the_rows_numpy_loads(tmp_path, dtype, order):
    # Reference: numpy's own .npy reader (np.load) and astype(float64) for the stored dtype, byte order and
    # memory order; the chunk reader reads C-order files with plain file reads into a buffer it keeps.
    rng = np.random.default_rng(11)
    data = np.asarray(np.abs(rng.normal(0.0, 900.0, (7, 50))).astype(dtype), order=order)
    path = tmp_path / "traces.npy"
    np.save(path, data)
    expected = np.load(path).astype(np.float64)
    source = stages.npy_source(path)
    try:
        out = np.full((3, 50), np.nan)
        assert source.read_rows(2, 5, out=out) is out
        np.testing.assert_array_equal(out, expected[2:5])
        np.testing.assert_array_equal(source.read_rows(5, 7), expected[5:7])   # smaller chunk, same buffer
        np.testing.assert_array_equal(source.read_rows(0, 7), expected)        # larger chunk, new buffer
        with pytest.raises(ValueError, match="shape"):
            source.read_rows(0, 2, out=np.empty((3, 50)))
        with pytest.raises(ValueError, match="float64"):
            source.read_rows(0, 2, out=np.empty((2, 50), dtype=np.float32))
    finally:
        stages.release_spare_arrays()
        stages._OPEN_SOURCES.clear()


def test_a_traces_file_cut_short_after_it_was_opened_is_an_input_error_naming_it(tmp_path):
    path = tmp_path / "traces.npy"
    np.save(path, np.ones((4, 100)))
    source = stages.npy_source(path)
    os.truncate(path, os.path.getsize(path) - 8)
    with pytest.raises(CalciumInputError, match="traces.npy is shorter than its header says"):
        source.read_rows(2, 4)
    np.testing.assert_array_equal(source.read_rows(0, 2), np.ones((2, 100)))  # the rows still there


def test_compiled_spike_time_offsets_equal_the_numpy_ones():
    # Reference: stages._time_offsets (numpy: round to the frame, bincount of the offsets, mean per frame), bit
    # for bit after the float32 store; several spikes in a frame, spikes before the first and after the last
    # frame (clipped), halves of a frame (rounded to even) and unordered times (left to numpy).
    rng = np.random.default_rng(12)
    rate, n_frames = 30.0, 500
    for trial in range(50):
        times = np.sort(np.concatenate([rng.uniform(-0.05, n_frames / rate + 0.05, rng.integers(0, 80)),
                                        np.round(rng.uniform(0, n_frames, 5)) / rate + 0.5 / rate,
                                        np.repeat(rng.uniform(0, n_frames / rate, 3), 2)]))
        row = np.full(n_frames, 9.0, dtype=np.float32)
        assert stages._offsets_into(times, rate, row)
        np.testing.assert_array_equal(row, stages._time_offsets(times, n_frames, rate).astype(np.float32))
    row = np.full(n_frames, 9.0, dtype=np.float32)
    assert not stages._offsets_into(np.array([2.0, 1.0]), rate, row) and (row == 9.0).all()
    assert not stages._offsets_into(np.array([1.0, np.nan]), rate, row)
