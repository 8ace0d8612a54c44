"""Tests for calcium/pipeline/store.py: the checkpointed results file."""
import errno
import os

import h5py
import numpy as np
import pytest

from calcium._checks import CalciumInputError
from calcium.pipeline.store import (
    DatasetSpec,
    OutputError,
    OutputMismatchError,
    ResultStore,
    open_results,
    read_results,
)

N_ROIS, N_FRAMES = 10, 50
BOUNDS = [0, 4, 8, 10]


def _specs():
    return [DatasetSpec("dff", (N_ROIS, N_FRAMES), "f4", "ΔF/F", "ΔF/F"),
            DatasetSpec("noise_sd", (N_ROIS,), "f8", "noise", "ΔF/F"),
            DatasetSpec("flags", (N_ROIS,), "text12", "reasons"),
            DatasetSpec("summary/value", (3,), "f8", "written once", per_roi=False, fill=np.nan)]


def _open(path, *, run_hash="run-1", parameters=None, overwrite=False, flags=()):
    return ResultStore.open(path, datasets=_specs(), chunk_bounds=BOUNDS, run_hash=run_hash,
                            attrs={"frame_rate": 30.0, "n_rois": N_ROIS, "n_frames": N_FRAMES},
                            parameters=parameters or {"dff": {"window_s": 60.0}}, flags=flags, overwrite=overwrite)


def _chunk(chunk_id):
    start, stop = BOUNDS[chunk_id], BOUNDS[chunk_id + 1]
    rows = np.arange(start, stop)
    return {"dff": np.tile(rows[:, None], (1, N_FRAMES)).astype(np.float32),
            "noise_sd": rows * 0.5,
            "flags": np.array([f"roi {r}" for r in rows], dtype=object)}


def test_chunks_written_are_read_back_with_their_done_flags(tmp_path):
    path = tmp_path / "results.h5"
    with _open(path) as store:
        assert not store.resumed and store.n_chunks == 3 and not store.done.any()
        store.write_chunk(1, _chunk(1))
        store.commit()
        assert store.done.tolist() == [False, True, False]
    with open_results(path, allow_incomplete=True) as view:
        assert not view.complete
        assert view.chunk_done.tolist() == [False, True, False]
        assert np.array_equal(view.read("dff", np.s_[4:8, 0]), np.arange(4, 8, dtype=np.float32))
        assert view.read("flags", np.s_[4:8]).tolist() == ["roi 4", "roi 5", "roi 6", "roi 7"]
        assert view.attrs["frame_rate"] == 30.0
        assert np.isnan(view.read("summary/value")).all()  # the fill value of a one-off dataset


def test_chunks_written_between_commits_are_marked_done_only_by_the_next_commit(tmp_path):
    path = tmp_path / "results.h5"
    store = _open(path)
    store.write_chunk(0, _chunk(0))
    store.commit()
    store.commit_interval_s = 3600.0
    store.write_chunk(2, _chunk(2))  # within the interval: written, not yet marked done
    # what a kill now would leave: the bytes of progress/chunk_done in the file (HDF5 contiguous storage)
    offset = store._file["progress/chunk_done"].id.get_offset()
    with open(path, "rb") as raw:
        raw.seek(offset)
        assert list(raw.read(3)) == [1, 0, 0]
    assert store.done.tolist() == [True, False, False]
    store.close()  # commits
    with open_results(path, allow_incomplete=True) as view:
        assert view.chunk_done.tolist() == [True, False, True]
        assert np.array_equal(view.read("noise_sd", np.s_[8:10]), [4.0, 4.5])


def test_a_chunk_is_marked_done_only_after_the_sync_of_its_rows_has_finished(tmp_path, monkeypatch):
    import threading

    from calcium.pipeline import store as store_module

    released, synced = threading.Event(), []

    def slow_disk(fd):
        released.wait(10)
        os.fsync(fd)
        synced.append(fd)

    monkeypatch.setattr(store_module, "_sync_descriptor", slow_disk)
    path = tmp_path / "results.h5"
    store = _open(path)
    store.write_chunk(0, _chunk(0))   # starts the sync of chunk 0 in the background
    store.write_chunk(1, _chunk(1))   # the sync still runs: nothing is marked
    assert store.done.tolist() == [False, False, False] and not synced
    released.set()
    store.commit()                    # waits for it, marks 0, then syncs and marks 1
    assert store.done.tolist() == [True, True, False] and len(synced) == 2
    store.close()


def test_reopening_the_same_run_resumes_and_keeps_finished_chunks(tmp_path):
    path = tmp_path / "results.h5"
    with _open(path) as store:
        store.write_chunk(0, _chunk(0))
    with _open(path) as store:
        assert store.resumed and store.done.tolist() == [True, False, False]
        store.write_chunk(1, _chunk(1))
        store.write_chunk(2, _chunk(2))
        store.mark_complete()
    data, attrs = read_results(path)
    assert np.array_equal(data["noise_sd"], np.arange(N_ROIS) * 0.5)
    assert data["progress/complete"][0] == 1 and attrs["run_hash"] == "run-1"


def test_a_different_run_is_refused_naming_what_changed(tmp_path):
    path = tmp_path / "results.h5"
    with _open(path) as store:
        store.write_chunk(0, _chunk(0))
    with pytest.raises(OutputMismatchError, match=r"dff\.window_s: 60\.0 -> 30\.0.*overwrite"):
        _open(path, run_hash="run-2", parameters={"dff": {"window_s": 30.0}})
    with open_results(path, allow_incomplete=True) as view:  # untouched
        assert view.attrs["run_hash"] == "run-1" and view.chunk_done[0]
    with _open(path, run_hash="run-2", parameters={"dff": {"window_s": 30.0}}, overwrite=True) as store:
        assert not store.resumed and not store.done.any()


def test_a_file_that_is_not_a_results_file_is_never_replaced_silently(tmp_path):
    path = tmp_path / "results.h5"
    with h5py.File(path, "w") as handle:
        handle["precious"] = [1, 2, 3]
    with pytest.raises(OutputMismatchError, match="not a calcium results file"):
        _open(path)
    with h5py.File(path, "r") as handle:
        assert handle["precious"][()].tolist() == [1, 2, 3]


def test_a_chunk_interrupted_half_way_is_not_marked_done(tmp_path, monkeypatch):
    path = tmp_path / "results.h5"
    store = _open(path)
    store.write_chunk(0, _chunk(0))
    store.commit()
    original = ResultStore._write
    calls = []

    def fail_on_second_dataset(self, name, selection, values):
        calls.append(name)
        if len(calls) == 2:
            raise OSError(errno.EIO, "Input/output error")
        original(self, name, selection, values)

    monkeypatch.setattr(ResultStore, "_write", fail_on_second_dataset)
    with pytest.raises(OutputError, match="chunk 1.*incomplete"):
        store.write_chunk(1, _chunk(1))
    store.close()
    with open_results(path, allow_incomplete=True) as view:
        assert view.chunk_done.tolist() == [True, False, False]
        assert not view.complete


def test_disk_full_gives_a_clear_message_and_the_file_stays_incomplete(tmp_path, monkeypatch):
    path = tmp_path / "results.h5"
    store = _open(path)
    store.write_chunk(0, _chunk(0))
    store.commit()

    def disk_full(self, name, selection, values):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(ResultStore, "_write", disk_full)
    with pytest.raises(OutputError, match="disk is full.*rerun the same command") as info:
        store.write_chunk(1, _chunk(1))
    assert info.value.errno == errno.ENOSPC
    with pytest.raises(OutputError, match="disk is full"):
        store.mark_complete() if store.done.all() else store.set_flag("x")
    store.close()
    with pytest.raises(CalciumInputError, match="incomplete"):
        open_results(path)
    with open_results(path, allow_incomplete=True) as view:
        assert view.chunk_done.tolist() == [True, False, False]


def test_not_enough_free_space_is_reported_before_writing(tmp_path, monkeypatch):
    import shutil

    usage = shutil.disk_usage(tmp_path)
    monkeypatch.setattr(shutil, "disk_usage", lambda folder: usage._replace(free=100))
    with pytest.raises(OutputError, match=r"results\.h5: no space left on the device for it \(it needs [0-9.]+ kB, "
                                          r"100 bytes are free\)"):
        _open(tmp_path / "results.h5")
    assert not (tmp_path / "results.h5").exists()


def test_read_only_folder_is_refused_clearly(tmp_path, monkeypatch):
    # Running as root ignores permission bits, so the refusal is simulated through os.access.
    real_access = os.access
    monkeypatch.setattr(os, "access", lambda p, mode, **kw: False if os.fspath(p) == os.fspath(tmp_path)
                        else real_access(p, mode, **kw))
    with pytest.raises(OutputError, match="read-only"):
        _open(tmp_path / "results.h5")
    assert list(tmp_path.iterdir()) == []


def test_a_folder_under_a_regular_file_or_missing_is_refused_clearly(tmp_path):
    plain = tmp_path / "notes.txt"
    plain.write_text("x")
    with pytest.raises(OutputError, match="notes.txt is a file, not a folder"):
        _open(plain / "results.h5")
    with pytest.raises(OutputError, match="does not exist"):
        _open(tmp_path / "absent" / "results.h5")


def test_a_second_writer_is_refused_while_the_first_holds_the_file(tmp_path):
    path = tmp_path / "results.h5"
    with _open(path):
        with pytest.raises(OutputError, match="in use by another run"):
            _open(path)


def test_long_text_is_cut_on_a_character_boundary(tmp_path):
    # Reference: UTF-8 (RFC 3629) encodes "é" in 2 bytes; a cut inside it would not decode.
    path = tmp_path / "results.h5"
    with _open(path) as store:
        values = _chunk(0)
        values["flags"] = np.array(["éééééééé", "short", "", "abcdefghijklmnop"], dtype=object)
        store.write_chunk(0, values)
    with open_results(path, allow_incomplete=True) as view:
        assert view.read("flags", np.s_[:4]).tolist() == ["éééééé", "short", "", "abcdefghijkl"]


def test_datasets_have_their_final_size_on_disk_from_the_start(tmp_path):
    # Reference: HDF5 contiguous layout with early allocation: the storage size of every
    # dataset equals its full size before any data are written (so no metadata changes later).
    path = tmp_path / "results.h5"
    _open(path).close()
    with h5py.File(path, "r") as handle:
        for spec in _specs():
            dataset = handle[spec.name]
            assert dataset.chunks is None  # contiguous
            assert dataset.id.get_storage_size() == spec.nbytes


def test_one_off_steps_have_their_own_done_flag(tmp_path):
    path = tmp_path / "results.h5"
    with _open(path, flags=("extraction",)) as store:
        assert not store.flag("extraction")
        store.write_rows("summary/value", (), [1.0, 2.0, 3.0])
        store.set_flag("extraction")
    with _open(path, flags=("extraction",)) as store:
        assert store.flag("extraction")
        assert store.read("summary/value").tolist() == [1.0, 2.0, 3.0]


def test_marking_complete_requires_every_chunk(tmp_path):
    with _open(tmp_path / "results.h5") as store:
        store.write_chunk(0, _chunk(0))
        with pytest.raises(RuntimeError, match=r"chunk\(s\) \[1, 2\] not done"):
            store.mark_complete()


def test_wrong_chunk_shapes_are_refused(tmp_path):
    with _open(tmp_path / "results.h5") as store:
        bad = _chunk(0)
        bad["noise_sd"] = bad["noise_sd"][:2]
        with pytest.raises(ValueError, match="chunk 0 has 4 ROIs"):
            store.write_chunk(0, bad)
        with pytest.raises(KeyError, match="summary/value"):
            store.write_chunk(0, {"summary/value": np.zeros(4)})
