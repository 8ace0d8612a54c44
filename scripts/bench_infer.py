"""Benchmark of calcium.infer (spike inference).

1. Speed at 100,000 frames, as ratios to one scipy.signal.lfilter pass of
   the AR recursion over the same trace, timed in this run:
   - deconvolve_ar, AR(1), fixed baseline           (target <= 3x)
   - deconvolve_ar, AR(2), fixed baseline           (target <= 10x)
   - the same with a fitted baseline                (no target; reported)
   - infer_spikes, everything automatic             (target <= 20x)
   - infer_spikes with the indicator given          (no target; reported)
   The traces come from the forward model (GCaMP6f-like kinetics, 30 Hz,
   0.5 Hz Poisson firing, single-spike SNR 4); the penalty of the
   deconvolve_ar rows is the noise-matched one.
2. Speed-up of deconvolve_ar over deconvolve_convex (cvxpy + CLARABEL) at
   10,000 frames, fixed and fitted baseline, with the objectives compared
   (target >= 1000x; a positive difference means the convex solver stopped
   above the exact optimum).
3. Accuracy sweep: F1 of spike detection (+-2 frames, optimal one-to-one
   matching, calcium.score.score_spikes) and the correlation of spike counts
   in 0.2 s bins, per indicator / frame rate / single-spike SNR, with the
   indicator given and fully blind.

Run:  python scripts/bench_infer.py [--quick] [--write docs/benchmarks-infer.md]
"""
from __future__ import annotations

import argparse
import platform
import time

import numpy as np
from scipy.signal import lfilter

from calcium.forward import simulate_recording
from calcium.infer import deconvolve_ar, deconvolve_convex, infer_spikes, penalty_for_noise
from calcium.kernel import Kernel
from calcium.score import score_spikes


NOTES_MARKER = "<!-- notes (kept when the tables are rewritten) -->"


def best_time(func, repeats: int) -> float:
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        func()
        times.append(time.perf_counter() - start)
    return min(times)


def trace(n_frames, frame_rate, kernel, snr, seed=0):
    duration = n_frames / frame_rate
    rec = simulate_recording(1, duration, frame_rate, kernel=kernel, rate_hz=0.5, noise_sd=kernel.amplitude / snr,
                             seed=seed)
    return rec.dff[0], kernel.amplitude / snr


def speed(n_frames: int, repeats: int, lines: list) -> None:
    frame_rate = 30.0
    gcamp = Kernel.from_indicator("GCaMP6f")
    cases = [("AR(1)", Kernel(0.0, gcamp.decay_s, gcamp.amplitude)), ("AR(2)", gcamp)]
    lines.append(f"### Speed at {n_frames:,} frames (best of {repeats}; ratio to one lfilter pass)\n")
    lines.append("| what | time (ms) | lfilter (ms) | ratio | target |")
    lines.append("|---|---:|---:|---:|---|")
    for label, kernel in cases:
        y, noise = trace(n_frames, frame_rate, kernel, 4.0)
        g = kernel.ar_coefficients(frame_rate)
        den = np.concatenate([[1.0], -g])
        reference = best_time(lambda: lfilter([1.0], den, y), repeats * 3)
        lam = penalty_for_noise(y, g, noise, baseline=0.0).penalty
        target = "<= 3x" if label == "AR(1)" else "<= 10x"
        for baseline, tgt in ((0.0, target), ("fit", "-")):
            deconvolve_ar(y, g, penalty=lam, baseline=baseline)  # compile / warm up
            elapsed = best_time(lambda: deconvolve_ar(y, g, penalty=lam, baseline=baseline), repeats)
            name = f"deconvolve_ar {label}, baseline {'fitted' if baseline == 'fit' else 'fixed'}"
            lines.append(f"| {name} | {elapsed * 1e3:.2f} | {reference * 1e3:.3f} | {elapsed / reference:.1f}x | "
                         f"{tgt} |")
        if label == "AR(2)":
            infer_spikes(y[:3000], frame_rate)  # warm up
            auto = best_time(lambda: infer_spikes(y, frame_rate), max(1, repeats // 2))
            lines.append(f"| infer_spikes, all automatic (noise, AR(2) kinetics, penalty, spike size) | "
                         f"{auto * 1e3:.1f} | {reference * 1e3:.3f} | {auto / reference:.1f}x | <= 20x |")
            given = best_time(lambda: infer_spikes(y, frame_rate, indicator="GCaMP6f"), max(1, repeats // 2))
            lines.append(f"| infer_spikes, indicator given (noise, penalty estimated) | {given * 1e3:.1f} | "
                         f"{reference * 1e3:.3f} | {given / reference:.1f}x | - |")
    lines.append("")


def versus_convex(n_frames: int, lines: list) -> None:
    frame_rate = 30.0
    lines.append(f"### Exact AR solver vs cvxpy + CLARABEL at {n_frames:,} frames\n")
    lines.append("| model | convex (s) | AR solver (ms) | speed-up | relative objective difference |")
    lines.append("|---|---:|---:|---:|---:|")
    for label, kernel in (("AR(1)", Kernel(0.0, 0.18, 0.19)), ("AR(2)", Kernel.from_indicator("GCaMP6f"))):
        y, noise = trace(n_frames, frame_rate, kernel, 4.0, seed=1)
        g = kernel.ar_coefficients(frame_rate)
        for baseline in (0.0, "fit"):
            lam = penalty_for_noise(y, g, noise, baseline=baseline).penalty
            start = time.perf_counter()
            slow = deconvolve_convex(y, g, penalty=lam, baseline=baseline)
            t_slow = time.perf_counter() - start
            fast = deconvolve_ar(y, g, penalty=lam, baseline=baseline)
            t_fast = best_time(lambda: deconvolve_ar(y, g, penalty=lam, baseline=baseline), 7)
            rel = (slow.objective - fast.objective) / abs(fast.objective)
            name = f"{label}, {'fitted' if baseline == 'fit' else 'fixed'} baseline"
            lines.append(f"| {name} | {t_slow:.2f} | {t_fast * 1e3:.2f} | {t_slow / t_fast:,.0f}x | {rel:+.1e} |")
    lines.append("")


def accuracy(duration_s: float, seeds: int, lines: list) -> None:
    indicators = ("GCaMP6s", "GCaMP6f", "jGCaMP7f", "jGCaMP8m")
    rates = (15.0, 30.0, 60.0)
    snrs = (2, 3, 4, 6, 8)
    for mode in ("indicator given", "blind"):
        lines.append(f"### Accuracy, {mode} ({duration_s:g} s traces, 0.5 Hz Poisson, {seeds} seed(s); "
                     "F1 within +-2 frames / correlation of counts in 0.2 s bins)\n")
        lines.append("| indicator | Hz | " + " | ".join(f"SNR {s}" for s in snrs) + " |")
        lines.append("|---|---:|" + "---|" * len(snrs))
        all_f1 = {s: [] for s in snrs}
        for indicator in indicators:
            kernel = Kernel.from_indicator(indicator)
            for rate in rates:
                cells = []
                for snr in snrs:
                    f1s, rs = [], []
                    for seed in range(seeds):
                        rec = simulate_recording(1, duration_s, rate, kernel=kernel, rate_hz=0.5,
                                                 noise_sd=kernel.amplitude / snr, seed=1000 * seed + int(rate) + snr)
                        kw = {"indicator": indicator} if mode == "indicator given" else {}
                        result = infer_spikes(rec.dff[0], rate, **kw)
                        score = score_spikes(result.spike_times, rec.spike_times[0], tolerance_s=2.0 / rate,
                                             bin_widths_s=(0.2,), duration_s=duration_s)
                        f1s.append(score.f1)
                        rs.append(score.correlations[0][1])
                    all_f1[snr].extend(f1s)
                    cells.append(f"{np.mean(f1s):.2f} / {np.nanmean(rs):.2f}")
                lines.append(f"| {indicator} | {rate:g} | " + " | ".join(cells) + " |")
        lines.append("| **mean F1** | | " + " | ".join(f"**{np.mean(all_f1[s]):.2f}**" for s in snrs) + " |")
        lines.append("")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="smaller sizes, one seed")
    parser.add_argument("--write", metavar="PATH", help="also write the tables (markdown) to PATH")
    args = parser.parse_args()
    lines = ["# Spike inference benchmarks (`scripts/bench_infer.py`)", "",
             f"Machine: {platform.processor() or platform.machine()}, Python {platform.python_version()}, "
             f"numpy {np.__version__}. Run: `python scripts/bench_infer.py{' --quick' if args.quick else ''}`.", ""]
    speed(20_000 if args.quick else 100_000, 3 if args.quick else 7, lines)
    versus_convex(2_000 if args.quick else 10_000, lines)
    accuracy(60.0 if args.quick else 120.0, 1 if args.quick else 2, lines)
    text = "\n".join(lines)
    print(text)
    if args.write:
        # hand-written commentary below the marker survives a rewrite of the tables
        tail = ""
        try:
            with open(args.write, encoding="utf-8") as handle:
                old = handle.read()
            if NOTES_MARKER in old:
                tail = "\n" + old[old.index(NOTES_MARKER):]
        except FileNotFoundError:
            pass
        with open(args.write, "w", encoding="utf-8") as handle:
            handle.write(text + "\n" + tail)


if __name__ == "__main__":
    main()
