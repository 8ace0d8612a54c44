"""Benchmark of calcium.forward.

1. predict_fluorescence for 10,000 spikes over 1,000,000 frames, as a ratio
   to one scipy.signal.lfilter pass (the kernel's AR(2) recursion) over the
   same number of frames, both timed in this run (target: <= 5x).
2. simulate_recording of 1000 ROIs x 36,000 frames (20 min at 30 Hz, photon
   shot noise, bleaching, drift): wall time, as a ratio to drawing the
   same number of Poisson photon counts with numpy, and peak memory traced
   by tracemalloc, as a ratio to the four (rois, frames) float64 outputs.

Run:  python scripts/bench_forward.py [--quick]
"""
from __future__ import annotations

import argparse
import resource
import sys
import time
import tracemalloc
import warnings

import numpy as np
from scipy.signal import lfilter

from calcium.forward import predict_fluorescence, simulate_recording
from calcium.kernel import Kernel
from benchtools import best_time


def bench_predict(n_frames: int, n_spikes: int, repeats: int) -> None:
    frame_rate = 30.0
    rng = np.random.default_rng(0)
    spikes = rng.uniform(0, n_frames / frame_rate, n_spikes)
    signal = rng.standard_normal(n_frames)
    print(f"predict_fluorescence: {n_spikes:,} spikes, {n_frames:,} frames at {frame_rate:g} Hz "
          f"(best of {repeats})")
    cases = [
        ("GCaMP6s kernel (2 exponentials), point samples", Kernel.from_indicator("GCaMP6s"), None),
        ("same, 20 ms exposure", Kernel.from_indicator("GCaMP6s"), 0.02),
        ("3 exponentials (slow component) + saturation",
         Kernel(0.05, 0.5, 0.2, slow_decay_s=3.0, slow_fraction=0.3, dff_max=3.0, hill_n=2.5, hill_k=3.0), None),
    ]
    g1, g2 = Kernel.from_indicator("GCaMP6s").ar_coefficients(frame_rate)
    reference = best_time(lambda: lfilter([1.0], [1.0, -g1, -g2], signal), repeats)
    print(f"  reference: one scipy.signal.lfilter AR(2) pass over {n_frames:,} samples: {reference * 1e3:8.2f} ms")
    for label, kernel, exposure in cases:
        predict_fluorescence([0.5, 1.25], kernel, frame_rate, 100, exposure_s=exposure)  # warm-up
        elapsed = best_time(lambda: predict_fluorescence(spikes, kernel, frame_rate, n_frames, exposure_s=exposure),
                            repeats)
        print(f"  {label:50s} {elapsed * 1e3:8.2f} ms   ratio {elapsed / reference:5.2f}x")


def bench_simulate(n_rois: int, n_frames: int) -> None:
    frame_rate = 30.0
    photons = 100.0
    output_bytes = 4 * n_rois * n_frames * 8
    rng = np.random.default_rng(1)
    start = time.perf_counter()
    rng.poisson(photons, size=(n_rois, n_frames))
    reference = time.perf_counter() - start

    tracemalloc.start()
    start = time.perf_counter()
    rec = simulate_recording(n_rois, n_frames / frame_rate, frame_rate, indicator="GCaMP6s", rate_hz=1.0,
                             photons_per_frame=photons, read_noise_sd=1.0, bleach_fraction=0.2, drift_sd=0.05,
                             seed=0)
    elapsed = time.perf_counter() - start
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    spikes = sum(t.size for t in rec.spike_times)
    maxrss_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # kB on Linux
    print(f"simulate_recording: {n_rois:,} ROIs x {n_frames:,} frames ({spikes:,} spikes, shot + read noise, "
          f"bleaching, drift)")
    print(f"  reference: numpy Poisson draw of {n_rois * n_frames:,} counts: {reference:6.2f} s")
    print(f"  simulate_recording:                       {elapsed:6.2f} s   ratio {elapsed / reference:5.2f}x")
    print(f"  peak traced memory {peak / 2**20:8.0f} MiB   ratio to the four float64 outputs "
          f"({output_bytes / 2**20:.0f} MiB): {peak / output_bytes:4.2f}x;  process max RSS {maxrss_mb:.0f} MiB")


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="smaller sizes (a smoke test of the script)")
    args = parser.parse_args(argv)
    warnings.simplefilter("error")  # a warning here would be a bug in the benchmark set-up
    if args.quick:
        bench_predict(100_000, 1_000, 3)
        bench_simulate(50, 3_600)
    else:
        bench_predict(1_000_000, 10_000, 7)
        bench_simulate(1000, 36_000)
    return 0


if __name__ == "__main__":
    sys.exit(main())
