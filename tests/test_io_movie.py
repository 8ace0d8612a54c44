"""Tests for calcium/io/movie.py (TIFF / .npy movies read in chunks) and calcium/io/masks.py (ROI masks)."""
import tempfile
from pathlib import Path

import numpy as np
import pytest
import tifffile
from hypothesis import given, settings
from hypothesis import strategies as st

from calcium._checks import CalciumInputError
from calcium.io.masks import labels_to_masks, masks_to_labels, read_masks, write_masks
from calcium.io.movie import Movie, as_movie, open_movie, write_movie


def _movie(frames=23, height=9, width=7, dtype=np.uint16, seed=0):
    rng = np.random.default_rng(seed)
    return rng.integers(0, 4000, size=(frames, height, width)).astype(dtype)


def _all_chunks(movie, chunk_frames):
    starts, blocks = zip(*movie.iter_chunks(chunk_frames))
    return list(starts), np.concatenate(blocks)


def test_tiff_round_trip_is_memory_mapped_and_chunks_equal_the_whole(tmp_path):
    data = _movie()
    with open_movie(write_movie(tmp_path / "m.tif", data)) as movie:
        assert movie.memory_mapped
        assert movie.shape == data.shape and movie.n_frames == 23 and movie.dtype == np.uint16
        starts, whole = _all_chunks(movie, 5)
        assert starts == [0, 5, 10, 15, 20]
        # Reference: tifffile.imread of the same file, and the array written.
        np.testing.assert_array_equal(whole, tifffile.imread(tmp_path / "m.tif"))
        np.testing.assert_array_equal(whole, data)
        np.testing.assert_array_equal(movie.read(4, 9), data[4:9])
        first, view = next(movie.iter_chunks(5, start=3, copy=False))
        assert first == 3 and not view.flags.writeable
        np.testing.assert_array_equal(view, data[3:8])


@pytest.mark.parametrize("how", ["compressed", "pages"])
def test_tiffs_that_cannot_be_mapped_are_read_page_by_page(tmp_path, how):
    data = _movie(frames=11)
    path = tmp_path / f"{how}.tif"
    if how == "compressed":
        tifffile.imwrite(path, data, photometric="minisblack", compression="zlib")
    else:
        with tifffile.TiffWriter(path) as writer:  # independent pages, no stack description
            for frame in data:
                writer.write(frame, contiguous=False, metadata=None, photometric="minisblack")
    with open_movie(path) as movie:
        assert not movie.memory_mapped and movie.shape == data.shape
        starts, whole = _all_chunks(movie, 4)
        assert starts == [0, 4, 8]
        np.testing.assert_array_equal(whole, data)
        # copy=False reuses one buffer: each block is right while it is current.
        reused = [block.copy() for _, block in movie.iter_chunks(4, copy=False)]
        np.testing.assert_array_equal(np.concatenate(reused), data)


@settings(max_examples=20, deadline=None)
@given(frames=st.integers(1, 12), chunk=st.integers(1, 15), float_movie=st.booleans())
def test_chunks_of_any_size_tile_the_movie_exactly(frames, chunk, float_movie):
    data = _movie(frames=frames, height=4, width=3, dtype=np.float32 if float_movie else np.uint16, seed=frames)
    if float_movie:
        data[frames // 2] = np.nan  # a missing frame stays missing
    with tempfile.TemporaryDirectory() as folder:
        with open_movie(write_movie(Path(folder) / "m.tif", data)) as movie:
            starts, whole = _all_chunks(movie, chunk)
    assert starts == list(range(0, frames, chunk))
    np.testing.assert_array_equal(whole, data)
    _, in_memory = _all_chunks(as_movie(data), chunk)
    np.testing.assert_array_equal(in_memory, data)


def test_a_single_image_is_a_one_frame_movie(tmp_path):
    image = _movie(frames=1)[0]
    tifffile.imwrite(tmp_path / "one.tif", image)
    with open_movie(tmp_path / "one.tif") as movie:
        assert movie.shape == (1,) + image.shape
        np.testing.assert_array_equal(movie.read()[0], image)
    assert as_movie(image).shape == (1,) + image.shape


def test_npy_movies_are_memory_mapped(tmp_path):
    data = _movie(frames=6)
    np.save(tmp_path / "m.npy", data)
    movie = open_movie(tmp_path / "m.npy")
    assert movie.memory_mapped and movie.path == tmp_path / "m.npy"
    np.testing.assert_array_equal(_all_chunks(movie, 4)[1], data)


@pytest.mark.parametrize("compression", [None, "zlib"])
def test_truncated_tiff_is_an_input_error_naming_the_file(tmp_path, compression):
    path = tmp_path / "cut.tif"
    tifffile.imwrite(path, _movie(frames=20), photometric="minisblack", compression=compression)
    raw = path.read_bytes()
    path.write_bytes(raw[: len(raw) * 2 // 3])
    with pytest.raises(CalciumInputError, match="cut.tif"):
        with open_movie(path) as movie:
            _all_chunks(movie, 8)


def test_running_out_of_memory_is_not_reported_as_a_corrupt_file(tmp_path, monkeypatch):
    path = tmp_path / "fine.tif"
    tifffile.imwrite(path, _movie(frames=4), photometric="minisblack")

    def no_memory(*args, **kwargs):
        raise MemoryError("cannot allocate")

    monkeypatch.setattr(tifffile, "TiffFile", no_memory)
    with pytest.raises(MemoryError):
        open_movie(path)


def test_garbage_missing_and_empty_movie_files_are_input_errors(tmp_path):
    (tmp_path / "junk.tif").write_bytes(b"II*\x00" + bytes(range(256)) * 4)
    with pytest.raises(CalciumInputError, match="junk.tif"):
        open_movie(tmp_path / "junk.tif")
    (tmp_path / "text.tif").write_text("hello")
    with pytest.raises(CalciumInputError, match="text.tif"):
        open_movie(tmp_path / "text.tif")
    with pytest.raises(CalciumInputError, match="gone.tif"):
        open_movie(tmp_path / "gone.tif")
    (tmp_path / "zero.tif").write_bytes(b"")
    with pytest.raises(CalciumInputError, match="zero.tif is empty"):
        open_movie(tmp_path / "zero.tif")


def test_colour_and_multichannel_tiffs_are_refused(tmp_path):
    tifffile.imwrite(tmp_path / "rgb.tif", np.zeros((5, 6, 3), np.uint8), photometric="rgb")
    with pytest.raises(CalciumInputError, match="rgb.tif: expected a single-channel movie"):
        open_movie(tmp_path / "rgb.tif")
    tifffile.imwrite(tmp_path / "two.tif", np.zeros((4, 2, 5, 6), np.uint16), imagej=True,
                     metadata={"axes": "TCYX"})
    with pytest.raises(CalciumInputError, match="two.tif: expected a single-channel movie"):
        open_movie(tmp_path / "two.tif")


def test_in_memory_movie_arguments_are_checked():
    with pytest.raises(ValueError, match=r"movie must have shape .* got \(4,\)"):
        as_movie(np.zeros(4))
    with pytest.raises(ValueError, match="real numeric"):
        as_movie(np.zeros((2, 2, 2), dtype=complex))
    movie = as_movie(np.zeros((3, 2, 2)))
    assert isinstance(movie, Movie) and as_movie(movie) is movie
    with pytest.raises(ValueError, match="chunk_frames must be >= 1"):
        next(movie.iter_chunks(0))


def test_write_movie_refuses_to_overwrite_its_input(tmp_path):
    source = write_movie(tmp_path / "raw.tif", _movie(frames=2))
    with open_movie(source) as movie:
        with pytest.raises(ValueError, match="raw.tif"):
            write_movie(source, movie, inputs=[source])


# ROI masks ---------------------------------------------------------------------------------------

def test_label_image_gives_one_mask_per_label_in_increasing_order(tmp_path):
    labels = np.array([[0, 9, 9], [4, 0, 9], [4, 0, 2]], dtype=np.uint16)
    tifffile.imwrite(tmp_path / "labels.tif", labels)
    masks = read_masks(tmp_path / "labels.tif")
    assert masks.dtype == bool and masks.shape == (3, 3, 3)
    # Reference: numpy equality with each label, labels sorted (2, 4, 9).
    for i, value in enumerate([2, 4, 9]):
        np.testing.assert_array_equal(masks[i], labels == value)
    np.testing.assert_array_equal(masks_to_labels(masks), np.searchsorted([0, 2, 4, 9], labels))


@pytest.mark.parametrize("suffix", [".tif", ".npy"])
def test_boolean_stacks_round_trip_and_may_overlap(tmp_path, suffix):
    masks = np.zeros((2, 5, 6), dtype=bool)
    masks[0, 1:3, 1:3] = True
    masks[1, 2:4, 2:5] = True  # overlaps ROI 0 at (2, 2)
    np.testing.assert_array_equal(read_masks(write_masks(tmp_path / f"m{suffix}", masks)), masks)
    with pytest.raises(ValueError, match="ROIs 0 and 1 share pixel"):
        masks_to_labels(masks)
    with pytest.raises(ValueError, match="ROIs 0 and 1 share pixel"):
        write_masks(tmp_path / f"labels{suffix}", masks, as_labels=True)
    assert not (tmp_path / f"labels{suffix}").exists()


def test_label_round_trip_through_a_file(tmp_path):
    masks = labels_to_masks(np.array([[1, 0], [0, 5]]))
    np.testing.assert_array_equal(read_masks(write_masks(tmp_path / "l.tif", masks, as_labels=True)), masks)
    assert tifffile.imread(tmp_path / "l.tif").tolist() == [[1, 0], [0, 2]]


def test_an_empty_roi_is_an_error_naming_it(tmp_path):
    masks = np.zeros((3, 4, 4), dtype=bool)
    masks[0, 0, 0] = masks[2, 3, 3] = True
    np.save(tmp_path / "holes.npy", masks)
    with pytest.raises(CalciumInputError, match="holes.npy: ROI 1 is empty"):
        read_masks(tmp_path / "holes.npy")


def test_bad_mask_files_are_input_errors_naming_the_file(tmp_path):
    np.save(tmp_path / "float.npy", np.ones((4, 4)))
    with pytest.raises(CalciumInputError, match="float.npy.*integers"):
        read_masks(tmp_path / "float.npy")
    np.save(tmp_path / "zeros.npy", np.zeros((4, 4), dtype=np.int32))
    with pytest.raises(CalciumInputError, match="zeros.npy.*no ROI"):
        read_masks(tmp_path / "zeros.npy")
    np.save(tmp_path / "neg.npy", np.array([[0, -1]]))
    with pytest.raises(CalciumInputError, match="neg.npy.*>= 0"):
        read_masks(tmp_path / "neg.npy")
    np.save(tmp_path / "three.npy", np.full((2, 3, 3), 2, dtype=np.uint8))
    with pytest.raises(CalciumInputError, match="three.npy.*0/1"):
        read_masks(tmp_path / "three.npy")
    (tmp_path / "bad.tif").write_bytes(b"MM\x00*garbage")
    with pytest.raises(CalciumInputError, match="bad.tif"):
        read_masks(tmp_path / "bad.tif")
    with pytest.raises(CalciumInputError, match="absent.tif"):
        read_masks(tmp_path / "absent.tif")


def test_a_tiff_with_frames_of_different_sizes_is_refused(tmp_path):
    with tifffile.TiffWriter(tmp_path / "mixed.tif") as writer:
        writer.write(np.zeros((4, 5), np.uint16), photometric="minisblack", metadata=None)
        writer.write(np.zeros((6, 5), np.uint16), photometric="minisblack", metadata=None)
    with pytest.raises(CalciumInputError, match=r"mixed.tif holds 2 image series"):
        open_movie(tmp_path / "mixed.tif")
