"""Tests for calcium/io/results.py: hashing, atomic writes, HDF5 with provenance, CSV."""
import csv
import hashlib
import json
from datetime import datetime

import numpy as np
import pytest

import calcium
from calcium._checks import CalciumInputError
from calcium.io.results import atomic_output, file_sha256, read_hdf5, write_csv, write_hdf5


def _leftovers(folder, keep):
    return sorted(p.name for p in folder.iterdir() if p.name not in keep)


def test_sha256_matches_the_published_test_vector(tmp_path):
    # FIPS 180-2, Appendix B.1: SHA-256("abc").
    path = tmp_path / "abc.txt"
    path.write_bytes(b"abc")
    assert file_sha256(path) == "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"


def test_sha256_of_a_multi_block_file_matches_hashlib(tmp_path):
    # Reference: hashlib over the whole byte string (the file is read in 1 MiB blocks).
    data = np.random.default_rng(0).integers(0, 256, size=3 * (1 << 20) + 17, dtype=np.uint8).tobytes()
    path = tmp_path / "big.bin"
    path.write_bytes(data)
    assert file_sha256(path) == hashlib.sha256(data).hexdigest()


def test_sha256_of_a_missing_file_names_it(tmp_path):
    with pytest.raises(CalciumInputError, match="nothere.bin"):
        file_sha256(tmp_path / "nothere.bin")


def test_hdf5_round_trip_keeps_datasets_parameters_and_provenance(tmp_path):
    source = tmp_path / "input.csv"
    source.write_text("1,2\n")
    rng = np.random.default_rng(1)
    dff = rng.normal(size=(3, 50))
    dff[1, 7] = np.nan
    datasets = {"dff": dff, "spikes/counts": np.arange(5, dtype=np.int16), "rois/names": np.array(["a", "bé"]),
                "good": np.array([True, False])}
    attrs = {"frame_rate": 30.0, "n_iter": 12, "method": "bisquare", "flag": True,
             "window": [1.0, 2.5], "options": {"penalty": 0.3, "kind": None}, "nothing": None,
             "weights": np.array([0.5, 1.5])}
    out = tmp_path / "result.h5"
    write_hdf5(out, datasets, attrs=attrs, inputs=[source])
    data, meta = read_hdf5(out)
    assert set(data) == set(datasets)
    np.testing.assert_array_equal(data["dff"], dff)  # NaN positions compare equal here
    assert data["spikes/counts"].dtype == np.int16
    assert data["rois/names"].tolist() == ["a", "bé"]
    np.testing.assert_array_equal(data["good"], [True, False])
    for key in ("frame_rate", "n_iter", "method", "flag", "window", "options", "nothing"):
        assert meta[key] == attrs[key], key
    np.testing.assert_array_equal(meta["weights"], attrs["weights"])
    assert meta["calcium_version"] == calcium.__version__
    assert datetime.fromisoformat(meta["created"]).tzinfo is not None
    # Reference for the digest: hashlib on the input's bytes.
    assert meta["input_sha256"] == {str(source): hashlib.sha256(b"1,2\n").hexdigest()}
    assert _leftovers(tmp_path, {"input.csv", "result.h5"}) == []


def test_hdf5_refuses_reserved_attribute_names(tmp_path):
    with pytest.raises(ValueError, match="calcium_version"):
        write_hdf5(tmp_path / "x.h5", {"a": [1]}, attrs={"calcium_version": "9"})


def test_writing_over_an_input_is_refused_and_the_input_is_untouched(tmp_path):
    source = tmp_path / "raw.h5"
    write_hdf5(source, {"traces": np.ones((2, 3))})
    before = source.read_bytes()
    with pytest.raises(ValueError, match="raw.h5"):
        write_hdf5(source, {"traces": np.zeros((2, 3))}, inputs=[source])
    with pytest.raises(ValueError, match="raw.h5"):
        write_csv(tmp_path / "." / "raw.h5", ["a"], [[1]], inputs=[str(source)])
    assert source.read_bytes() == before


def test_a_failed_write_removes_its_temporary_file_and_keeps_the_old_output(tmp_path):
    out = tmp_path / "table.csv"
    out.write_text("old\n")
    with pytest.raises(RuntimeError):
        with atomic_output(out) as tmp:
            tmp.write_text("half written")
            raise RuntimeError("crash while writing")
    with pytest.raises(ValueError, match="rows\\[1\\]"):
        write_csv(out, ["a", "b"], [[1, 2], [3]])
    assert out.read_text() == "old\n"
    assert _leftovers(tmp_path, {"table.csv"}) == []


def test_atomic_output_writes_in_the_destination_folder_with_the_same_suffix(tmp_path):
    out = tmp_path / "movie.tif"
    with atomic_output(out) as tmp:
        assert tmp.parent == tmp_path and tmp.suffix == ".tif" and tmp != out
        tmp.write_bytes(b"x")
        assert not out.exists()
    assert out.read_bytes() == b"x"


def test_atomic_output_into_a_missing_folder_names_the_folder(tmp_path):
    with pytest.raises(ValueError, match="nofolder"):
        with atomic_output(tmp_path / "nofolder" / "x.csv"):
            pass


def test_csv_round_trip_keeps_full_float_precision(tmp_path):
    # Reference: Python's csv module and float() parsing of repr() text (shortest round-trip repr).
    rows = [[0, 1 / 3, float("nan")], [1, -2.5e-17, 1e300]]
    out = write_csv(tmp_path / "t.csv", ["frame", "value", "other"], rows)
    with open(out, newline="") as handle:
        read = list(csv.reader(handle))
    assert read[0] == ["frame", "value", "other"]
    assert [int(read[1][0]), float(read[1][1])] == [0, 1 / 3]
    assert np.isnan(float(read[1][2]))
    assert [float(x) for x in read[2]] == [1.0, -2.5e-17, 1e300]


def test_reading_a_file_that_is_not_hdf5_names_it(tmp_path):
    path = tmp_path / "fake.h5"
    path.write_text("not hdf5")
    with pytest.raises(CalciumInputError, match="fake.h5"):
        read_hdf5(path)
    with pytest.raises(CalciumInputError, match="missing.h5"):
        read_hdf5(tmp_path / "missing.h5")


def test_input_digests_are_stored_as_json_text_readable_by_plain_h5py(tmp_path):
    # Other tools read the provenance without this package: a JSON string attribute.
    import h5py

    source = tmp_path / "in.npy"
    np.save(source, np.zeros(3))
    write_hdf5(tmp_path / "r.h5", {"x": [1.0]}, inputs=[source])
    with h5py.File(tmp_path / "r.h5", "r") as handle:
        text = handle.attrs["input_sha256"]
    assert json.loads(text) == {str(source): hashlib.sha256(source.read_bytes()).hexdigest()}
