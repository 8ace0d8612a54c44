"""Whole-session pipeline: a TOML configuration, chunked and resumable, on every core or a cluster.

* :func:`write_config_template` / :func:`load_config` — the configuration
  (:mod:`calcium.pipeline.config`);
* :func:`run_pipeline` — ΔF/F, filter, noise, inference and quality flags for
  every ROI, kernel fit and scoring for ROIs with electrical spikes, the
  results file, the spike table and the HTML report
  (:mod:`calcium.pipeline.run`); :func:`infer_file` — the inference alone
  for a ΔF/F file, with the same chunking, executors and resuming;
* executors (serial, processes, dask) in :mod:`calcium.pipeline.executors`;
* :func:`export_nwb` — a results file as an NWB file (:mod:`calcium.pipeline.nwb`;
  :func:`nwb_contents` says what it holds and what the results do not);
* the checkpointed HDF5 results file in :mod:`calcium.pipeline.store`
  (layout: ``docs/hdf5-layout.md``).
"""
from .config import (
    ConfigError,
    RunConfig,
    config_from_dict,
    load_config,
    write_config_template,
)
from .executors import DaskExecutor, Executor, ExecutorError, ProcessExecutor, SerialExecutor, make_executor
from .nwb import NwbContents, export_nwb, nwb_contents
from .run import RunSummary, infer_file, run_pipeline, write_session_report, write_spike_table_from_results
from .store import OutputError, OutputMismatchError, ResultsFile, open_results, read_results

__all__ = [
    "ConfigError",
    "RunConfig",
    "config_from_dict",
    "load_config",
    "write_config_template",
    "Executor",
    "SerialExecutor",
    "ProcessExecutor",
    "DaskExecutor",
    "ExecutorError",
    "make_executor",
    "RunSummary",
    "run_pipeline",
    "infer_file",
    "write_session_report",
    "write_spike_table_from_results",
    "export_nwb",
    "nwb_contents",
    "NwbContents",
    "OutputError",
    "OutputMismatchError",
    "ResultsFile",
    "open_results",
    "read_results",
]
