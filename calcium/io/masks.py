"""ROI masks: label images and boolean stacks.

Two equivalent forms are used:

* a **label image** (height, width) of integers: 0 is background, every other
  value is one ROI. Labels need not be contiguous; ROIs are numbered in
  increasing label order (the smallest label is ROI 0).
* a **boolean stack** (rois, height, width): one mask per ROI; masks may
  overlap (a label image cannot express that).

:func:`read_masks` always returns the boolean stack.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np

from .._checks import CalciumInputError
from .results import _existing_file, _load_npy, _output_suffix, _save_npy, atomic_output

__all__ = ["read_masks", "write_masks", "labels_to_masks", "masks_to_labels", "check_masks", "MASK_SUFFIXES"]

MASK_SUFFIXES = (".tif", ".tiff", ".npy")


def labels_to_masks(labels) -> np.ndarray:
    """Boolean stack (rois, height, width) from a label image.

    Parameters
    ----------
    labels : array_like of int, shape (height, width)
        0 = background; each other value is one ROI (need not be contiguous).

    Returns
    -------
    ndarray of bool, shape (rois, height, width)
        ROI i is the i-th smallest nonzero label.

    Raises
    ------
    ValueError
        Not a 2-D integer (or boolean) image, negative labels, or no ROI.

    Examples
    --------
    >>> labels_to_masks([[0, 7], [3, 7]]).astype(int).tolist()
    [[[0, 0], [1, 0]], [[0, 1], [0, 1]]]
    """
    arr = np.asarray(labels)
    if arr.ndim != 2:
        raise ValueError(f"labels must be a 2-D image (height, width), got shape {arr.shape}")
    if not (np.issubdtype(arr.dtype, np.integer) or arr.dtype == bool):
        raise ValueError(f"labels must be integers (0 = background), got dtype {arr.dtype}")
    if arr.size and arr.min() < 0:
        raise ValueError(f"labels must be >= 0 (0 = background), got {arr.min()}")
    values, inverse = np.unique(arr, return_inverse=True)
    inverse = inverse.reshape(arr.shape)
    nonzero = np.flatnonzero(values != 0)
    if nonzero.size == 0:
        raise ValueError("labels hold no ROI (every pixel is 0 = background)")
    return inverse[np.newaxis] == nonzero[:, np.newaxis, np.newaxis]


def masks_to_labels(masks) -> np.ndarray:
    """Label image (height, width) from a boolean stack: ROI i gets label i + 1.

    Parameters
    ----------
    masks : array_like of bool, shape (rois, height, width)

    Returns
    -------
    ndarray of int32, shape (height, width)
        0 = background.

    Raises
    ------
    ValueError
        If ROIs overlap (a label image holds one ROI per pixel); the message
        names two overlapping ROIs.
    """
    return _stack_to_labels(check_masks(masks))


def _stack_to_labels(stack: np.ndarray) -> np.ndarray:
    """:func:`masks_to_labels` of a stack that :func:`check_masks` has already passed."""
    counts = stack.sum(axis=0)
    if counts.max() > 1:
        pixel = np.unravel_index(int(np.argmax(counts)), counts.shape)
        both = np.flatnonzero(stack[(slice(None),) + pixel])
        raise ValueError(f"masks overlap (ROIs {int(both[0])} and {int(both[1])} share pixel {pixel}); "
                         f"a label image cannot hold overlapping ROIs")
    labels = np.zeros(stack.shape[1:], dtype=np.int32)
    for i, mask in enumerate(stack):
        labels[mask] = i + 1
    return labels


def check_masks(masks, name: str = "masks") -> np.ndarray:
    """Validate ROI masks and return a boolean stack (rois, height, width).

    Accepts a boolean (or 0/1 integer) stack, or a 2-D integer label image.
    Raises ValueError for other shapes or types and for an empty ROI (naming it).
    """
    arr = np.asarray(masks)
    if arr.ndim == 2:
        try:
            return labels_to_masks(arr)
        except ValueError as exc:
            raise ValueError(f"{name}: {exc}") from None
    if arr.ndim != 3:
        raise ValueError(f"{name} must be a label image (height, width) or a boolean stack "
                         f"(rois, height, width), got shape {arr.shape}")
    if arr.dtype != bool:
        if not np.issubdtype(arr.dtype, np.integer) or (arr.size and not np.isin(arr, (0, 1)).all()):
            raise ValueError(f"{name}: a 3-D stack must be boolean (or 0/1 integers), got dtype {arr.dtype}"
                             + ("" if not np.issubdtype(arr.dtype, np.integer) else " with values other than 0/1"))
        arr = arr.astype(bool)
    if arr.shape[0] == 0:
        raise ValueError(f"{name} hold no ROI (shape {arr.shape})")
    empty = np.flatnonzero(~arr.reshape(arr.shape[0], -1).any(axis=1))
    if empty.size:
        raise ValueError(f"{name}: ROI {int(empty[0])} is empty (no pixel set)"
                         + (f"; also ROI(s) {', '.join(str(int(i)) for i in empty[1:10])}" if empty.size > 1 else ""))
    return arr


def read_masks(path) -> np.ndarray:
    """Read ROI masks from ``.tif``/``.tiff``/``.npy``: a label image or a boolean stack.

    Parameters
    ----------
    path : str or path-like
        A 2-D integer label image (0 = background) or a 3-D boolean / 0-1
        stack (rois, height, width).

    Returns
    -------
    ndarray of bool, shape (rois, height, width)
        For a label image, ROIs in increasing label order.

    Raises
    ------
    CalciumInputError
        Missing, corrupt or empty file, wrong shape or type, an empty ROI
        (named), no ROI at all. The message names the file.
    """
    path = _existing_file(path, "mask file", suffixes=MASK_SUFFIXES, allow_empty=False)
    if path.suffix.lower() == ".npy":
        data = _load_npy(path)
    else:
        from .movie import _tiff_errors
        import tifffile

        with _tiff_errors(path, "read the masks"):
            data = tifffile.imread(path)
    try:
        return check_masks(data, name=f"masks in {path}")
    except ValueError as exc:
        raise CalciumInputError(str(exc)) from None


def write_masks(path, masks, *, as_labels: bool = False, inputs=()) -> Path:
    """Write ROI masks to ``.tif``/``.tiff``/``.npy``, atomically.

    Parameters
    ----------
    path : str or path-like
        Output file.
    masks : array_like
        Boolean stack (rois, height, width) or label image.
    as_labels : bool, default False
        Write a label image (ROI i -> label i + 1; ROIs may not overlap)
        instead of a boolean stack.
    inputs : sequence of path-like, optional
        Input files; ``path`` may not be one of them.
    """
    import tifffile

    path = Path(path)
    suffix = _output_suffix(path, MASK_SUFFIXES)
    stack = check_masks(masks)
    data = _stack_to_labels(stack) if as_labels else stack
    if suffix == ".npy":
        return _save_npy(path, data, inputs=inputs)
    with atomic_output(path, inputs=inputs) as tmp:
        tifffile.imwrite(tmp, data.astype(np.uint8) if data.dtype == bool else data, photometric="minisblack")
    return path
