"""Tests for calcium/io/traces.py: reading and writing traces as .npy, .csv and HDF5."""
import hashlib
import re
import tempfile
from pathlib import Path

import h5py
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from calcium._checks import CalciumInputError
from calcium.io.traces import find_trace_dataset, read_traces, write_traces

FORMATS = (".npy", ".csv", ".h5")


def _traces_with_gaps(seed=0, shape=(3, 40)):
    rng = np.random.default_rng(seed)
    traces = rng.normal(100.0, 5.0, size=shape)
    traces[0, 3] = np.nan
    traces[-1, -1] = np.nan
    return traces


@pytest.mark.parametrize("suffix", FORMATS)
def test_round_trip_keeps_values_and_missing_samples(tmp_path, suffix):
    # Reference: the array written (identity); NaN positions must survive.
    traces = _traces_with_gaps()
    path = write_traces(tmp_path / f"t{suffix}", traces)
    data = read_traces(path)
    np.testing.assert_array_equal(data.traces, traces)
    assert data.traces.dtype == np.float64
    assert data.missing.count == 2
    assert data.frame_rate is None
    # Reference: hashlib on the file's bytes.
    assert data.sha256 == hashlib.sha256(Path(path).read_bytes()).hexdigest()


@pytest.mark.parametrize("suffix", [".csv", ".h5", ".hdf5"])
def test_frame_rate_survives_a_round_trip(tmp_path, suffix):
    traces = _traces_with_gaps(1)
    data = read_traces(write_traces(tmp_path / f"t{suffix}", traces, frame_rate=30.0))
    # CSV: frame k written at k / frame_rate (the package's time convention); the rate is fitted back.
    assert data.frame_rate == pytest.approx(30.0, rel=1e-12)
    np.testing.assert_array_equal(data.traces, traces)


def test_a_single_trace_comes_back_as_one_row(tmp_path):
    trace = np.arange(7.0)
    for suffix in FORMATS:
        data = read_traces(write_traces(tmp_path / f"one{suffix}", trace))
        assert data.traces.shape == (1, 7), suffix
        np.testing.assert_array_equal(data.traces[0], trace)


@settings(max_examples=25, deadline=None)
@given(rois=st.integers(1, 4), frames=st.integers(1, 25), seed=st.integers(0, 2**31 - 1),
       suffix=st.sampled_from(FORMATS), nan_fraction=st.sampled_from([0.0, 0.2, 1.0]))
def test_shapes_and_nan_positions_survive_any_round_trip(rois, frames, seed, suffix, nan_fraction):
    rng = np.random.default_rng(seed)
    traces = rng.normal(size=(rois, frames)) * 10.0 ** rng.integers(-5, 6)
    traces[rng.random(traces.shape) < nan_fraction] = np.nan
    with tempfile.TemporaryDirectory() as folder:
        # (tiny random shapes, some with more ROIs than frames: the orientation check has tests of its own)
        data = read_traces(write_traces(Path(folder) / f"t{suffix}", traces), orientation_check=False)
    assert data.traces.shape == traces.shape
    np.testing.assert_array_equal(np.isnan(data.traces), np.isnan(traces))
    np.testing.assert_array_equal(data.traces, traces)


def test_csv_with_header_time_column_and_empty_cells(tmp_path):
    path = tmp_path / "f.csv"
    path.write_text("time_s,cell A,cell B\n0.0,1,5\n0.05,2,\n0.1,nan,7\n0.15,4,8\n")
    data = read_traces(path)
    assert data.frame_rate == pytest.approx(20.0)
    assert data.roi_names == ("cell A", "cell B")
    np.testing.assert_array_equal(data.traces, [[1, 2, np.nan, 4], [5, np.nan, 7, 8]])
    assert data.missing.count == 2 and data.gap_frames.size == 0


def test_csv_without_header_is_one_column_per_roi(tmp_path):
    path = tmp_path / "f.csv"
    path.write_text("1.5,2\n3,4e2\n")
    data = read_traces(path)
    np.testing.assert_array_equal(data.traces, [[1.5, 3.0], [2.0, 400.0]])
    assert data.frame_rate is None and data.roi_names is None


def test_csv_time_column_named_time_and_rounded_timestamps(tmp_path):
    # 30 Hz written with 3 decimals (steps of 33 or 34 ms) is still evenly spaced.
    times = np.round(np.arange(90) / 30.0, 3)
    lines = ["time"] + [f"{t:.3f}" for t in times]
    (tmp_path / "f.csv").write_text("\n".join(f"{line},{i}" if i else f"{line},roi" for i, line in enumerate(lines)))
    data = read_traces(tmp_path / "f.csv")
    assert data.frame_rate == pytest.approx(30.0, rel=1e-3)
    assert data.n_frames == 90


def test_skipped_time_steps_become_missing_frames_and_are_reported(tmp_path):
    path = tmp_path / "gaps.csv"
    # Frame interval 0.1 s; frames 2 and 5, 6 absent from the file; clock starts at 10 s.
    times = [10.0, 10.1, 10.3, 10.4, 10.7, 10.8]
    path.write_text("time_s,a\n" + "".join(f"{t},{i + 1}\n" for i, t in enumerate(times)))
    with pytest.warns(UserWarning, match="gaps.csv.*3 frame"):
        data = read_traces(path)
    assert data.frame_rate == pytest.approx(10.0)
    np.testing.assert_array_equal(data.traces[0], [1, 2, np.nan, 3, 4, np.nan, np.nan, 5, 6])
    assert data.gap_frames.tolist() == [2, 5, 6]
    assert data.first_frame_time_s == 10.0
    assert "3 frame(s) absent" in data.describe()


def test_uneven_time_spacing_is_an_error_naming_file_and_line(tmp_path):
    path = tmp_path / "uneven.csv"
    path.write_text("time_s,a\n0,1\n0.1,2\n0.2,3\n0.35,4\n0.4,5\n")
    with pytest.raises(CalciumInputError, match=r"uneven.csv, line 5: uneven time spacing"):
        read_traces(path)


def test_a_time_column_that_would_leave_most_frames_missing_is_an_error(tmp_path):
    path = tmp_path / "typo.csv"
    path.write_text("time_s,a\n0,1\n0.1,2\n0.2,3\n100.3,4\n")  # 100.3 typed for 0.3
    with pytest.raises(CalciumInputError, match=r"typo.csv, line 5: the time column would leave more frames"):
        read_traces(path)


def test_a_time_column_that_goes_backwards_is_an_error(tmp_path):
    path = tmp_path / "back.csv"
    path.write_text("time_s,a\n0,1\n0.1,2\n0.1,3\n")
    with pytest.raises(CalciumInputError, match=r"back.csv, line 4: time 0.1 does not increase"):
        read_traces(path)


def test_non_numeric_cells_and_ragged_rows_name_the_line(tmp_path):
    path = tmp_path / "bad.csv"
    path.write_text("a,b\n1,2\n3,oops\n")
    with pytest.raises(CalciumInputError, match=r"bad.csv, line 3, column 2: 'oops'"):
        read_traces(path)
    path.write_text("a,b\n1,2\n3\n")
    with pytest.raises(CalciumInputError, match=r"bad.csv, line 3: 1 value"):
        read_traces(path)


def test_corrupted_npy_file_is_an_input_error_naming_it(tmp_path):
    path = tmp_path / "cut.npy"
    np.save(path, np.ones((4, 100)))
    path.write_bytes(path.read_bytes()[:300])  # header intact, data cut short
    with pytest.raises(CalciumInputError, match="cut.npy"):
        read_traces(path)
    path.write_bytes(b"\x93NUMPY garbage")
    with pytest.raises(CalciumInputError, match="cut.npy"):
        read_traces(path)


def test_object_arrays_are_never_unpickled(tmp_path):
    path = tmp_path / "obj.npy"
    np.save(path, np.array([[1, "a"]], dtype=object), allow_pickle=True)
    with pytest.raises(CalciumInputError, match="obj.npy.*pickle"):
        read_traces(path)


def test_missing_empty_and_wrongly_shaped_files_are_clear_errors(tmp_path):
    with pytest.raises(CalciumInputError, match="absent.npy"):
        read_traces(tmp_path / "absent.npy")
    (tmp_path / "empty.csv").write_bytes(b"")
    with pytest.raises(CalciumInputError, match="empty.csv is empty"):
        read_traces(tmp_path / "empty.csv")
    np.save(tmp_path / "cube.npy", np.zeros((2, 3, 4)))
    with pytest.raises(CalciumInputError, match=r"cube.npy.*\(2, 3, 4\)"):
        read_traces(tmp_path / "cube.npy")
    np.save(tmp_path / "words.npy", np.array(["a", "b"]))
    with pytest.raises(CalciumInputError, match="words.npy.*numeric"):
        read_traces(tmp_path / "words.npy")
    (tmp_path / "t.txt").write_text("1\n")
    with pytest.raises(CalciumInputError, match="unsupported"):
        read_traces(tmp_path / "t.txt")


def test_hdf5_default_dataset_and_attribute_lookup(tmp_path):
    path = tmp_path / "rec.h5"
    with h5py.File(path, "w") as handle:
        handle.attrs["frame_rate"] = 15.0
        handle.create_dataset("session/fluorescence", data=np.ones((2, 9), dtype=np.float32))
        handle.create_dataset("notes", data=np.array([b"text"]))
    data = read_traces(path)  # the only 1-D/2-D numeric dataset
    assert data.traces.shape == (2, 9) and data.frame_rate == 15.0
    with h5py.File(path, "a") as handle:
        handle.create_dataset("other", data=np.zeros(5))
        handle["other"].attrs["frame_rate"] = 7.5
    with pytest.raises(CalciumInputError, match=r"rec.h5 has more than one.*other \(5,\).*session/fluorescence"):
        read_traces(path)
    data = read_traces(path, dataset="other")  # dataset attribute wins over the file attribute
    assert data.traces.shape == (1, 5) and data.frame_rate == 7.5
    found = find_trace_dataset(path, dataset="/session/fluorescence")
    assert (found.dataset, found.shape, found.n_rois, found.n_frames, found.frame_rate) == \
        ("session/fluorescence", (2, 9), 2, 9, 15.0)
    with pytest.raises(CalciumInputError, match=r"no dataset 'nope'.*datasets available"):
        read_traces(path, dataset="nope")
    with pytest.raises(CalciumInputError, match=r"dataset 'notes'"):
        read_traces(path, dataset="notes")


def test_hdf5_dataset_named_traces_is_the_default(tmp_path):
    path = tmp_path / "rec.h5"
    with h5py.File(path, "w") as handle:
        handle.create_dataset("traces", data=np.arange(6.0).reshape(2, 3))
        handle.create_dataset("other", data=np.zeros(5))
    np.testing.assert_array_equal(read_traces(path).traces, np.arange(6.0).reshape(2, 3))


def test_dataset_argument_only_applies_to_hdf5(tmp_path):
    np.save(tmp_path / "a.npy", np.ones(3))
    with pytest.raises(ValueError, match="dataset='x' only applies to HDF5"):
        read_traces(tmp_path / "a.npy", dataset="x")


def test_write_refuses_to_overwrite_an_input_and_warns_that_npy_drops_the_rate(tmp_path):
    source = write_traces(tmp_path / "raw.csv", np.ones((2, 4)))
    with pytest.raises(ValueError, match="raw.csv"):
        write_traces(source, np.zeros((2, 4)), inputs=[source])
    np.testing.assert_array_equal(read_traces(source).traces, np.ones((2, 4)))
    with pytest.warns(UserWarning, match="x.npy: a .npy file cannot hold the frame rate"):
        write_traces(tmp_path / "x.npy", np.ones(3), frame_rate=10.0)
    np.testing.assert_array_equal(read_traces(tmp_path / "x.npy").traces, [[1.0, 1.0, 1.0]])
    with pytest.raises(ValueError, match="frame_rate"):
        write_traces(tmp_path / "x.csv", np.ones(3), frame_rate=-1.0)


def test_csv_time_step_much_shorter_than_a_frame_is_refused_not_merged(tmp_path):
    # two lines 0.05 s apart in a 1 s series would land on the same frame and one would be lost
    path = tmp_path / "short_step.csv"
    path.write_text("time_s,a\n0,1\n1,2\n1.05,3\n2,4\n3,5\n")
    with pytest.raises(CalciumInputError, match="uneven time spacing"):
        read_traces(path)


# --------------------------------------------------------------------------- garbage in: refused or flagged
def _sha(path):
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


@pytest.mark.parametrize("suffix", FORMATS)
def test_frames_by_rois_array_is_refused_and_the_file_is_left_alone(tmp_path, suffix):
    # 5 ROIs of 600 frames stored as (frames, rois): read as 600 "ROIs" of 5 frames.
    sideways = np.random.default_rng(0).normal(100.0, 3.0, size=(600, 5))
    path = write_traces(tmp_path / f"sideways{suffix}", sideways)
    before = _sha(path)
    with pytest.raises(CalciumInputError, match=r"sideways.* 600 ROIs of 5 frame\(s\).*swapped.*Transpose"):
        read_traces(path)
    assert _sha(path) == before
    assert read_traces(path, orientation_check=False).traces.shape == (600, 5)  # the user insists


def test_a_csv_written_one_line_per_roi_is_refused(tmp_path):
    # A table with one line per ROI and one column per frame (the package wants one column per ROI).
    table = np.random.default_rng(1).normal(100.0, 3.0, size=(4, 300))
    path = tmp_path / "per_roi_lines.csv"
    path.write_text("\n".join(",".join(f"{v:.3f}" for v in row) for row in table) + "\n")
    with pytest.raises(CalciumInputError, match=r"300 ROIs of 4 frame\(s\).*one line per ROI"):
        read_traces(path)


def test_more_rois_than_frames_but_not_tenfold_is_read_with_a_warning_and_a_flag(tmp_path):
    path = write_traces(tmp_path / "wide.npy", np.ones((30, 20)))
    with pytest.warns(UserWarning, match=r"30 ROIs of 20 frame\(s\).*more ROIs than frames"):
        data = read_traces(path)
    assert data.suspect_orientation and data.traces.shape == (30, 20)
    assert not read_traces(write_traces(tmp_path / "tall.npy", np.ones((20, 30)))).suspect_orientation


@pytest.mark.parametrize("name", ["Time (s)", "t", "frame"])
def test_a_clock_column_under_an_unknown_header_is_not_read_as_a_roi(tmp_path, name):
    path = tmp_path / "clock.csv"
    step = 1.0 if name == "frame" else 1 / 30
    rng = np.random.default_rng(2)
    lines = [f"{name},cell 1,cell 2"] + [f"{k * step:.4f},{rng.normal(100, 3):.3f},{rng.normal(80, 3):.3f}"
                                         for k in range(40)]
    path.write_text("\n".join(lines) + "\n")
    before = _sha(path)
    with pytest.raises(CalciumInputError, match=rf"clock.csv: column 1 \('{re.escape(name)}'\) rises in even steps"):
        read_traces(path)
    assert _sha(path) == before
    as_time = read_traces(path, time_column=name)  # the user names the time column
    assert as_time.roi_names == ("cell 1", "cell 2") and as_time.frame_rate == pytest.approx(1 / step, rel=1e-3)
    assert read_traces(path, time_column=None).n_rois == 3  # or insists that it is a ROI


def test_a_headerless_clock_column_is_refused_too(tmp_path):
    path = tmp_path / "noheader.csv"
    path.write_text("".join(f"{k * 0.05:.2f},{100 + (k % 3)}\n" for k in range(20)))
    with pytest.raises(CalciumInputError, match=r"column 1 \(no header\) rises in even steps of 0.05.*time_s"):
        read_traces(path)
    assert read_traces(path, time_column=0).frame_rate == pytest.approx(20.0)


@pytest.mark.parametrize("text, fragment", [
    ("time_s;a;b\n0;1.5;2\n0.1;1.6;2.1\n", r"separates its values with ';'; this reader"),
    ("time_s;a;b\n0;1,5;2\n0,1;1,6;2,1\n", r"separates its values with ';' and decimal commas \(1,5 for 1.5\)"),
    ("a\tb\n1,5\t2,25\n1,6\t2,5\n", r"line 2, column 1: '1,5' is not a number \(a decimal comma\?"),
    ("a,b\n1,5,2,25\n", r"line 2: 4 value\(s\), expected 2 \(decimal commas"),
    ("1,05,2,5\n1,25,2,07\n", r"seems to write decimal commas"),
    ("a,b\nTrue,False\n", r"'True' is not a number \(boolean values are not fluorescence"),
])
def test_separators_decimal_commas_and_booleans_in_csv_are_named(tmp_path, text, fragment):
    path = tmp_path / "locale.csv"
    path.write_text(text)
    with pytest.raises(CalciumInputError, match=fragment):
        read_traces(path)
    assert path.read_text() == text


def test_whole_numbers_without_leading_zeros_are_not_taken_for_decimal_commas(tmp_path):
    path = tmp_path / "counts.csv"
    path.write_text("101,250\n98,260\n103,255\n")  # photon counts: three frames of two ROIs
    np.testing.assert_array_equal(read_traces(path).traces, [[101, 98, 103], [250, 260, 255]])


@pytest.mark.parametrize("suffix", [".npy", ".h5"])
def test_boolean_arrays_are_refused_as_traces(tmp_path, suffix):
    raster = np.random.default_rng(3).random((3, 50)) < 0.1
    path = tmp_path / f"raster{suffix}"
    if suffix == ".npy":
        np.save(path, raster)
    else:
        with h5py.File(path, "w") as handle:
            handle.create_dataset("traces", data=raster)
    with pytest.raises(CalciumInputError, match=r"raster.*boolean \(True/False\).*spike raster or a mask"):
        read_traces(path)


def test_a_time_column_in_milliseconds_is_refused(tmp_path):
    path = tmp_path / "ms.csv"
    path.write_text("time_s,a\n" + "".join(f"{k * 25},{100 + k % 2}\n" for k in range(20)))  # 40 Hz in ms
    with pytest.raises(CalciumInputError,
                       match=r"steps by 25 per frame, a frame rate of 0.04 Hz.*milliseconds\? that would be 40 Hz"):
        read_traces(path)


def test_an_hdf5_frame_rate_attribute_holding_the_period_is_refused(tmp_path):
    path = tmp_path / "period.h5"
    with h5py.File(path, "w") as handle:
        handle.attrs["frame_rate"] = 1 / 30
        handle.create_dataset("traces", data=np.ones((2, 100)))
    with pytest.raises(CalciumInputError, match=r"period.h5: the frame_rate attribute=0.0333.*1/0.0333+ = 30 Hz"):
        read_traces(path)
