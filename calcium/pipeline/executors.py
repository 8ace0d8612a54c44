"""Where the work of a run is done: one process, this machine's cores, or a dask cluster.

Every executor has the same small interface::

    with make_executor("processes", workers=4) as executor:
        for chunk_id, result in executor.map_chunks(fn, chunks, progress="ΔF/F + inference"):
            ...   # results arrive as they finish, in any order

``chunks`` is an iterable of ``(chunk_id, payload)`` pairs and ``fn(payload)``
is computed for each. Payloads should be small descriptions of the work (which
rows of which file), not the data: each worker reads its own rows, so the
memory of a run is bounded by the chunks in flight, not by the recording.
Only a few chunks per worker are in flight at a time; the next is submitted
when one finishes. ``fn`` must be a module-level function (it is sent to other
processes by reference).

Worker processes start from a fresh interpreter (``forkserver`` on Linux,
``spawn`` elsewhere), never by forking the parent, which holds the open
results file and threads. As with any such pool, a script that starts
workers must keep its top-level code under ``if __name__ == "__main__":``.
"""
from __future__ import annotations

import concurrent.futures as cf
import contextlib
import importlib
import importlib.util
import itertools
import logging
import multiprocessing
import os
import signal
import sys
import threading
import time
from collections.abc import Callable, Iterable, Iterator

from .._checks import check_choice, check_int

__all__ = ["Executor", "SerialExecutor", "ProcessExecutor", "DaskExecutor", "ExecutorError",
           "SchedulerUnreachableError", "check_scheduler", "make_executor", "prestart", "progress_bar", "BACKENDS"]

BACKENDS = ("serial", "processes", "dask")
# Chunks in flight per worker: one running, one queued so the worker never waits
# for the parent; more would only hold finished results in memory.
_IN_FLIGHT_PER_WORKER = 2


class ExecutorError(RuntimeError):
    """The executor itself failed (a worker process died, the cluster cannot be reached)."""


class SchedulerUnreachableError(ExecutorError, ConnectionError):
    """No dask scheduler answers at the configured address (also a ConnectionError, an OSError)."""


#: Seconds to wait for a dask scheduler to accept a connection before the run is refused.
SCHEDULER_TIMEOUT_S = 3.0


def _host_port(address: str):
    """(host, port) of a scheduler address ``[tcp://|tls://]host:port`` (IPv6 in brackets), or None for an
    address of another kind (``inproc://``, ``ucx://``...) or without a port."""
    scheme, _, rest = address.rpartition("://")
    if scheme not in ("", "tcp", "tls"):
        return None
    host, _, port = rest.rstrip("/").rpartition(":")
    if not host or not port.isdigit():
        return None
    return host.strip("[]"), int(port)


def check_scheduler(address: str, *, timeout_s: float = SCHEDULER_TIMEOUT_S) -> None:
    """Refuse, within ``timeout_s`` seconds, a dask scheduler address where nothing accepts a connection.

    One TCP connection is opened and closed again; nothing is sent. A run
    calls this before it creates any output, so a mistyped address or a
    scheduler that is not running costs a few seconds, not the client's own
    time-out, and leaves nothing behind.

    Raises
    ------
    SchedulerUnreachableError
        Naming the address, why (refused, timed out, unknown host) and what to do.
    """
    import socket

    where = _host_port(address)
    if where is None:
        return  # (not a TCP address: the dask client itself says what is wrong with it)
    try:
        with socket.create_connection(where, timeout=timeout_s):
            pass
    except OSError as exc:
        if isinstance(exc, socket.timeout):
            why = f"no answer within {timeout_s:g} s"
        elif isinstance(exc, socket.gaierror):
            why = f"unknown host {where[0]!r}"
        else:
            why = (exc.strerror or str(exc)).lower()
        raise SchedulerUnreachableError(
            f"cannot reach the dask scheduler at {address} (execution.scheduler): {why}; start the scheduler, "
            f"correct the address, or leave execution.scheduler out to run a local cluster") from None


def progress_bar(progress, *, total=None, unit="chunk"):
    """A tqdm bar for ``progress`` (True or a label), or None when ``progress`` is falsy."""
    if not progress:
        return None
    from tqdm.auto import tqdm

    label = progress if isinstance(progress, str) else None
    return tqdm(total=total, desc=label, unit=unit, dynamic_ncols=True, file=sys.stderr)


class _Progress:
    """Reports finished chunks: to a callback (``progress(chunk_id)``) or to a bar of its own."""

    def __init__(self, progress, chunks):
        self.callback = progress if callable(progress) else None
        total = len(chunks) if hasattr(chunks, "__len__") else None
        self.bar = None if self.callback else progress_bar(progress, total=total)

    def done(self, chunk_id):
        if self.callback is not None:
            self.callback(chunk_id)
        elif self.bar is not None:
            self.bar.update(1)

    def close(self):
        if self.bar is not None:
            self.bar.close()


class Executor:
    """Interface of the executors: ``map_chunks`` and context management.

    Attributes
    ----------
    name : str
        "serial", "processes" or "dask".
    workers : int
        Number of workers computing at once.
    """

    name = "base"
    workers = 1

    def map_chunks(self, fn: Callable, chunks: Iterable, *, progress=None) -> Iterator[tuple]:
        """Compute ``fn(payload)`` for every ``(chunk_id, payload)``; yield ``(chunk_id, result)`` as they finish.

        Parameters
        ----------
        fn : callable
            Module-level function of one argument.
        chunks : iterable of (chunk_id, payload)
            The work. Consumed lazily: only a few chunks per worker are
            submitted ahead of the results.
        progress : bool, str or callable, optional
            False/None: silent. True or a label: a tqdm bar (one step per
            chunk, with rate and ETA). A callable: called with each
            finished chunk_id (the caller keeps its own bar).

        Yields
        ------
        (chunk_id, result)
            In order of completion. An exception raised by ``fn`` is raised
            here; the chunks still running are cancelled.
        """
        raise NotImplementedError

    def close(self) -> None:
        """Release workers (idempotent)."""

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False

    def __repr__(self):
        return f"{type(self).__name__}(workers={self.workers})"


class SerialExecutor(Executor):
    """Everything in the calling process, one chunk after the other (the reference)."""

    name = "serial"
    workers = 1

    def map_chunks(self, fn, chunks, *, progress=None):
        reporter = _Progress(progress, chunks)
        try:
            for chunk_id, payload in chunks:
                result = fn(payload)
                reporter.done(chunk_id)
                yield chunk_id, result
        finally:
            reporter.close()


def _parent_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # exists, owned by someone else (the pid was reused): treat as gone
        return False
    return True


def _watch_parent(pid: int, interval_s: float) -> None:  # pragma: no cover - runs in the worker processes
    while _parent_alive(pid):
        time.sleep(interval_s)
    os._exit(1)


def _start_worker(parent_pid: int) -> None:  # pragma: no cover - runs in the worker processes
    # Ctrl-C goes to the whole process group; only the parent handles it (it
    # cancels the queue and leaves a resumable file), the workers carry on
    # with their current chunk and are then shut down.
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    # A parent killed outright (SIGKILL, out of memory) cannot shut the pool
    # down, and a worker waiting for work would wait forever: leave when the
    # parent is gone.
    threading.Thread(target=_watch_parent, args=(parent_pid, 1.0), daemon=True).start()


def _process_context(extra_preload=()):
    """forkserver where available: no fork of a parent that holds threads or open HDF5 files.

    ``extra_preload``: more modules for the server to import when it starts (a server already running
    keeps what it has).
    """
    if sys.platform.startswith("linux") and "forkserver" in multiprocessing.get_all_start_methods():
        context = multiprocessing.get_context("forkserver")
        # The server imports the stages and runs them once on a small invented chunk (calcium.pipeline._preload);
        # every worker forked from it starts with the modules imported and the compiled functions loaded.
        context.set_forkserver_preload(["calcium.pipeline._preload", *extra_preload])
        return context
    return multiprocessing.get_context("spawn")


def prestart(backend: str, *, scheduler: str | None = None) -> None:
    """Start what the ``backend`` needs to start workers, in the background, before they are asked for.

    For "processes" and "dask" (a local cluster's workers come from the same
    server) on Linux: the fork server, which spends a second or two
    importing and warming up the stages (see :func:`_process_context`) while
    the caller prepares the run. Does nothing for serial or a dask cluster
    reached by its ``scheduler`` address, or when the server already runs
    (it lives as long as this process).
    """
    local = backend == "processes" or (backend == "dask" and not scheduler)
    if not local:
        return
    extra = ()
    if backend == "dask" and importlib.util.find_spec("distributed") is not None:
        # A local cluster's worker processes come from the server too: it imports dask.distributed for them.
        # This process needs it as well, to run the scheduler: imported meanwhile, while the inputs are read.
        extra = ("distributed",)
        threading.Thread(target=importlib.import_module, args=("distributed",), daemon=True,
                         name="import-distributed").start()
    if _process_context(extra).get_start_method() != "forkserver":
        return
    from multiprocessing import forkserver

    # One thread per worker for the numerical libraries: the workers already fill every core, and a library's
    # own threads would only compete with them (a user's own setting is kept). The server and the workers
    # forked from it take the environment of this moment; this process's own is left as it was.
    saved = dict(os.environ)
    try:
        for name, value in _SERVER_ENVIRONMENT.items():
            os.environ.setdefault(name, value)
        with _folder_of_the_package():
            forkserver.ensure_running()
    finally:
        for name in _SERVER_ENVIRONMENT:
            if name not in saved:
                os.environ.pop(name, None)


#: The environment the fork server starts with (a user's own settings are kept): thread counts of the
#: numerical libraries (OpenBLAS, OpenMP, MKL) at 1 for the worker processes, and PYTHONSAFEPATH. The server
#: is a fresh interpreter started in the current folder, which Python puts first on its module search path
#: (Python 3.11's fork server does not take the parent's path before it imports the preloaded modules): a
#: folder named ``calcium`` there (data beside which the user runs the tool) was imported instead of the
#: installed package, and every worker died of an import error. PYTHONSAFEPATH (Python 3.11+) leaves the
#: current folder off the path.
_SERVER_ENVIRONMENT = {"OPENBLAS_NUM_THREADS": "1", "OMP_NUM_THREADS": "1", "MKL_NUM_THREADS": "1",
                       "PYTHONSAFEPATH": "1"}
_SINGLE_THREAD_VARIABLES = ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS")


@contextlib.contextmanager
def _folder_of_the_package():
    """On Python < 3.11 (no PYTHONSAFEPATH): the current folder while the fork server starts is the one holding
    the installed package, so the folder Python puts first on the server's path finds the package itself."""
    if sys.version_info >= (3, 11):
        yield
        return
    here = os.getcwd()
    os.chdir(os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__)))))
    try:
        yield
    finally:
        os.chdir(here)


class ProcessExecutor(Executor):
    """A pool of worker processes on this machine (:class:`concurrent.futures.ProcessPoolExecutor`).

    Parameters
    ----------
    workers : int, optional
        Number of processes; default (None or 0) one per core (:func:`os.cpu_count`).
    """

    name = "processes"

    def __init__(self, workers: int | None = None):
        workers = check_int(workers, "workers", minimum=0) if workers is not None else 0
        self.workers = workers or os.cpu_count() or 1
        self._pool = None

    def _get_pool(self):
        if self._pool is None:
            prestart("processes")  # (started already by a pipeline run; here for callers that did not)
            self._pool = cf.ProcessPoolExecutor(max_workers=self.workers, mp_context=_process_context(),
                                                initializer=_start_worker, initargs=(os.getpid(),))
        return self._pool

    def map_chunks(self, fn, chunks, *, progress=None):
        pool = self._get_pool()
        reporter = _Progress(progress, chunks)
        source = iter(chunks)
        pending: dict = {}
        limit = _IN_FLIGHT_PER_WORKER * self.workers

        def top_up():
            for chunk_id, payload in itertools.islice(source, max(0, limit - len(pending))):
                pending[pool.submit(fn, payload)] = chunk_id

        clean = False
        try:
            top_up()
            while pending:
                finished, _ = cf.wait(pending, return_when=cf.FIRST_COMPLETED)
                for future in finished:
                    chunk_id = pending.pop(future)
                    try:
                        result = future.result()
                    except cf.process.BrokenProcessPool as exc:
                        raise ExecutorError(
                            "a worker process died unexpectedly: killed, or out of memory (try a smaller "
                            "execution.chunk_rois or fewer workers), or it could not start (a script that "
                            "starts workers needs an `if __name__ == \"__main__\":` guard and cannot be read "
                            f"from standard input): {exc}") from exc
                    top_up()
                    reporter.done(chunk_id)
                    yield chunk_id, result
            clean = True
        finally:
            reporter.close()
            if not clean:
                for future in pending:
                    future.cancel()
                self._shutdown(wait=False)

    def _shutdown(self, *, wait: bool):
        if self._pool is not None:
            self._pool.shutdown(wait=wait, cancel_futures=True)
            self._pool = None

    def close(self):
        self._shutdown(wait=True)


class DaskExecutor(Executor):
    """Chunks computed on a dask.distributed cluster.

    Parameters
    ----------
    workers : int, optional
        Local cluster only: number of worker processes (one thread each);
        default (None or 0) one per core.
    scheduler : str, optional
        Address of a running scheduler (``tcp://host:port``). The workers
        must have ``calcium`` installed and see the input files at the same
        paths. Without it a :class:`distributed.LocalCluster` is started
        whose scheduler and workers listen on 127.0.0.1 only, and it is
        closed again by :meth:`close`.

    Raises
    ------
    ImportError
        If dask.distributed is not installed (``pip install calcium[dask]``).
    SchedulerUnreachableError
        If the scheduler cannot be reached (nothing listening: within
        :data:`SCHEDULER_TIMEOUT_S` seconds).
    """

    name = "dask"

    def __init__(self, workers: int | None = None, *, scheduler: str | None = None):
        try:
            import distributed
        except ImportError:
            raise ImportError("the dask backend needs dask.distributed: pip install 'calcium[dask]' "
                              "(or choose execution.backend = \"processes\")") from None
        workers = check_int(workers, "workers", minimum=0) if workers is not None else 0
        self._cluster = None
        if scheduler:
            check_scheduler(scheduler)  # (seconds, not the client's own time-out, for an address nobody serves)
            try:
                self._client = distributed.Client(scheduler, timeout="30s")
            except (OSError, TimeoutError) as exc:
                raise SchedulerUnreachableError(f"cannot reach the dask scheduler at {scheduler} "
                                                f"(execution.scheduler): {exc}") from None
        else:
            import dask

            # No dashboard (nobody would know its port; it only costs CPU). The workers inherit this
            # configuration from the process that starts them. Their statistical
            # profiler (a stack sample every 10 ms) and GIL monitor (every 1 ms) are for looking into a
            # cluster's dashboard; here they would only take CPU from the chunks. And the default environment
            # of a worker sets glibc's MALLOC_TRIM_THRESHOLD_, which also freezes malloc's mmap threshold at
            # 128 KiB: every array of a long trace is then a fresh mapping whose pages fault in one by one,
            # and the chunks ran 2.5 times slower than in plain worker processes (measured).
            # Where it is available the workers are forked from the warmed-up fork server of the processes
            # backend (see _process_context), instead of each starting a fresh interpreter and loading the
            # stages on its first chunk.
            environ = dict(dask.config.get("distributed.nanny.pre-spawn-environ", {}))
            environ.pop("MALLOC_TRIM_THRESHOLD_", None)
            # Every process of the cluster also wakes up every 20 ms to time its event loop (diagnostics only),
            # samples the machine every 0.5 s for the dashboard, and the workers and their nannies read their
            # memory use every 0.1 s: less often here (together they took ~5 % of the cores from the chunks,
            # measured; a second is still soon enough to pause or restart a worker that outgrows its memory).
            settings = {"distributed.worker.profile.enabled": False,
                        "distributed.admin.system-monitor.gil.enabled": False,
                        "distributed.admin.tick.interval": "1s",
                        "distributed.admin.system-monitor.interval": "5s",
                        "distributed.worker.memory.monitor-interval": "1s",
                        "distributed.nanny.pre-spawn-environ": environ}
            prestart("dask")  # (started already by a pipeline run; here for callers that did not)
            method = _process_context().get_start_method()
            if method == "forkserver":
                settings["distributed.worker.multiprocessing-method"] = method
            with dask.config.set(settings):
                self._cluster = distributed.LocalCluster(
                    n_workers=workers or os.cpu_count() or 1, threads_per_worker=1, processes=True,
                    host="127.0.0.1", dashboard_address=None, silence_logs=logging.ERROR)
            self._client = distributed.Client(self._cluster)
        self.scheduler = self._client.scheduler.address
        self.workers = max(1, sum(self._client.nthreads().values()))

    @property
    def worker_addresses(self) -> list[str]:
        """Addresses of the connected workers."""
        return sorted(self._client.nthreads())

    def map_chunks(self, fn, chunks, *, progress=None):
        import distributed

        client = self._client
        reporter = _Progress(progress, chunks)
        source = iter(chunks)
        ids: dict = {}
        queue = distributed.as_completed()
        limit = _IN_FLIGHT_PER_WORKER * max(1, sum(client.nthreads().values()))

        def top_up():
            for chunk_id, payload in itertools.islice(source, max(0, limit - len(ids))):
                future = client.submit(fn, payload, pure=False)
                ids[future.key] = (chunk_id, future)
                queue.add(future)

        try:
            top_up()
            for future in queue:
                chunk_id, _ = ids.pop(future.key)
                result = future.result()
                future.release()
                top_up()
                reporter.done(chunk_id)
                yield chunk_id, result
        finally:
            reporter.close()
            for _, future in ids.values():
                future.cancel()

    def close(self):
        client, self._client = getattr(self, "_client", None), None
        cluster, self._cluster = getattr(self, "_cluster", None), None
        if client is not None:
            client.close()
        if cluster is not None:
            cluster.close()


def make_executor(backend: str = "processes", *, workers: int | None = None,
                  scheduler: str | None = None) -> Executor:
    """The executor for ``backend`` ("serial", "processes" or "dask").

    ``workers`` (0/None = one per core) applies to processes and to a local
    dask cluster; ``scheduler`` (an address) to dask only.
    """
    check_choice(backend, "backend", BACKENDS)
    if backend == "serial":
        return SerialExecutor()
    if backend == "processes":
        return ProcessExecutor(workers)
    return DaskExecutor(workers, scheduler=scheduler)
