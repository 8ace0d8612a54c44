"""Benchmark of the whole-session pipeline, end to end (read -> ΔF/F -> inference -> results file).

Runs the same session (a synthetic recording written as float32 .npy) with the three backends, in this order:
  serial (the reference), processes with --workers workers, dask with a --workers-worker local cluster,
--repeat times over (interleaved: serial, processes, dask, serial, ...; the disk is synced before each run),
plus, as a yardstick, two unrelated serial runs at once, one per half of the ROIs (what two cores of this
machine give when the work is split with nothing shared),
each in a fresh Python process (as `calcium run` would run it: the run loads the science modules and compiled
functions itself, or in its workers), and prints for each: the wall time of run_pipeline, throughput in million
ROI-frames per second, and the peak memory summed over that process and all its descendants (proportional set
size sampled every 2 s, and the summed resident set size sampled every 50 ms, an upper bound; psutil).
Then the medians over the repeats, and the ratios of those medians, measured in this run (with the range of the
ratios of single runs: identical runs on a shared machine differ by 10 % or more):
  speed-up of processes over serial                         (target >= 1.8 with 2 workers)
  overhead of the local dask cluster over processes         (target <= 15 %)
  throughput of processes on this machine                   (target >= 5 million frames/s on 2 cores)
and whether the three results files hold identical arrays. The reference for the pipeline's own overhead is
the stage functions called directly on a sample of ROIs in memory (serial pipeline / reference). The report and
the NWB export are off in the timed runs; pass --report to time the report once at the end.

Usage: python scripts/bench_pipeline.py [--rois 2000] [--frames 36000] [--frame-rate 30] [--workers 2]
                                        [--repeat 3] [--indicator NAME] [--skip-serial] [--skip-dask] [--report] [--keep FOLDER]
"""
from __future__ import annotations

import argparse
import json
import math
import os
import shutil
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

TARGETS = {"speed-up": 1.8, "dask overhead": 0.15, "throughput": 5e6}


class PeakMemory:
    """Peak memory of process ``pid`` (default: this one) and all its descendants, sampled by a thread (psutil).

    Two figures: ``peak`` is the summed proportional set size (PSS: pages shared between the parent, the process
    server and the workers, such as the libraries, are counted once), sampled every ``pss_interval_s`` because
    reading it parses /proc/<pid>/smaps (about 7 ms per process); ``peak_rss`` is the summed resident set size
    (cheap, sampled every ``interval_s``), an upper bound that counts shared pages once per process. The list of
    descendants is refreshed every ``tree_interval_s`` only: finding them scans every process of the machine
    (~3 ms), which every 50 ms took 6 % of a core from the runs being timed.
    """

    def __init__(self, pid: int | None = None, interval_s: float = 0.05, pss_interval_s: float = 2.0,
                 tree_interval_s: float = 0.5):
        import psutil

        self._psutil = psutil
        self.pid = pid
        self.interval_s = interval_s
        self.pss_interval_s = pss_interval_s
        self.tree_interval_s = tree_interval_s
        self.peak = 0
        self.peak_rss = 0
        self._tree = []
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)

    def _refresh_tree(self) -> None:
        try:
            root = self._psutil.Process(self.pid)
            self._tree = [root, *root.children(recursive=True)]
        except self._psutil.NoSuchProcess:
            self._tree = []

    def _sample(self, pss: bool) -> int:
        total = 0
        for process in self._tree:
            try:
                info = process.memory_full_info() if pss else process.memory_info()
                total += getattr(info, "pss", info.rss) if pss else info.rss
            except (self._psutil.NoSuchProcess, self._psutil.AccessDenied):
                pass
        return total

    def _run(self):
        last_pss = last_tree = -math.inf
        while not self._stop.is_set():
            if time.monotonic() - last_tree >= self.tree_interval_s:
                self._refresh_tree()
                last_tree = time.monotonic()
            self.peak_rss = max(self.peak_rss, self._sample(False))
            if time.monotonic() - last_pss >= self.pss_interval_s:
                self.peak = max(self.peak, self._sample(True))
                last_pss = time.monotonic()
            self._stop.wait(self.interval_s)

    def __enter__(self):
        self._thread.start()
        return self

    def __exit__(self, *exc):
        self._stop.set()
        self._thread.join()
        self._refresh_tree()
        self.peak = max(self.peak, self._sample(True))
        return False


def synthetic_session(path: Path, rois: int, frames: int, frame_rate: float, seed: int = 0) -> None:
    """Baseline 100 with slow bleaching, Poisson spikes (0.5 Hz) through a 0.1/1.0 s kernel, Gaussian noise.

    Written row block by row block into a memory-mapped float32 .npy, so a large session never sits in memory.
    """
    from calcium.kernel import Kernel

    rng = np.random.default_rng(seed)
    out = np.lib.format.open_memmap(path, mode="w+", dtype=np.float32, shape=(rois, frames))
    kernel = Kernel(0.1, 1.0, 0.3).impulse_response(frame_rate, int(8 * frame_rate))
    t = np.arange(frames) / frame_rate
    bleaching = 1.0 - 0.2 * (1.0 - np.exp(-t / 900.0))
    block = max(1, (1 << 22) // frames)
    for start in range(0, rois, block):
        stop = min(rois, start + block)
        spikes = (rng.random((stop - start, frames)) < 0.5 / frame_rate).astype(np.float64)
        dff = np.array([np.convolve(row, kernel)[:frames] for row in spikes])
        noise = rng.normal(0.0, 0.03, dff.shape)
        out[start:stop] = (100.0 * bleaching * (1.0 + dff + noise)).astype(np.float32)
    out.flush()
    del out


def science_per_roi(traces: Path, frame_rate: float, n_sample: int, indicator=None) -> float:
    """Seconds per ROI of the stage functions alone (ΔF/F, noise, inference), in this process, no files.

    The reference for the pipeline's own overhead: the same calls the pipeline makes for each ROI, on a
    sample of rows already in memory.
    """
    from calcium.infer import infer_spikes
    from calcium.signal import delta_f_over_f, estimate_noise

    from calcium.pipeline.stages import warm_up

    warm_up()  # the libraries imported and the compiled functions loaded before the clock starts
    rows = np.asarray(np.load(traces, mmap_mode="r")[:n_sample], dtype=np.float64)
    start = time.perf_counter()
    dff = delta_f_over_f(rows, frame_rate).dff
    for trace in dff:
        infer_spikes(trace, frame_rate, noise_sd=estimate_noise(trace, frame_rate), indicator=indicator)
    return (time.perf_counter() - start) / n_sample


def machine_speed(traces: Path, n_sample: int) -> float:
    """Frames per second of one scipy.signal.lfilter pass (an AR(2) recursion) on one core, best of 5.

    Not a target: a yardstick of how fast this machine is right now, so that throughputs measured on different
    days (or on a shared machine under other load) can be compared.
    """
    import scipy.signal

    rows = np.asarray(np.load(traces, mmap_mode="r")[:n_sample], dtype=np.float64)
    best = math.inf
    for _ in range(5):
        start = time.perf_counter()
        scipy.signal.lfilter([1.0], [1.0, -1.6, 0.63], rows, axis=-1)
        best = min(best, time.perf_counter() - start)
    return rows.size / best


def run_once(folder: Path, traces: Path, frame_rate: float, backend: str, workers: int, report: bool,
             indicator=None):
    """One run of the pipeline in a fresh Python process, as ``calcium run`` would do it.

    Returns (backend, workers used, seconds of run_pipeline, (peak PSS, peak summed RSS) of that process and
    its descendants). The time is taken inside the child around ``run_pipeline``: it includes loading the
    science modules and compiled functions (in the process itself, or in the workers' fork server), which a
    run in an already warm process would not pay, but not the interpreter's own start-up.
    """
    shutil.rmtree(folder, ignore_errors=True)  # a fresh run, never a resumed one (--keep reuses the folder)
    command = [sys.executable, str(Path(__file__).resolve()), "--child", backend, "--child-traces", str(traces),
               "--child-out", str(folder), "--frame-rate", repr(frame_rate), "--workers", str(workers)]
    if report:
        command.append("--report")
    if indicator:
        command += ["--indicator", indicator]
    child = subprocess.Popen(command, stdout=subprocess.PIPE, text=True)
    with PeakMemory(child.pid) as memory:
        out, _ = child.communicate()
    if child.returncode != 0:
        raise RuntimeError(f"the {backend} run failed (exit {child.returncode})")
    result = json.loads(out.strip().splitlines()[-1])
    return result["backend"], result["workers"], result["elapsed_s"], (memory.peak, memory.peak_rss)


def run_pair(folders, halves, frame_rate: float, indicator=None) -> float:
    """Two unrelated serial runs at once, one per half of the ROIs, each in its own fresh process.

    Not a backend: a yardstick of what two cores give on this machine when the work is split in two with
    nothing shared at all (each process loads the stages and writes its own results file). A parallel
    backend that matched it would lose nothing to its own organisation. Returns the seconds until both
    runs were done (the longer of the two ``run_pipeline`` times; they start together).
    """
    children = []
    for folder, traces in zip(folders, halves):
        shutil.rmtree(folder, ignore_errors=True)
        command = [sys.executable, str(Path(__file__).resolve()), "--child", "serial", "--child-traces",
                   str(traces), "--child-out", str(folder), "--frame-rate", repr(frame_rate), "--workers", "1"]
        if indicator:
            command += ["--indicator", indicator]
        children.append(subprocess.Popen(command, stdout=subprocess.PIPE, text=True))
    elapsed = []
    for child in children:
        out, _ = child.communicate()
        if child.returncode != 0:
            raise RuntimeError(f"a serial run on half of the ROIs failed (exit {child.returncode})")
        elapsed.append(json.loads(out.strip().splitlines()[-1])["elapsed_s"])
    return max(elapsed)


def _child(args) -> int:
    """The body of run_once's process: one timed run_pipeline, its result as one JSON line on stdout."""
    from calcium.pipeline import config_from_dict, run_pipeline

    config = config_from_dict({
        "inputs": {"traces": args.child_traces, "frame_rate": args.frame_rate},
        "inference": {} if args.indicator is None else {"indicator": args.indicator},
        "output": {"folder": args.child_out},
        "report": {"enabled": args.report},
        "execution": {"backend": args.child, "workers": args.workers},
    })
    start = time.perf_counter()
    summary = run_pipeline(config, progress=False)
    elapsed = time.perf_counter() - start
    print(json.dumps({"backend": summary.backend, "workers": summary.workers, "elapsed_s": elapsed}))
    return 0


def same_results(a: Path, b: Path) -> bool:
    from calcium.pipeline import open_results

    with open_results(a) as x, open_results(b) as y:
        names = [n for n in x.names() if not n.startswith("progress/finished")]
        if sorted(names) != sorted(n for n in y.names() if not n.startswith("progress/finished")):
            return False
        for name in names:
            dataset = x.dataset(name)
            step = max(1, (1 << 24) // max(1, int(np.prod(dataset.shape[1:], dtype=np.int64))))
            for start in range(0, max(1, dataset.shape[0] if dataset.shape else 1), step):
                part = np.s_[start:start + step] if dataset.shape else ()
                if not np.array_equal(x.read(name, part), y.read(name, part),
                                      equal_nan=x.read(name, part).dtype.kind == "f"):
                    return False
    return True


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--rois", type=int, default=2000)
    parser.add_argument("--frames", type=int, default=36000)
    parser.add_argument("--frame-rate", type=float, default=30.0)
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--repeat", type=int, default=3,
                        help="runs per backend, interleaved; the figures are the medians (default 3)")
    parser.add_argument("--skip-serial", action="store_true", help="no serial run (no speed-up figure)")
    parser.add_argument("--skip-dask", action="store_true", help="no dask run")
    parser.add_argument("--report", action="store_true", help="also time the HTML report (processes run)")
    parser.add_argument("--indicator", help="infer with this indicator's published kernel instead of estimating "
                                            "the kinetics of every ROI (e.g. GCaMP6s)")
    parser.add_argument("--keep", type=Path, help="work in this folder and keep it")
    parser.add_argument("--child", help=argparse.SUPPRESS)          # (run_once's fresh process)
    parser.add_argument("--child-traces", help=argparse.SUPPRESS)
    parser.add_argument("--child-out", help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.child:
        return _child(args)

    root = args.keep or Path(tempfile.mkdtemp(prefix="bench_pipeline_"))
    root.mkdir(parents=True, exist_ok=True)
    try:
        traces = root / "traces.npy"
        print(f"session: {args.rois} ROIs x {args.frames} frames at {args.frame_rate:g} Hz "
              f"({args.rois * args.frames / 1e6:.1f} million ROI-frames, "
              f"{args.frames / args.frame_rate / 60:.1f} min); {os.cpu_count()} CPU(s)")
        start = time.perf_counter()
        synthetic_session(traces, args.rois, args.frames, args.frame_rate)
        print(f"synthetic input written in {time.perf_counter() - start:.1f} s ({traces.stat().st_size / 1e6:.0f} MB)")
        # One tiny run first so that numba's compiled kernels are in the on-disk cache for every backend.
        warm = root / "warm.npy"
        np.save(warm, np.load(traces, mmap_mode="r")[:2, : min(args.frames, 3000)])
        run_once(root / "out-warm", warm, args.frame_rate, "serial", 1, False)
        halves = []
        if not args.skip_serial and args.rois >= 2:
            source = np.load(traces, mmap_mode="r")
            for i, part in enumerate((slice(0, args.rois // 2), slice(args.rois // 2, args.rois))):
                halves.append(root / f"half-{i}.npy")
                np.save(halves[-1], source[part])
            del source

        n_sample = min(args.rois, 100)
        print(f"machine yardstick: one lfilter pass (AR(2)) runs at {machine_speed(traces, n_sample) / 1e6:.0f} "
              f"million frames/s on one core")
        per_roi = science_per_roi(traces, args.frame_rate, n_sample, args.indicator)
        print(f"reference: the stage functions alone (ΔF/F, noise, inference; {n_sample} ROIs in memory, one "
              f"process): {per_roi * 1e3:.1f} ms per ROI = {args.frames / per_roi / 1e6:.2f} million frames/s")

        backends = ([] if args.skip_serial else [("serial", 1)]) + [("processes", args.workers)] + \
                   ([] if args.skip_dask else [("dask", args.workers)])
        # Repeats are interleaved (serial, processes, dask, serial, ...), so that a slow spell of a shared
        # machine falls on every backend alike; the ratios are those of the medians.
        walls = {backend: [] for backend, _ in backends}
        peaks = {backend: (0, 0) for backend, _ in backends}
        used = {}
        print(f"\n{'backend':<10} {'workers':>7} {'run':>4} {'wall (s)':>9} {'Mframes/s':>10} {'peak PSS (MB)':>14} "
              f"{'peak summed RSS (MB)':>21}")
        for repeat in range(args.repeat):
            for backend, workers in backends:
                os.sync()  # the previous run's results are on disk before this one starts
                _, used[backend], elapsed, peak = run_once(root / f"out-{backend}", traces, args.frame_rate,
                                                           backend, workers, False, args.indicator)
                walls[backend].append(elapsed)
                peaks[backend] = (max(peaks[backend][0], peak[0]), max(peaks[backend][1], peak[1]))
                print(f"{backend:<10} {used[backend]:>7} {repeat + 1:>4} {elapsed:>9.2f} "
                      f"{args.rois * args.frames / elapsed / 1e6:>10.2f} {peak[0] / 2**20:>14.0f} "
                      f"{peak[1] / 2**20:>21.0f}", flush=True)
            if halves:
                os.sync()
                elapsed = run_pair([root / "out-half-0", root / "out-half-1"], halves, args.frame_rate,
                                   args.indicator)
                walls.setdefault("2 x serial", []).append(elapsed)
                print(f"{'2 x serial':<10} {'1+1':>7} {repeat + 1:>4} {elapsed:>9.2f} "
                      f"{args.rois * args.frames / elapsed / 1e6:>10.2f}   (two unrelated runs, one per half of "
                      f"the ROIs, at once)", flush=True)
        timings = {backend: float(np.median(values)) for backend, values in walls.items()}
        if args.repeat > 1:
            print(f"\nmedian of {args.repeat} runs each:")
            for backend, _ in backends:
                values = walls[backend]
                print(f"{backend:<10} {used[backend]:>7} {'med':>4} {timings[backend]:>9.2f} "
                      f"{args.rois * args.frames / timings[backend] / 1e6:>10.2f} {peaks[backend][0] / 2**20:>14.0f} "
                      f"{peaks[backend][1] / 2**20:>21.0f}   (range {min(values):.2f}-{max(values):.2f} s)")
            if "2 x serial" in walls:
                values = walls["2 x serial"]
                print(f"{'2 x serial':<10} {'1+1':>7} {'med':>4} {timings['2 x serial']:>9.2f} "
                      f"{args.rois * args.frames / timings['2 x serial'] / 1e6:>10.2f}   "
                      f"(range {min(values):.2f}-{max(values):.2f} s)")

        def spread(a, b, f, style):
            """Range of f over the repeats' pairs (run i of a with run i of b), formatted with ``style``."""
            values = [f(x, y) for x, y in zip(walls[a], walls[b])]
            return (f" (single runs: {min(values):{style}} to {max(values):{style}})" if len(values) > 1 else "")

        print()
        if "serial" in timings:
            print(f"serial pipeline / stage functions alone: {timings['serial'] / (per_roi * args.rois):.2f}x "
                  f"(the pipeline's own cost: reading, writing, flags, provenance)")
        if "serial" in timings:
            speedup = timings["serial"] / timings["processes"]
            print(f"speed-up processes/serial ({args.workers} workers): {speedup:.2f}x "
                  f"(target >= {TARGETS['speed-up']}x) -> {'met' if speedup >= TARGETS['speed-up'] else 'NOT met'}"
                  + spread("serial", "processes", lambda a, b: a / b, ".2f"))
        if "2 x serial" in timings:
            ceiling = timings["serial"] / timings["2 x serial"]
            print(f"yardstick: serial / (two unrelated serial runs on the halves at once) = {ceiling:.2f}x; "
                  f"processes reach {timings['2 x serial'] / timings['processes']:.0%} of it"
                  + spread("2 x serial", "processes", lambda a, b: a / b, ".0%")
                  + " (the same work split in two with nothing shared: what two cores of this machine give)")
        if "dask" in timings:
            overhead = timings["dask"] / timings["processes"] - 1.0
            print(f"dask local-cluster overhead over processes: {overhead:+.1%} "
                  f"(target <= {TARGETS['dask overhead']:.0%}) -> "
                  f"{'met' if overhead <= TARGETS['dask overhead'] else 'NOT met'}"
                  + spread("dask", "processes", lambda a, b: a / b - 1.0, "+.1%"))
        throughput = args.rois * args.frames / timings["processes"]
        print(f"throughput (processes): {throughput / 1e6:.2f} million frames/s "
              f"(target >= {TARGETS['throughput'] / 1e6:g} on 2 cores) -> "
              f"{'met' if throughput >= TARGETS['throughput'] else 'NOT met'}")
        names = [backend for backend, _ in backends]
        identical = all(same_results(root / f"out-{names[0]}" / "results.h5", root / f"out-{n}" / "results.h5")
                        for n in names[1:])
        print(f"results identical across backends: {identical}")
        if args.report:
            from calcium.pipeline import write_session_report

            with PeakMemory() as memory:
                start = time.perf_counter()
                write_session_report(root / "out-processes" / "results.h5", root / "report")
                elapsed = time.perf_counter() - start
            print(f"HTML report: {elapsed:.1f} s, peak memory {memory.peak / 2**20:.0f} MB")
        return 0
    finally:
        if args.keep is None:
            shutil.rmtree(root, ignore_errors=True)


if __name__ == "__main__":
    sys.exit(main())
