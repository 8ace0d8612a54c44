"""Where the ΔF/F defaults come from: the running-percentile baseline measured on the independent generator.

For each window length and percentile, on sessions of scripts/truth_sessions.py (its own code: bleaching 10-30 %
per 300 s, slow drift, bursts, modulated rates, shot noise; sparse cells at 0.5 Hz and busy cells at 3 Hz), this
prints the error of F0 against the generator's true baseline (median over ROIs of the median |F0 / F0_true - 1|)
and the median count ratio (inferred / true spikes, calcium.infer_session with its blind calibration). The
defaults of calcium.delta_f_over_f (window_s, percentile) are the pair with the smallest F0 error among those
whose count ratios are best in both kinds of cells; the figures of the latest run are in docs/benchmarks.md.

Usage: python scripts/bench_baseline_defaults.py [--rois 8] [--duration-s 300]
"""
from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))

import calcium  # noqa: E402
from truth_sessions import make_session  # noqa: E402

WINDOWS_S = (20.0, 30.0, 60.0, 120.0)
PERCENTILES = (5.0, 8.0, 10.0, 20.0)
CELLS = (("sparse 0.5 Hz", dict(mean_rate_hz=0.5, rise_s=0.06, decay_s=0.8, snr=5.0, seed=31)),
         ("busy 3 Hz", dict(mean_rate_hz=3.0, rise_s=0.05, decay_s=0.5, snr=5.0, seed=32)))


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rois", type=int, default=8)
    parser.add_argument("--duration-s", type=float, default=300.0)
    args = parser.parse_args()
    sessions = [(name, make_session(n_rois=args.rois, frame_rate=30.0, duration_s=args.duration_s, **kw))
                for name, kw in CELLS]
    print(f"{args.rois} ROIs x {args.duration_s:g} s at 30 Hz per kind of cell; F0 error = median over ROIs of "
          f"median |F0 / F0_true - 1|; count = median inferred / true spikes")
    print(f"{'window_s':>8} {'pct':>5} " + " ".join(f"{name + ' F0 err':>20} {name + ' count':>19}"
                                                     for name, _ in sessions))
    for window in WINDOWS_S:
        for pct in PERCENTILES:
            cells = []
            for _, s in sessions:
                d = calcium.delta_f_over_f(s.raw, s.frame_rate, window_s=window, percentile=pct)
                err = np.median(np.median(np.abs(d.f0 / s.f0 - 1.0), axis=1))
                out = calcium.infer_session(d.dff, s.frame_rate)
                ratio = np.median([r.n_spikes / t.size for r, t in zip(out.results, s.spike_times)])
                cells.append(f"{err:>20.3f} {ratio:>19.2f}")
            print(f"{window:>8g} {pct:>5g} " + " ".join(cells), flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
