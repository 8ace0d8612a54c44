"""Benchmark of the signal stages against one moving-average pass over the same array.

Prints, measured in one run on the same synthetic (rois, frames) array:
  - the reference: one scipy.ndimage.uniform_filter1d pass (axis=-1, size = the ΔF/F smoothing window)
    into a preallocated output (the pass alone, without charging it for fresh memory: the strict choice),
  - ΔF/F (calcium.signal.delta_f_over_f)           target <= 20x the reference,
  - noise estimation (calcium.signal.estimate_noise) target <= 10x the reference,
  - a zero-phase low-pass (calcium.signal.zero_phase_filter), for information,
as best-of-N wall times and ratios, and the peak memory each call allocates (tracemalloc, in a separate
untimed call) plus the process's peak resident size.

Usage: python scripts/bench_preprocess.py [--rois 1000] [--frames 36000] [--frame-rate 30] [--quick]
"""
from __future__ import annotations

import argparse
import resource
import sys
import time
import tracemalloc

import numpy as np
import scipy.ndimage

from calcium.signal import delta_f_over_f, estimate_noise, zero_phase_filter

TARGETS = {"ΔF/F": 20.0, "noise estimate": 10.0}


def best_time(func, repeats: int) -> float:
    best = np.inf
    for _ in range(repeats):
        start = time.perf_counter()
        func()
        best = min(best, time.perf_counter() - start)
    return best


def peak_allocation_mb(func) -> float:
    tracemalloc.start()
    try:
        func()
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    return peak / 2 ** 20


def synthetic_traces(rois: int, frames: int, frame_rate: float, missing_fraction: float, seed: int):
    rng = np.random.default_rng(seed)
    t = np.arange(frames) / frame_rate
    bleaching = np.exp(-t / (3 * t[-1] + 1.0))
    traces = 100.0 * bleaching * (1.0 + rng.normal(0.0, 0.03, (rois, frames)))
    events = rng.random((rois, frames)) < 0.2 / frame_rate
    traces[events] *= 1.5
    if missing_fraction:
        traces[rng.random((rois, frames)) < missing_fraction] = np.nan
    return traces


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rois", type=int, default=1000, help="number of ROIs (default 1000)")
    parser.add_argument("--frames", type=int, default=36_000, help="frames per ROI (default 36000)")
    parser.add_argument("--frame-rate", type=float, default=30.0, help="Hz (default 30)")
    parser.add_argument("--smooth-s", type=float, default=1.0, help="ΔF/F smoothing window, s (default 1)")
    parser.add_argument("--missing-fraction", type=float, default=0.0,
                        help="fraction of samples set to NaN (default 0)")
    parser.add_argument("--repeats", type=int, default=3, help="timed repeats, best kept (default 3)")
    parser.add_argument("--quick", action="store_true", help="small run: 100 ROIs x 9000 frames")
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args(argv)
    if args.quick:
        args.rois, args.frames = 100, 9000

    fr = args.frame_rate
    traces = synthetic_traces(args.rois, args.frames, fr, args.missing_fraction, args.seed)
    size = max(1, int(round(args.smooth_s * fr)))
    print(f"array: {args.rois} ROIs x {args.frames} frames float64 ({traces.nbytes / 2 ** 20:.0f} MiB), "
          f"{fr:g} Hz, missing fraction {args.missing_fraction:g}, best of {args.repeats}")

    out = np.empty_like(traces)
    cases = [
        ("reference: uniform_filter1d", lambda: scipy.ndimage.uniform_filter1d(traces, size, axis=-1,
                                                                               output=out)),
        ("ΔF/F", lambda: delta_f_over_f(traces, fr, smooth_s=args.smooth_s)),
        ("noise estimate", lambda: estimate_noise(traces, fr)),
        ("zero-phase low-pass 3 Hz", lambda: zero_phase_filter(traces, fr, "lowpass", 3.0)),
    ]
    cases[0][1]()  # touch the output pages once
    if args.quick:
        print("(--quick: the targets are set for the default size; at this size the reference runs from "
              "the cache, so the ratios are only indicative)")
    reference = None
    failed = False
    print(f"{'stage':30s} {'time s':>8s} {'ratio':>7s} {'target':>7s} {'peak alloc MiB':>15s}")
    for name, func in cases:
        seconds = best_time(func, args.repeats)
        reference = seconds if reference is None else reference
        ratio = seconds / reference
        target = TARGETS.get(name)
        mark = "" if target is None else ("ok" if ratio <= target else "OVER")
        failed |= mark == "OVER" and not args.quick
        peak = peak_allocation_mb(func)
        target_text = f"<= {target:g}x" if target else ""
        print(f"{name:30s} {seconds:8.3f} {ratio:6.1f}x {target_text:>7s} {peak:15.0f} {mark}")
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # kilobytes on Linux
    print(f"process peak resident size: {rss:.0f} MiB")
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
