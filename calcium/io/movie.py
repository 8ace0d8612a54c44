"""Imaging movies (frames, height, width): TIFF (memory-mapped when possible) and ``.npy``.

A movie is never read whole: :meth:`Movie.iter_chunks` hands out blocks of
frames, so a recording larger than memory can be processed. When the TIFF
stores its pixels uncompressed and contiguously, the file is memory-mapped
(:func:`tifffile.memmap`) and a chunk is a slice of the map; otherwise
(compressed or scattered pages) the pages of a chunk are decoded one by one.
"""
from __future__ import annotations

import contextlib
import logging
from pathlib import Path

import numpy as np

from .._checks import CalciumInputError, check_int
from .results import _existing_file, _load_npy, _output_suffix, _refuse_inputs, _save_npy, atomic_output

__all__ = ["Movie", "open_movie", "as_movie", "write_movie", "MOVIE_SUFFIXES"]

MOVIE_SUFFIXES = (".tif", ".tiff", ".npy")
# What a broken TIFF raises inside tifffile (besides its own TiffFileError): reading garbage offsets and
# counts ends in these. (Out of memory is not among them: that is not the file's fault.)
_TIFF_ERRORS = (ValueError, OSError, EOFError, IndexError, KeyError, TypeError, RuntimeError)


class _LogErrors(logging.Handler):
    """Collects ERROR records that tifffile logs (it logs, rather than raises, for many broken files)."""

    def __init__(self):
        super().__init__(level=logging.ERROR)
        self.messages: list[str] = []

    def emit(self, record):
        self.messages.append(record.getMessage())


@contextlib.contextmanager
def _tiff_errors(path: Path, action: str):
    """Turn tifffile's exceptions and logged errors into CalciumInputError naming ``path``."""
    import tifffile

    logger = logging.getLogger("tifffile")
    handler = _LogErrors()
    logger.addHandler(handler)
    propagate, logger.propagate = logger.propagate, False
    try:
        yield
    except (tifffile.TiffFileError, *_TIFF_ERRORS, ) as exc:
        if isinstance(exc, CalciumInputError):
            raise
        if isinstance(exc, OSError) and exc.errno is not None:  # the system refused (permissions, a folder, ...)
            raise CalciumInputError(f"{path}: cannot {action}: {exc.strerror or exc}") from None
        raise CalciumInputError(f"{path}: cannot {action} (truncated or corrupt TIFF?): "
                                f"{type(exc).__name__}: {exc}") from None
    finally:
        logger.removeHandler(handler)
        logger.propagate = propagate
    if handler.messages:
        raise CalciumInputError(f"{path}: cannot {action} (truncated or corrupt TIFF?): {handler.messages[0]}")


def _movie_shape(shape, axes, path) -> tuple[int, int, int]:
    """(frames, height, width) from a stored shape and tifffile axes codes, dropping singleton axes.

    ``axes`` uses tifffile's letters (Y, X rows/columns; S samples, C channels;
    anything else counts as time). A movie must have one sample per pixel.
    """
    shape = tuple(int(n) for n in shape)
    axes = axes if axes and len(axes) == len(shape) else "Q" * (len(shape) - 2) + "YX"
    kept = [(n, a) for i, (n, a) in enumerate(zip(shape, axes)) if n != 1 or i >= len(shape) - 2]
    colour = [a for n, a in kept if a in "SC"]
    if colour or len(kept) > 3 or kept[-2][1] + kept[-1][1] != "YX":
        raise CalciumInputError(f"{path}: expected a single-channel movie (frames, height, width) or one "
                                f"frame (height, width), got shape {shape} (axes {axes})")
    dims = tuple(n for n, _ in kept)
    return (1,) + dims if len(dims) == 2 else dims


class Movie:
    """A movie on disk (or in memory), read in chunks of frames.

    Use :func:`open_movie` for a file and :func:`as_movie` for an array.
    A Movie can be used as a context manager; :meth:`close` releases the file.

    Attributes
    ----------
    shape : tuple of int
        (frames, height, width).
    dtype : numpy.dtype
        Pixel type as stored.
    path : pathlib.Path or None
        Source file (None for an in-memory movie).
    memory_mapped : bool
        True when chunks are slices of a memory map (or of an in-memory
        array), False when TIFF pages are decoded one by one.
    """

    def __init__(self, *, shape, dtype, path=None, array=None, tiff=None, pages=None):
        self.shape = tuple(int(n) for n in shape)
        self.dtype = np.dtype(dtype)
        self.path = path
        self._array = array      # ndarray or memmap of shape `shape`
        self._tiff = tiff        # open tifffile.TiffFile (page-by-page reading)
        self._pages = pages      # list of pages, one per frame
        self.memory_mapped = array is not None

    @property
    def n_frames(self) -> int:
        return self.shape[0]

    @property
    def height(self) -> int:
        return self.shape[1]

    @property
    def width(self) -> int:
        return self.shape[2]

    def __repr__(self) -> str:
        where = str(self.path) if self.path is not None else "in memory"
        return f"Movie({where}, shape={self.shape}, dtype={self.dtype})"

    def __len__(self) -> int:
        return self.n_frames

    def _range(self, start, stop) -> tuple[int, int]:
        start = check_int(start, "start", minimum=0, maximum=self.n_frames)
        stop = self.n_frames if stop is None else check_int(stop, "stop", minimum=start, maximum=self.n_frames)
        return start, stop

    def _decode(self, start: int, stop: int, out: np.ndarray) -> np.ndarray:
        """Decode TIFF pages ``start``..``stop - 1`` into ``out`` (page-by-page movies)."""
        if self._tiff is None:
            raise ValueError(f"{self!r} is closed")
        with _tiff_errors(self.path, f"read frames {start}-{stop - 1}"):
            for i in range(start, stop):
                page = self._pages[i]
                if page is None:
                    raise CalciumInputError(f"{self.path}: frame {i} is absent from the file")
                out[i - start] = page.asarray().reshape(self.shape[1:])
        return out

    def read(self, start: int = 0, stop: int | None = None) -> np.ndarray:
        """Frames ``start`` to ``stop - 1`` as an in-memory array (k, height, width)."""
        start, stop = self._range(start, stop)
        if self._array is not None:
            return np.array(self._array[start:stop])
        return self._decode(start, stop, np.empty((stop - start,) + self.shape[1:], dtype=self.dtype))

    def iter_chunks(self, chunk_frames: int = 500, *, start: int = 0, stop: int | None = None,
                    copy: bool = True):
        """Yield ``(first_frame, frames)`` blocks of at most ``chunk_frames`` frames.

        Parameters
        ----------
        chunk_frames : int, default 500
            Frames per block (the last block may be shorter).
        start, stop : int, optional
            Range of frames to cover (default: all).
        copy : bool, default True
            True: every block is a new in-memory array. False: a block is a
            read-only view of the memory map (or of the in-memory array), or,
            for a TIFF read page by page, one buffer reused for every block;
            it is valid only until the next block is requested. Faster and
            lighter for a single pass that only reads the pixels.

        Yields
        ------
        first_frame : int
            Index of the block's first frame.
        frames : ndarray, shape (k, height, width)
            The pixels, in the stored dtype.
        """
        chunk_frames = check_int(chunk_frames, "chunk_frames", minimum=1)
        start, stop = self._range(start, stop)
        buffer = None
        for first in range(start, stop, chunk_frames):
            last = min(first + chunk_frames, stop)
            if copy:
                yield first, self.read(first, last)
            elif self._array is not None:
                view = self._array[first:last].view()
                view.flags.writeable = False
                yield first, view
            else:
                if buffer is None:
                    buffer = np.empty((min(chunk_frames, stop - start),) + self.shape[1:], dtype=self.dtype)
                yield first, self._decode(first, last, buffer[:last - first])

    def close(self) -> None:
        """Release the file (further reads of a TIFF read page by page will fail)."""
        if self._tiff is not None:
            self._tiff.close()
            self._tiff = None
        if isinstance(self._array, np.memmap):
            self._array = None  # the map closes when the last reference goes

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


def as_movie(movie) -> Movie:
    """Return ``movie`` as a :class:`Movie`: a Movie is returned as is, an array is wrapped.

    Parameters
    ----------
    movie : Movie or array_like, shape (frames, height, width) or (height, width)
        A 2-D array is one frame.
    """
    if isinstance(movie, Movie):
        return movie
    arr = np.asarray(movie)
    if arr.dtype == object or not (np.issubdtype(arr.dtype, np.number) or arr.dtype == bool) \
            or np.iscomplexobj(arr):
        raise ValueError(f"movie must be a real numeric array, got dtype {arr.dtype}")
    if arr.ndim == 2:
        arr = arr[np.newaxis]
    if arr.ndim != 3 or arr.shape[0] < 1:
        raise ValueError(f"movie must have shape (frames, height, width) or (height, width), got {arr.shape}")
    return Movie(shape=arr.shape, dtype=arr.dtype, array=arr)


def open_movie(path) -> Movie:
    """Open a movie file for reading in chunks.

    Parameters
    ----------
    path : str or path-like
        ``.tif``/``.tiff`` (one page per frame, or a shaped stack; a 2-D image
        is a 1-frame movie) or ``.npy`` (memory-mapped).

    Returns
    -------
    Movie
        Memory-mapped when the file allows it (uncompressed, contiguous
        pixels), else read page by page.

    Raises
    ------
    CalciumInputError
        Missing, truncated or corrupt file, or a shape that is not
        (frames, height, width) / (height, width). The message names the file.

    Examples
    --------
    >>> import tempfile, os
    >>> with tempfile.TemporaryDirectory() as folder:
    ...     name = os.path.join(folder, "m.tif")
    ...     _ = write_movie(name, np.zeros((4, 3, 2), dtype=np.uint16))
    ...     with open_movie(name) as movie:
    ...         print(movie.shape, [first for first, _ in movie.iter_chunks(3)])
    (4, 3, 2) [0, 3]
    """
    path = _existing_file(path, "movie file", suffixes=MOVIE_SUFFIXES, allow_empty=False)
    if path.suffix.lower() == ".npy":
        return _open_npy(path)
    return _open_tiff(path)


def _open_npy(path: Path) -> Movie:
    arr = _load_npy(path, mmap_mode="r")
    try:
        movie = as_movie(arr)
    except ValueError as exc:
        raise CalciumInputError(f"{path}: {exc}") from None
    movie.path = path
    return movie


def _open_tiff(path: Path) -> Movie:
    import tifffile

    size = path.stat().st_size
    with _tiff_errors(path, "open the movie"):
        tiff = tifffile.TiffFile(path)
    try:
        with _tiff_errors(path, "open the movie"):
            if not tiff.series:
                raise CalciumInputError(f"{path} holds no image")
            if len(tiff.series) > 1:
                shapes = ", ".join(str(tuple(series.shape)) for series in tiff.series[:5])
                raise CalciumInputError(f"{path} holds {len(tiff.series)} image series ({shapes}); expected one "
                                        f"movie whose frames all have the same size")
            series = tiff.series[0]
            shape = _movie_shape(series.shape, getattr(series, "axes", ""), path)
            dtype = series.dtype
            try:
                mapped = tifffile.memmap(path, mode="r", series=0)
            except ValueError as exc:
                if "not memory-mappable" not in str(exc):
                    raise
                mapped = None
            if mapped is not None:
                tiff.close()
                return Movie(shape=shape, dtype=dtype, path=path, array=mapped.reshape(shape))
            pages = list(series.pages)
            if len(pages) == 1 and shape[0] > 1 and pages[0] is not None \
                    and int(np.prod(pages[0].shape)) == int(np.prod(shape)):
                # one page holding the whole stack (volumetric TIFF): no per-frame access, read it once
                data = series.asarray().reshape(shape)
                tiff.close()
                return Movie(shape=shape, dtype=dtype, path=path, array=data)
            if len(pages) != shape[0] or any(p is None for p in pages):
                raise CalciumInputError(f"{path}: the file announces {shape[0]} frame(s) but holds "
                                        f"{sum(p is not None for p in pages)} page(s)")
            for number, page in enumerate(pages):
                end = max((o + n for o, n in zip(page.dataoffsets, page.databytecounts)), default=0)
                if end > size:
                    raise CalciumInputError(f"{path}: frame {number} runs past the end of the file "
                                            f"({end} > {size} bytes): the file is truncated")
    except BaseException:
        tiff.close()
        raise
    return Movie(shape=shape, dtype=dtype, path=path, tiff=tiff, pages=pages)


def write_movie(path, array, *, inputs=()) -> Path:
    """Write a movie to an uncompressed TIFF (memory-mappable) or ``.npy``, atomically.

    Parameters
    ----------
    path : str or path-like
        ``.tif``/``.tiff`` or ``.npy``.
    array : array_like, shape (frames, height, width) or (height, width)
        Pixels; the dtype is kept.
    inputs : sequence of path-like, optional
        Input files; ``path`` may not be one of them.

    Returns
    -------
    pathlib.Path
        ``path``.
    """
    import tifffile

    path = Path(path)
    suffix = _output_suffix(path, MOVIE_SUFFIXES)
    _refuse_inputs(path, inputs)  # before reading a possibly large movie
    arr = array.read() if isinstance(array, Movie) else as_movie(array)._array
    if suffix == ".npy":
        return _save_npy(path, arr, inputs=inputs)
    with atomic_output(path, inputs=inputs) as tmp:
        # BigTIFF above ~4 GB: classic TIFF offsets are 32-bit.
        tifffile.imwrite(tmp, arr, photometric="minisblack", bigtiff=arr.nbytes > 2**32 - 2**25)
    return path
