"""Benchmark of spike COUNTS against an independent ground truth, with and without session calibration.

Each scenario is a session simulated by ``scripts/truth_sessions.py`` (independent of ``calcium``: fine-grid
calcium ODE, exposure-averaged frames, modulated Poisson firing with bursts, per-ROI spike sizes and kinetics,
bleaching, drift, shot and read noise, optionally a saturating indicator).  The raw fluorescence goes through
``calcium.delta_f_over_f(raw, frame_rate)`` (default 60 s window, 8th percentile), then each ROI's ΔF/F row
through ``calcium.infer_spikes`` under four conditions:

``uncalibrated``  ``infer_spikes(row, frame_rate)``: kinetics and spike size estimated per ROI (today's default);
``blind``         ``cal = calcium.calibrate_session(dff, frame_rate)``, then ``kernel=cal.kernel(i)``;
``paired``        ``calibrate_session(dff, frame_rate, electrical_spikes={0: t0, 1: t1, 2: t2})``, the true spikes
                  of ROIs 0-2 as an electrode would stamp them (clock ``ELECTRICAL_CLOCK_OFFSET_S`` ahead of the
                  imaging clock); only the other ROIs are scored;
``truth``         ``kernel=calcium.Kernel(rise_s, decay_s, spike_size)`` with the ROI's true values (the linear
                  kernel, also for the saturating scenario).

Scoring: count ratio = inferred / true spikes per ROI; its median and IQR over ROIs; the share of ROIs with a
ratio in [0.67, 1.5]; the median F1 of ``calcium.score_spikes`` (optimal one-to-one matching, tolerance
``TOLERANCE_S`` = 0.1 s, which the function has no default for); for blind/paired the ROIs the calibration
marks ``calibrated[i] == False`` and the ROIs outside [0.67, 1.5] it did NOT mark.

Targets (calibrated conditions, blind and paired): at SNR >= 3 the median ratio in [0.85, 1.15] ([0.75, 1.33]
for the saturating indicator) and >= 90 % of ROIs in [0.67, 1.5]; blind median F1 >= truth - 0.05, paired
median F1 (unpaired ROIs) >= truth - 0.02 on the same ROIs; at SNR 2 every ROI outside [0.67, 1.5] flagged.
The uncalibrated and truth rows are checked against the count targets for information only.

Run:  python scripts/bench_calibration.py [--conditions uncalibrated blind paired truth] [--scenarios quick|NAME ...]
                                         [--rois 12] [--duration-s 300] [--json PATH]
"""
from __future__ import annotations

import argparse
import json
import platform
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

import calcium
from truth_sessions import make_session


@dataclass(frozen=True)
class Scenario:
    name: str
    frame_rate: float
    rise_s: float
    decay_s: float
    snr: float
    mean_rate_hz: float = 0.5
    saturating: bool = False
    seed: int = 0


# One list, read top to bottom.  "fast" = GCaMP6f-like, "slow" = GCaMP6s-like kinetics (time constants).
SCENARIOS = [
    #        name              Hz    rise   decay  SNR  rate  saturating  seed
    Scenario("fast30-snr2",    30.0, 0.03,  0.25,  2.0, seed=101),
    Scenario("fast30-snr3",    30.0, 0.03,  0.25,  3.0, seed=102),
    Scenario("fast30-snr6",    30.0, 0.03,  0.25,  6.0, seed=103),
    Scenario("fast30-snr8",    30.0, 0.03,  0.25,  8.0, seed=104),
    Scenario("fast15-snr4",    15.0, 0.03,  0.25,  4.0, seed=105),
    Scenario("mid60-snr4",     60.0, 0.05,  0.4,   4.0, seed=106),
    Scenario("slow60-snr3",    60.0, 0.10,  0.6,   3.0, seed=107),
    Scenario("slow60-snr6",    60.0, 0.10,  0.6,   6.0, seed=108),
    Scenario("slow15-snr2",    15.0, 0.12,  1.5,   2.0, seed=109),
    Scenario("slow15-snr3",    15.0, 0.12,  1.5,   3.0, seed=110),
    Scenario("slow15-snr6",    15.0, 0.12,  1.5,   6.0, seed=111),
    Scenario("mid30-snr4",     30.0, 0.06,  0.8,   4.0, seed=112),
    Scenario("busy30-snr5",    30.0, 0.05,  0.5,   5.0, mean_rate_hz=3.0, seed=113),
    Scenario("saturating30-snr5", 30.0, 0.05, 0.6, 5.0, saturating=True, seed=114),
]
QUICK = ["fast30-snr3", "slow15-snr6", "saturating30-snr5"]

TOLERANCE_S = 0.1
RATIO_BAND = (0.67, 1.5)
PAIRED_ROIS = (0, 1, 2)
ELECTRICAL_CLOCK_OFFSET_S = 0.004  # the electrode's clock reads 4 ms later than the imaging clock
MEDIAN_TARGET = (0.85, 1.15)
MEDIAN_TARGET_SATURATING = (0.75, 1.33)
WITHIN_TARGET = 0.90
F1_MARGIN = {"blind": 0.05, "paired": 0.02}
CALIBRATED_CONDITIONS = ("blind", "paired")


class CalibrationUnavailable(Exception):
    """A condition that cannot run on this session (e.g. too few ROIs to pair some)."""


# ------------------------------------------------------------------------------------------ conditions
# Each condition maps (session, dff) to (scored ROIs, {roi: SpikeInference}, flags or None), where flags
# is {roi: calibrated?} for the scored ROIs.
def _infer_all(session, dff, rois, kernel_of=None):
    fr = session.frame_rate
    return {i: calcium.infer_spikes(dff[i], fr) if kernel_of is None else
            calcium.infer_spikes(dff[i], fr, kernel=kernel_of(i)) for i in rois}


def run_uncalibrated(session, dff):
    rois = range(session.n_rois)
    return list(rois), _infer_all(session, dff, rois), None


def _session_counts(session, dff, rois, **kwargs):
    """calcium.infer_session (what `calcium infer` and `calcium run` count with): its spikes and its flags,
    which also cover implausible counts and cells that rarely rest."""
    out = calcium.infer_session(dff, session.frame_rate, **kwargs)
    return rois, {i: out.results[i] for i in rois}, {i: bool(out.calibrated[i]) for i in rois}


def run_blind(session, dff):
    return _session_counts(session, dff, list(range(session.n_rois)))


def run_paired(session, dff):
    if session.n_rois <= len(PAIRED_ROIS):
        raise CalibrationUnavailable(f"needs more than {len(PAIRED_ROIS)} ROIs")
    electrical = session.electrical_spikes(PAIRED_ROIS, clock_offset_s=ELECTRICAL_CLOCK_OFFSET_S)
    rois = [i for i in range(session.n_rois) if i not in PAIRED_ROIS]
    return _session_counts(session, dff, rois, electrical_spikes=electrical)


def run_truth(session, dff):
    rois = list(range(session.n_rois))

    def kernel_of(i):
        return calcium.Kernel(float(session.rise_s[i]), float(session.decay_s[i]), float(session.spike_size[i]))

    return rois, _infer_all(session, dff, rois, kernel_of), None


CONDITIONS = {"uncalibrated": run_uncalibrated, "blind": run_blind, "paired": run_paired, "truth": run_truth}


# ---------------------------------------------------------------------------------------------- scoring
def score_condition(session, rois, results, flags) -> dict:
    true_counts = np.array([session.spike_times[i].size for i in rois])
    inferred = np.array([results[i].n_spikes for i in rois])
    ratios = inferred / np.maximum(true_counts, 1)
    f1 = np.array([calcium.score_spikes(results[i].spike_times, session.spike_times[i], tolerance_s=TOLERANCE_S,
                                        duration_s=session.duration_s).f1 for i in rois])
    inside = (ratios >= RATIO_BAND[0]) & (ratios <= RATIO_BAND[1])
    row = {
        "rois": [int(i) for i in rois],
        "true_counts": true_counts.tolist(),
        "inferred_counts": inferred.tolist(),
        "ratios": ratios.tolist(),
        "f1": f1.tolist(),
        "median_ratio": float(np.median(ratios)),
        "iqr_ratio": float(np.subtract(*np.percentile(ratios, [75, 25]))),
        "share_within": float(inside.mean()),
        "median_f1": float(np.median(f1)),
        "not_calibrated": None,
        "outside_unflagged": None,
    }
    if flags is not None:
        flagged = np.array([not flags[i] for i in rois])
        row["calibrated"] = [bool(flags[i]) for i in rois]
        row["not_calibrated"] = int(flagged.sum())
        row["outside_unflagged"] = int((~inside & ~flagged).sum())
    return row


def run_scenario(scenario: Scenario, conditions, n_rois: int, duration_s: float) -> dict:
    start = time.perf_counter()
    session = make_session(n_rois=n_rois, frame_rate=scenario.frame_rate, duration_s=duration_s,
                           rise_s=scenario.rise_s, decay_s=scenario.decay_s, snr=scenario.snr,
                           mean_rate_hz=scenario.mean_rate_hz, saturating=scenario.saturating, seed=scenario.seed)
    dff = calcium.delta_f_over_f(session.raw, session.frame_rate).dff
    out = {"scenario": scenario.__dict__, "description": session.description, "conditions": {}}
    for name in conditions:
        try:
            rois, results, flags = CONDITIONS[name](session, dff)
        except CalibrationUnavailable as missing:
            out["conditions"][name] = {"unavailable": str(missing)}
            continue
        out["conditions"][name] = score_condition(session, rois, results, flags)
    out["seconds"] = time.perf_counter() - start
    return out


# --------------------------------------------------------------------------------------------- targets
def check_targets(result: dict) -> list[tuple[str, str, str]]:
    """(condition, check, PASS/FAIL/n/a + detail) for one scenario."""
    scenario = result["scenario"]
    rows = result["conditions"]
    checks = []
    band = MEDIAN_TARGET_SATURATING if scenario["saturating"] else MEDIAN_TARGET

    def verdict(ok):
        return "PASS" if ok else "FAIL"

    for name, row in rows.items():
        target = name in CALIBRATED_CONDITIONS
        tag = "" if target else " (information)"
        if "unavailable" in row:
            checks.append((name, "all", f"n/a: {row['unavailable']}"))
            continue
        if scenario["snr"] >= 3:
            m = row["median_ratio"]
            checks.append((name, f"median ratio in [{band[0]:g}, {band[1]:g}]{tag}",
                           f"{verdict(band[0] <= m <= band[1])} ({m:.2f})"))
            w = row["share_within"]
            checks.append((name, f">= {WITHIN_TARGET:.0%} of ROIs in [{RATIO_BAND[0]:g}, {RATIO_BAND[1]:g}]{tag}",
                           f"{verdict(w >= WITHIN_TARGET)} ({w:.0%})"))
            if target:
                truth = rows.get("truth")
                if truth is None or "unavailable" in truth:
                    checks.append((name, "F1 against truth", "n/a: run the truth condition too"))
                else:
                    same = [f for roi, f in zip(truth["rois"], truth["f1"]) if roi in row["rois"]]
                    reference = float(np.median(same))
                    margin = F1_MARGIN[name]
                    checks.append((name, f"median F1 >= truth - {margin:g}",
                                   f"{verdict(row['median_f1'] >= reference - margin)} "
                                   f"({row['median_f1']:.3f} vs {reference:.3f})"))
        elif target:
            n = row["outside_unflagged"]
            checks.append((name, "every ROI outside the band flagged",
                           f"{verdict(n == 0)} ({n} not flagged)"))
    return checks


# ---------------------------------------------------------------------------------------------- output
def print_table(results: list[dict], conditions) -> None:
    header = (f"{'scenario':20s} {'condition':13s} {'ROIs':>4s} {'med ratio':>9s} {'IQR':>6s} "
              f"{'in band':>7s} {'med F1':>6s} {'not cal.':>8s} {'out, unflagged':>14s}")
    print(header)
    print("-" * len(header))
    for result in results:
        for name in conditions:
            row = result["conditions"][name]
            if "unavailable" in row:
                print(f"{result['scenario']['name']:20s} {name:13s} {row['unavailable']}")
                continue

            def maybe(value):
                return "-" if value is None else str(value)

            print(f"{result['scenario']['name']:20s} {name:13s} {len(row['rois']):4d} {row['median_ratio']:9.2f} "
                  f"{row['iqr_ratio']:6.2f} {row['share_within']:7.0%} {row['median_f1']:6.3f} "
                  f"{maybe(row['not_calibrated']):>8s} {maybe(row['outside_unflagged']):>14s}")


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--conditions", nargs="+", choices=list(CONDITIONS), default=list(CONDITIONS),
                        help="conditions to run (default: all)")
    parser.add_argument("--scenarios", nargs="+", default=["all"],
                        help="scenario names, 'quick' (%s) or 'all' (default)" % ", ".join(QUICK))
    parser.add_argument("--rois", type=int, default=12, help="ROIs per session (default 12)")
    parser.add_argument("--duration-s", type=float, default=300.0, help="session length in seconds (default 300)")
    parser.add_argument("--json", type=Path, help="write the table (per-ROI values included) to this JSON file")
    args = parser.parse_args(argv)
    by_name = {s.name: s for s in SCENARIOS}
    names = []
    for item in args.scenarios:
        if item == "all":
            names += list(by_name)
        elif item == "quick":
            names += QUICK
        elif item in by_name:
            names.append(item)
        else:
            parser.error(f"--scenarios: unknown scenario {item!r}; choose from quick, all, {', '.join(by_name)}")
    names = list(dict.fromkeys(names))
    conditions = list(dict.fromkeys(args.conditions))
    if any(c in CALIBRATED_CONDITIONS for c in conditions) and "truth" not in conditions:
        print("note: the F1 targets of blind/paired compare with the truth condition; add 'truth' to check them")

    print(f"Calibration benchmark: {args.rois} ROIs x {args.duration_s:g} s per scenario, conditions "
          f"{', '.join(conditions)}; matching tolerance {TOLERANCE_S:g} s; Python {platform.python_version()}, "
          f"calcium {calcium.__version__}")
    results = []
    total = time.perf_counter()
    for name in names:
        result = run_scenario(by_name[name], conditions, args.rois, args.duration_s)
        results.append(result)
        print(f"  {name}: {result['seconds']:.1f} s  [{result['description']}]", flush=True)
    print()
    print_table(results, conditions)
    print()
    print("Targets (blind and paired; uncalibrated and truth checked for information): at SNR >= 3 median ratio "
          f"in [{MEDIAN_TARGET[0]:g}, {MEDIAN_TARGET[1]:g}] (saturating [{MEDIAN_TARGET_SATURATING[0]:g}, "
          f"{MEDIAN_TARGET_SATURATING[1]:g}]), >= {WITHIN_TARGET:.0%} of ROIs in [{RATIO_BAND[0]:g}, "
          f"{RATIO_BAND[1]:g}], blind F1 >= truth - {F1_MARGIN['blind']:g}, paired F1 >= truth - "
          f"{F1_MARGIN['paired']:g} (unpaired ROIs); at SNR 2 every ROI outside the band flagged.")
    for result in results:
        checks = check_targets(result)
        result["checks"] = [{"condition": c, "check": k, "verdict": v} for c, k, v in checks]
        calibrated = [v for c, _, v in checks if c in CALIBRATED_CONDITIONS]
        if not calibrated or all(v.startswith("n/a") for v in calibrated):
            overall = "n/a (no calibrated condition run)"
        else:
            overall = "FAIL" if any(v.startswith("FAIL") for v in calibrated) else "PASS"
        result["verdict"] = overall
        print(f"{result['scenario']['name']}: {overall}")
        for condition, check, verdict in checks:
            print(f"    {condition:13s} {check:48s} {verdict}")
    print(f"\ntotal {time.perf_counter() - total:.1f} s")
    if args.json:
        payload = {"tolerance_s": TOLERANCE_S, "ratio_band": RATIO_BAND, "paired_rois": PAIRED_ROIS,
                   "electrical_clock_offset_s": ELECTRICAL_CLOCK_OFFSET_S, "rois": args.rois,
                   "duration_s": args.duration_s, "results": results}
        args.json.write_text(json.dumps(payload, indent=1))
        print(f"wrote {args.json}")


if __name__ == "__main__":
    main()
