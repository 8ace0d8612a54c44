"""Tests for calcium/io/spikes.py: spike-time tables in CSV."""
import csv
import tempfile
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from calcium._checks import CalciumInputError
from calcium.io.spikes import read_spike_times, write_spike_table


def _rows(path):
    with open(path, newline="") as handle:
        return list(csv.reader(handle))


def test_round_trip_folds_equal_times_into_count(tmp_path):
    spikes = {0: np.array([0.5, 0.1, 0.5, 0.5]), 3: np.array([2.25])}
    path = write_spike_table(tmp_path / "s.csv", spikes)
    # The file layout is the documented one: roi,time_s,count with equal times folded.
    assert _rows(path) == [["roi", "time_s", "count"], ["0", "0.1", "1"], ["0", "0.5", "3"], ["3", "2.25", "1"]]
    back = read_spike_times(path)
    assert list(back) == [0, 3]
    np.testing.assert_array_equal(back[0], [0.1, 0.5, 0.5, 0.5])
    np.testing.assert_array_equal(back[3], [2.25])


def test_a_roi_without_spikes_is_kept(tmp_path):
    back = read_spike_times(write_spike_table(tmp_path / "s.csv", [np.array([1.0]), np.array([]), [0.0]]))
    assert list(back) == [0, 1, 2]
    assert back[1].size == 0 and back[1].dtype == np.float64
    np.testing.assert_array_equal(back[2], [0.0])


@settings(max_examples=30, deadline=None)
@given(st.dictionaries(st.integers(0, 50),
                       st.lists(st.floats(0, 1e4, allow_nan=False, allow_infinity=False), max_size=8),
                       max_size=5))
def test_any_spike_table_survives_a_round_trip(spikes):
    with tempfile.TemporaryDirectory() as folder:
        back = read_spike_times(write_spike_table(Path(folder) / "s.csv", spikes))
    assert list(back) == sorted(spikes)
    for roi, times in spikes.items():
        np.testing.assert_array_equal(back[roi], np.sort(np.asarray(times, dtype=float)))


def test_one_time_per_line_is_roi_zero(tmp_path):
    path = tmp_path / "t.csv"
    path.write_text("0.3\n0.1\n\n2e-1\n")
    np.testing.assert_array_equal(read_spike_times(path)[0], [0.1, 0.2, 0.3])
    path.write_text("time_s\n1.5\n0.5\n")
    assert list(read_spike_times(path)) == [0]
    np.testing.assert_array_equal(read_spike_times(path)[0], [0.5, 1.5])


def test_columns_may_come_in_any_order_and_count_repeats_a_time(tmp_path):
    path = tmp_path / "t.csv"
    path.write_text("count,time,roi\n2,0.75,4\n1,0.25,4\n")
    np.testing.assert_array_equal(read_spike_times(path)[4], [0.25, 0.75, 0.75])


@pytest.mark.parametrize("line, message", [
    ("0,-0.5,1", r"line 3: spike time -0.5 s is negative"),
    ("0,nan,1", r"line 3: spike time 'nan' is not finite"),
    ("0,inf,1", r"line 3: spike time 'inf' is not finite"),
    ("0,abc,1", r"line 3: spike time 'abc' is not a number"),
    ("-1,0.5,1", r"line 3: roi must be a whole number >= 0"),
    ("0,0.5,1.5", r"line 3: count must be a whole number >= 0"),
    ("0,0.5", r"line 3: 2 value\(s\), expected 3"),
])
def test_bad_lines_are_errors_naming_file_and_line(tmp_path, line, message):
    path = tmp_path / "bad.csv"
    path.write_text(f"roi,time_s,count\n0,0.1,1\n{line}\n")
    with pytest.raises(CalciumInputError, match="bad.csv, " + message):
        read_spike_times(path)


def test_negative_time_in_a_plain_list_names_the_line(tmp_path):
    path = tmp_path / "plain.csv"
    path.write_text("0.1\n0.2\n-3\n")
    with pytest.raises(CalciumInputError, match="plain.csv, line 3: spike time -3.0 s is negative"):
        read_spike_times(path)


def test_missing_empty_and_unlabelled_files_are_clear_errors(tmp_path):
    with pytest.raises(CalciumInputError, match="none.csv"):
        read_spike_times(tmp_path / "none.csv")
    (tmp_path / "empty.csv").write_text("")
    with pytest.raises(CalciumInputError, match="empty.csv is empty"):
        read_spike_times(tmp_path / "empty.csv")
    (tmp_path / "two.csv").write_text("0,0.5\n")
    with pytest.raises(CalciumInputError, match="two.csv, line 1: without a header"):
        read_spike_times(tmp_path / "two.csv")
    (tmp_path / "hdr.csv").write_text("cell,when\n0,0.5\n")
    with pytest.raises(CalciumInputError, match="hdr.csv: the header must name exactly one time column"):
        read_spike_times(tmp_path / "hdr.csv")


def test_writing_bad_times_or_roi_keys_is_refused(tmp_path):
    with pytest.raises(ValueError, match=r"spike_times\[2\] must be finite times >= 0"):
        write_spike_table(tmp_path / "s.csv", {2: [0.1, -1.0]})
    with pytest.raises(ValueError, match="keys must be ROI indices"):
        write_spike_table(tmp_path / "s.csv", {"a": [0.1]})
    with pytest.raises(ValueError, match="spike_times must be a dict"):
        write_spike_table(tmp_path / "s.csv", np.array([0.1]))
    assert not (tmp_path / "s.csv").exists()


# --------------------------------------------------------------------------- times in fixed decimals
def test_times_to_fixed_decimals_are_rounded_and_folded(tmp_path):
    # Reference: the times written out by hand (0.1234564 rounds down, 0.1234566 up; 2.0 gets its zeros).
    spikes = {0: [0.1234564, 0.1234566, 2.0], 1: [], 4: [0.25000001, 0.25]}
    path = write_spike_table(tmp_path / "s.csv", spikes, decimals=6)
    assert _rows(path) == [["roi", "time_s", "count"], ["0", "0.123456", "1"], ["0", "0.123457", "1"],
                           ["0", "2.000000", "1"], ["1", "", "0"], ["4", "0.250000", "2"]]
    path = write_spike_table(tmp_path / "s0.csv", {3: [1.4, 12.6]}, decimals=0)
    assert _rows(path)[1:] == [["3", "1", "1"], ["3", "13", "1"]]
    for bad in (-1, 10, 2.5, True):
        with pytest.raises(ValueError, match="decimals must be a whole number in"):
            write_spike_table(tmp_path / "bad.csv", spikes, decimals=bad)
    assert not (tmp_path / "bad.csv").exists()


@settings(max_examples=40, deadline=None)
@given(st.lists(st.floats(0, 1e5, allow_nan=False, allow_infinity=False), max_size=20), st.integers(0, 9))
def test_fixed_decimal_times_read_back_within_half_a_unit(times, decimals):
    # Reference: Python's decimal module gives the exact value of each written time; it must lie within
    # half a unit of the last decimal of the true time (plus the rounding of t * 10**decimals in float64).
    from decimal import Decimal

    with tempfile.TemporaryDirectory() as folder:
        path = write_spike_table(Path(folder) / "s.csv", {0: times}, decimals=decimals)
        written = [row[1] for row in _rows(path)[1:]]
    if not times:
        assert written == [""]
        return
    assert all(len(text.partition(".")[2]) == decimals for text in written)
    unit = Decimal(1).scaleb(-decimals)
    for t in times:
        nearest = min(written, key=lambda text: abs(Decimal(text) - Decimal(t)))
        assert abs(Decimal(nearest) - Decimal(t)) <= unit / 2 + Decimal(t) * Decimal(2) ** -50


@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(st.integers(0, 10**12), st.integers(-1, 2**62), st.integers(0, 10**6)), max_size=30),
       st.integers(0, 9))
def test_compiled_spike_lines_match_the_plain_python_reference(lines, decimals):
    # Reference: the plain-Python formatter beside the compiled one (f-strings), on any whole numbers.
    from calcium.io.spike_text import fixed_lines, fixed_lines_reference

    rois, units, counts = (np.array([line[i] for line in lines], dtype=np.int64) for i in range(3))
    assert fixed_lines(rois, units, counts, decimals) == fixed_lines_reference(rois, units, counts, decimals)


def test_compiled_spike_lines_refuse_bad_arrays():
    from calcium.io.spike_text import fixed_lines

    with pytest.raises(ValueError, match="equally long"):
        fixed_lines([0, 1], [5], [1, 1], 3)
    with pytest.raises(ValueError, match=">= 0"):
        fixed_lines([-1], [5], [1], 3)
    with pytest.raises(ValueError, match="decimals must be in"):
        fixed_lines([0], [5], [1], 12)


def test_a_count_too_large_for_memory_is_refused_before_the_times_are_built(tmp_path):
    import tracemalloc

    path = tmp_path / "typo.csv"
    text = "roi,time_s,count\n0,1.5,1\n0,2.0,1000000000000\n1,,0\n"
    path.write_text(text)
    tracemalloc.start()
    try:
        with pytest.raises(CalciumInputError, match=r"typo.csv: the spike counts add up to 1,000,000,000,001 spikes "
                                                     r"\(line 3 has count 1,000,000,000,000\), which would need about "
                                                     r"16 TB of memory.*check the count column"):
            read_spike_times(path)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak < 10e6  # nothing of that size was allocated
    assert path.read_text() == text
