"""Reading and writing: traces, spike times, movies, ROI masks and results.

Every reader raises :class:`calcium.CalciumInputError` naming the file when
the file is missing, empty, truncated or malformed; every writer is atomic
(temporary file in the same folder, then :func:`os.replace`) and refuses to
overwrite one of the inputs.
"""
from .masks import check_masks, labels_to_masks, masks_to_labels, read_masks, write_masks
from .movie import Movie, as_movie, open_movie, write_movie
from .results import atomic_output, file_sha256, read_hdf5, write_csv, write_hdf5
from .spikes import read_spike_times, write_spike_table
from .traces import TraceData, TraceDataset, find_trace_dataset, read_traces, write_traces

__all__ = [
    "TraceData",
    "read_traces",
    "write_traces",
    "TraceDataset",
    "find_trace_dataset",
    "read_spike_times",
    "write_spike_table",
    "Movie",
    "open_movie",
    "as_movie",
    "write_movie",
    "read_masks",
    "write_masks",
    "labels_to_masks",
    "masks_to_labels",
    "check_masks",
    "file_sha256",
    "atomic_output",
    "write_hdf5",
    "read_hdf5",
    "write_csv",
]
