"""Tests for the dask backend of calcium/pipeline: a two-worker local cluster on the loopback interface."""
import numpy as np
import pytest

pytest.importorskip("distributed")

from calcium.forward import simulate_recording  # noqa: E402
from calcium.io import write_traces  # noqa: E402
from calcium.pipeline import config_from_dict, read_results, run_pipeline  # noqa: E402
from calcium.pipeline import run as run_module  # noqa: E402


def test_a_local_two_worker_cluster_on_loopback_gives_the_serial_results(tmp_path, monkeypatch):
    recording = simulate_recording(8, 40.0, 20.0, indicator="GCaMP6f", rate_hz=0.5, noise_sd=0.03, seed=11)
    traces = write_traces(tmp_path / "traces.h5", recording.raw, frame_rate=20.0)

    def config(folder, backend):
        return config_from_dict({"inputs": {"traces": str(traces)}, "output": {"folder": str(tmp_path / folder)},
                                 "report": {"enabled": False},
                                 "execution": {"backend": backend, "workers": 2, "chunk_rois": 1}})

    seen = {}
    make = run_module.make_executor

    def recording_executor(backend, **kwargs):
        executor = make(backend, **kwargs)
        if backend == "dask":
            seen["scheduler"] = executor.scheduler
            seen["workers"] = executor.worker_addresses
        return executor

    monkeypatch.setattr(run_module, "make_executor", recording_executor)
    serial = run_pipeline(config("serial", "serial"), progress=False)
    distributed = run_pipeline(config("dask", "dask"), progress=False)

    assert distributed.backend == "dask" and distributed.workers == 2
    # The local cluster listens on 127.0.0.1 only (scheduler and both workers).
    assert seen["scheduler"].startswith("tcp://127.0.0.1:")
    assert len(seen["workers"]) == 2 and all(a.startswith("tcp://127.0.0.1:") for a in seen["workers"])
    first, _ = read_results(serial.results_path)
    second, _ = read_results(distributed.results_path)
    for name in first:
        if not name.startswith("progress/finished"):
            assert np.array_equal(first[name], second[name], equal_nan=first[name].dtype.kind == "f"), name


def test_a_cluster_reached_by_address_returns_the_rows_to_the_parent_with_the_same_results(tmp_path, monkeypatch):
    # Workers of a cluster reached by its address may run on machines that do not see this disk: they send the
    # (rois, frames) rows back instead of writing them into the results file themselves.
    import distributed

    from calcium.pipeline.store import RowWriter

    recording = simulate_recording(6, 30.0, 20.0, indicator="GCaMP6f", rate_hz=0.5, noise_sd=0.03, seed=12)
    traces = write_traces(tmp_path / "traces.h5", recording.raw, frame_rate=20.0)
    def config(folder, backend, scheduler=None):
        execution = {"backend": backend, "chunk_rois": 2}
        if scheduler:
            execution["scheduler"] = scheduler
        return config_from_dict({"inputs": {"traces": str(traces)}, "output": {"folder": str(tmp_path / folder)},
                                 "report": {"enabled": False}, "execution": execution})

    serial = run_pipeline(config("serial", "serial"), progress=False)

    def no_direct_writes(self, first_row, values):
        raise AssertionError("a worker of a cluster reached by address wrote into the results file")

    # (the cluster's worker is a thread of this process: it sees the patched class)
    monkeypatch.setattr(RowWriter, "write", no_direct_writes)
    with distributed.LocalCluster(n_workers=1, threads_per_worker=2, processes=False, protocol="tcp", host="127.0.0.1",
                                  dashboard_address=None) as cluster:
        remote = run_pipeline(config("remote", "dask", cluster.scheduler_address), progress=False)
    assert remote.backend == "dask" and remote.chunks_total == 3
    first, _ = read_results(serial.results_path)
    second, _ = read_results(remote.results_path)
    for name in first:
        if not name.startswith("progress/finished"):
            assert np.array_equal(first[name], second[name], equal_nan=first[name].dtype.kind == "f"), name
    assert (tmp_path / "remote" / "spikes.csv").read_text() == (tmp_path / "serial" / "spikes.csv").read_text()
