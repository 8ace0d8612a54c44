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
   deconvolve_ar rows is the noise-matched one.  Each ratio is measured in
   several rounds; in a round the reference and the candidate are timed
   back to back (best of several repeats each, compiled code warmed up), so
   that both see the same machine load; the table gives the medians over
   the rounds.
2. Spiking-rate sweep: the exact AR(2) solve (deconvolve_ar, noise-matched
   penalty) at 0.5 %, 1 %, 2 % and 5 % of frames with a spike (Poisson
   rate -frame_rate log(1 - share)), fixed baseline (target <= 10x at every
   share) and fitted (reported), the same kinetics and SNR as in 1; the
   same at GCaMP6s kinetics (slower rise and decay: more rounds of the
   exact finish) is reported without a target.  The share of frames that
   got a spike in the simulation is printed beside the one asked for.
3. Speed-up of deconvolve_ar over deconvolve_convex (cvxpy + CLARABEL) at
   10,000 frames, fixed and fitted baseline, with the objectives compared
   (target >= 1000x; a positive difference means the convex solver stopped
   above the exact optimum).
4. Accuracy sweep: F1 of spike detection (+-2 frames, optimal one-to-one
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

from calcium.forward import NoiseModel, SpikeModel, simulate_recording
from calcium.infer import deconvolve_ar, deconvolve_convex, infer_spikes, penalty_for_noise
from calcium.kernel import Kernel
from calcium.score import score_spikes
from benchtools import best_time


NOTES_MARKER = "<!-- notes (kept when the tables are rewritten) -->"


def paired(reference, candidate, rounds: int, repeats: int):
    """(median reference time, median candidate time, median ratio) over rounds timed back to back."""
    ref, cand = [], []
    for _ in range(rounds):
        ref.append(best_time(reference, 3 * repeats))
        cand.append(best_time(candidate, repeats))
    ratios = np.array(cand) / np.array(ref)
    return float(np.median(ref)), float(np.median(cand)), float(np.median(ratios))


def trace(n_frames, frame_rate, kernel, snr, seed=0):
    """(ΔF/F of one simulated ROI, the noise s.d.) at single-spike SNR ``snr`` and 0.5 Hz Poisson firing."""
    rec = simulate(n_frames / frame_rate, frame_rate, kernel, 0.5, kernel.amplitude / snr, seed)
    return rec.dff[0], kernel.amplitude / snr


def simulate(duration_s, frame_rate, kernel, rate_hz, noise_sd, seed):
    return simulate_recording(1, duration_s, frame_rate, kernel=kernel, spikes=SpikeModel(rate_hz=rate_hz),
                              noise=NoiseModel(noise_sd=noise_sd), seed=seed)


def speed(n_frames: int, repeats: int, rounds: int, lines: list) -> None:
    frame_rate = 30.0
    gcamp = Kernel.from_indicator("GCaMP6f")
    cases = [("AR(1)", Kernel(0.0, gcamp.decay_s, gcamp.amplitude)), ("AR(2)", gcamp)]
    lines.append(f"### Speed at {n_frames:,} frames (medians of {rounds} rounds, best of {repeats} each; "
                 "ratio to one lfilter pass)\n")
    lines.append("| what | time (ms) | lfilter (ms) | ratio | target |")
    lines.append("|---|---:|---:|---:|---|")

    def row(name, reference, candidate, target):
        candidate()  # compile / warm up
        ref, cand, ratio = paired(reference, candidate, rounds, repeats)
        lines.append(f"| {name} | {cand * 1e3:.2f} | {ref * 1e3:.3f} | {ratio:.1f}x | {target} |")

    for label, kernel in cases:
        y, noise = trace(n_frames, frame_rate, kernel, 4.0)
        g = kernel.ar_coefficients(frame_rate)
        den = np.concatenate([[1.0], -g])

        def reference():
            lfilter([1.0], den, y)

        lam = penalty_for_noise(y, g, noise, baseline=0.0).penalty
        target = "<= 3x" if label == "AR(1)" else "<= 10x"
        for baseline, tgt in ((0.0, target), ("fit", "-")):
            name = f"deconvolve_ar {label}, baseline {'fitted' if baseline == 'fit' else 'fixed'}"
            row(name, reference, lambda: deconvolve_ar(y, g, penalty=lam, baseline=baseline), tgt)
        if label == "AR(2)":
            row("infer_spikes, all automatic (noise, AR(2) kinetics, penalty, spike size)", reference,
                lambda: infer_spikes(y, frame_rate), "<= 20x")
            row("infer_spikes, indicator given (noise, penalty estimated)", reference,
                lambda: infer_spikes(y, frame_rate, indicator="GCaMP6f"), "-")
    lines.append("")


def spiking_sweep(n_frames: int, repeats: int, rounds: int, lines: list) -> None:
    frame_rate = 30.0
    shares = (0.005, 0.01, 0.02, 0.05)
    lines.append(f"### Exact AR(2) solve against the share of frames with a spike ({n_frames:,} frames, 30 Hz, "
                 f"single-spike SNR 4; medians of {rounds} rounds; ratio to one lfilter pass)\n")
    lines.append("| kinetics | frames with a spike (asked / got) | frames with s > 0 (solution) | fixed baseline | "
                 "fitted baseline | target |")
    lines.append("|---|---:|---:|---:|---:|---|")
    for indicator, target in (("GCaMP6f", "<= 10x (fixed)"), ("GCaMP6s", "-")):
        kernel = Kernel.from_indicator(indicator)
        g = kernel.ar_coefficients(frame_rate)
        den = np.concatenate([[1.0], -g])
        for share in shares:
            rate_hz = -frame_rate * np.log1p(-share)
            rec = simulate(n_frames / frame_rate, frame_rate, kernel, rate_hz, kernel.amplitude / 4.0, seed=7)
            y = rec.dff[0]
            got = np.unique(np.floor(rec.spike_times[0] * frame_rate)).size / y.size
            lam = penalty_for_noise(y, g, kernel.amplitude / 4.0, baseline=0.0).penalty

            def reference():
                lfilter([1.0], den, y)

            cells = []
            for baseline in (0.0, "fit"):
                result = deconvolve_ar(y, g, penalty=lam, baseline=baseline)  # (compiled code warmed up)
                _, _, ratio = paired(reference, lambda: deconvolve_ar(y, g, penalty=lam, baseline=baseline),
                                     rounds, repeats)
                cells.append(f"{ratio:.1f}x")
                if baseline == 0.0:
                    support = int(np.count_nonzero(result.spikes))
            lines.append(f"| {indicator}-like | {share:.1%} / {got:.1%} | {support:,} | {cells[0]} | {cells[1]} | "
                         f"{target} |")
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
            t_fast = best_time(lambda: deconvolve_ar(y, g, penalty=lam, baseline=baseline), 21)
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
                        rec = simulate(duration_s, rate, kernel, 0.5, kernel.amplitude / snr,
                                       seed=1000 * seed + int(rate) + snr)
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
    speed(20_000 if args.quick else 100_000, 3 if args.quick else 7, 3 if args.quick else 5, lines)
    spiking_sweep(20_000 if args.quick else 100_000, 3 if args.quick else 7, 3 if args.quick else 5, lines)
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
