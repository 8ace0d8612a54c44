"""Benchmark of the search for shared periodic artefacts (calcium.signal.rhythms), on sessions made here.

The sessions come from the small generator below, written for this benchmark and independent of ``calcium``
(it uses numpy and scipy.signal.lfilter only): Poisson spike trains (a quarter of the events bursts of 2-4
spikes within 60 ms), each spike adding a rise-and-decay response (1 - exp(-t/rise)) exp(-t/decay) evaluated at
the exact spike time, each ROI with its own rise, decay, single-spike size and noise; the fluorescence bleaches
(a third of the light lost with a time constant of 200-600 s) and carries Gaussian noise. A shared rhythm is
added to the fluorescence of a share of the ROIs (half to all of them) as F0 * bleach * a_i * sin(phase(t + s_i)):
a_i = amplitude x the ROI's ΔF/F noise s.d. x a gain of 0.7-1.3, s_i the ROI's time within the frame scan (so a
rhythm faster than the frame rate reaches each ROI with its own phase), the frequency fixed or drifting slowly
(by 0.05-0.3 Hz either way over a 100-300 s cycle), physical frequencies from 0.7 Hz to 0.45 x the frame rate and, for the aliased
cases, from 1.05 to 2.4 x the frame rate. Clean sessions are the same without the rhythm.

Measured in one run, with ``calcium.delta_f_over_f`` (defaults) and ``calcium.signal.rhythms.find_rhythms``
(defaults):

* detection: share of sessions with a rhythm of amplitude >= 1 noise s.d. in which a rhythm is found within two
  frequency bins of the rhythm's apparent frequency (its alias; for a drifting rhythm, within its range);
  also reported for amplitudes 0.5-1;                                                            target >= 95 %
* false detections: share of clean sessions in which any rhythm is found;                      target <= 5 %
* inference: false-positive rate (inferred spikes not matched to a true spike within 0.1 s, per ROI per minute,
  ``calcium.score_spikes``) of ``calcium.infer_spikes`` with the ROI's true kernel, after removal of the found
  rhythms (``remove_rhythms``, regression, the pipeline's method; noise s.d. from
  ``estimate_noise(exclude_hz=...)``), relative to the clean twin session's (same cells, spikes and noise);
  notch and band-stop, and the rhythm left in, for information;                                  target within 10 %
* speed: ``find_rhythms`` on 2000 ROIs x 36,000 frames against one ``scipy.signal.welch`` pass over the same
  array (same segment length, and scipy's default of 256 frames for information);                target < 3x

Run:  python scripts/bench_rhythms.py [--sessions 60] [--rois 60] [--duration-s 600] [--skip-speed] [--json PATH]
"""
from __future__ import annotations

import argparse
import json
import platform
import time
from dataclasses import dataclass

import numpy as np
import scipy.signal

# --------------------------------------------------------------------------- the session generator


@dataclass
class Session:
    raw: np.ndarray              # (rois, frames) fluorescence
    frame_rate: float
    spikes: list                 # spike times (s) per ROI
    rise_s: np.ndarray
    decay_s: np.ndarray
    spike_size: np.ndarray       # peak ΔF/F of one spike
    noise_dff: np.ndarray        # ΔF/F noise s.d. at the start
    rhythm_hz: tuple | None      # (lowest, highest) apparent frequency of the injected rhythm, or None
    rhythm: dict | None          # what was injected


def _spike_train(rng, rate_hz: float, duration_s: float) -> np.ndarray:
    """Poisson events; a quarter of them bursts of 2-4 spikes 10-30 ms apart."""
    events = np.sort(rng.uniform(0.0, duration_s, rng.poisson(rate_hz * duration_s)))
    times = [events]
    bursts = events[rng.random(events.size) < 0.25]
    for extra in range(1, 4):
        keep = bursts[rng.random(bursts.size) < (1.0 if extra == 1 else 0.5)]
        times.append(keep + extra * rng.uniform(0.01, 0.03, keep.size))
    spikes = np.sort(np.concatenate(times))
    return spikes[spikes < duration_s]


def _decaying_sum(spikes: np.ndarray, tau_s: float, frame_rate: float, n_frames: int) -> np.ndarray:
    """sum over spikes of exp(-(t_k - t_s) / tau) for frames at or after each spike, exact in the spike time."""
    first = np.ceil(spikes * frame_rate).astype(np.int64)
    keep = first < n_frames
    drive = np.zeros(n_frames)
    np.add.at(drive, first[keep], np.exp(-(first[keep] / frame_rate - spikes[keep]) / tau_s))
    return scipy.signal.lfilter([1.0], [1.0, -np.exp(-1.0 / (frame_rate * tau_s))], drive)


def _response_peak(rise_s: float, decay_s: float) -> float:
    """Peak of (1 - exp(-t/rise)) exp(-t/decay)."""
    t = rise_s * np.log(1.0 + decay_s / rise_s)
    return (1.0 - np.exp(-t / rise_s)) * np.exp(-t / decay_s)


def _phase(t: np.ndarray, freq_hz: float, drift_hz: float, drift_period_s: float, start: float) -> np.ndarray:
    """2 pi times the integral of f(t) = f0 + drift_hz sin(2 pi t / period), plus a start phase."""
    wobble = drift_hz * drift_period_s / (2 * np.pi) * (1.0 - np.cos(2 * np.pi * t / drift_period_s))
    return 2 * np.pi * (freq_hz * t + wobble) + start


def make_session(rng, *, n_rois: int, duration_s: float, frame_rate: float, amplitude: float = 0.0,
                 freq_hz: float = 0.0, drift_hz: float = 0.0, share: float = 1.0, rhythm_rng=None) -> Session:
    """One session; ``amplitude`` > 0 adds a shared rhythm (amplitude in units of each ROI's ΔF/F noise s.d.).

    The rhythm's own random numbers (which ROIs carry it, their gains and scan times) come from ``rhythm_rng``
    (default: a generator seeded from ``rng``'s first draw), so that the same ``rng`` seed gives the same cells,
    spikes and noise with or without the rhythm: a clean twin of every session.
    """
    n = int(round(duration_s * frame_rate))
    t = np.arange(n) / frame_rate
    if rhythm_rng is None:
        rhythm_rng = np.random.default_rng(int(rng.integers(2 ** 63)))
    rise = rng.uniform(0.04, 0.12, n_rois)
    decay = rng.uniform(0.5, 1.4, n_rois)
    size = rng.uniform(0.15, 0.5, n_rois)
    noise = rng.uniform(0.05, 0.15, n_rois)
    base = rng.uniform(100.0, 500.0, n_rois)
    bleach_tau = rng.uniform(200.0, 600.0, n_rois)
    spikes, raw = [], np.empty((n_rois, n))
    affected = rhythm_rng.random(n_rois) < share
    affected[rhythm_rng.integers(n_rois)] = True
    scan = rhythm_rng.uniform(0.0, 1.0 / frame_rate, n_rois)        # each ROI's time within the frame scan
    gain = rhythm_rng.uniform(0.7, 1.3, n_rois)
    rhythm = None
    if amplitude > 0:
        rhythm = {"freq_hz": freq_hz, "drift_hz": drift_hz, "drift_period_s": rhythm_rng.uniform(100.0, 300.0),
                  "amplitude": amplitude, "share": float(affected.mean()), "start": rhythm_rng.uniform(0, 2 * np.pi)}
    for i in range(n_rois):
        train = _spike_train(rng, rng.uniform(0.1, 0.8), duration_s)
        spikes.append(train)
        peak = _response_peak(rise[i], decay[i])
        calcium = size[i] / peak * (_decaying_sum(train, decay[i], frame_rate, n)
                                    - _decaying_sum(train, 1.0 / (1.0 / rise[i] + 1.0 / decay[i]), frame_rate, n))
        bleach = 2.0 / 3.0 + np.exp(-t / bleach_tau[i]) / 3.0
        dff = calcium + rng.normal(0.0, noise[i], n)
        if rhythm is not None and affected[i]:
            dff = dff + amplitude * noise[i] * gain[i] * np.sin(
                _phase(t + scan[i], freq_hz, drift_hz, rhythm["drift_period_s"], rhythm["start"]))
        raw[i] = base[i] * bleach * (1.0 + dff)
    band = None
    if rhythm is not None:
        grid = np.linspace(freq_hz - drift_hz, freq_hz + drift_hz, 201)
        aliases = np.abs(grid - frame_rate * np.round(grid / frame_rate))
        band = (float(aliases.min()), float(aliases.max()))
    return Session(raw=raw, frame_rate=frame_rate, spikes=spikes, rise_s=rise, decay_s=decay, spike_size=size,
                   noise_dff=noise, rhythm_hz=band, rhythm=rhythm)


def random_rhythm(rng, frame_rate: float, *, aliased: bool) -> tuple[float, float]:
    """(physical frequency, drift) of a rhythm whose apparent frequency lies in [0.7 Hz, 0.45 x frame rate]:
    below the Nyquist frequency from 0.7 Hz, or aliased from 1.05-2.4 x the frame rate; drifting half the time
    by 0.05-0.3 Hz."""
    while True:
        freq = rng.uniform(1.05, 2.4) * frame_rate if aliased else rng.uniform(0.7, 0.45 * frame_rate)
        drift = rng.uniform(0.05, 0.3) if rng.random() < 0.5 else 0.0
        low, high = freq - drift, freq + drift
        apparent = np.abs(np.array([low, freq, high]) - frame_rate * np.round(np.array([low, freq, high]) / frame_rate))
        if apparent.min() >= 0.7 and apparent.max() <= 0.45 * frame_rate and (
                not aliased or np.round(low / frame_rate) == np.round(high / frame_rate)):
            return freq, drift


# --------------------------------------------------------------------------- the measurements
#: Removal methods compared; the first is the one held to the target (the pipeline's default).
METHODS = ("regression", "notch", "bandstop")

def _dff(session: Session) -> np.ndarray:
    import calcium

    return calcium.delta_f_over_f(session.raw, session.frame_rate).dff


def _found_at(found, band: tuple, resolution_hz: float) -> bool:
    low, high = band
    return any(low - 2 * resolution_hz <= r.frequency_hz <= high + 2 * resolution_hz for r in found.rhythms)


def detection(args, rng) -> dict:
    """Detection rate per amplitude and false detections on clean sessions."""
    from calcium.signal.rhythms import find_rhythms

    amplitudes = (0.5, 0.75, 1.0, 1.5, 2.0, 2.5)
    rows = {}
    misses = []
    for amplitude in amplitudes:
        hits = 0
        for k in range(args.sessions):
            frame_rate = (15.0, 30.0)[k % 2]
            freq, drift = random_rhythm(rng, frame_rate, aliased=k % 5 in (1, 3))
            session = make_session(rng, n_rois=args.rois, duration_s=args.duration_s, frame_rate=frame_rate,
                                   amplitude=amplitude, freq_hz=freq, drift_hz=drift, share=rng.uniform(0.5, 1.0))
            found = find_rhythms(_dff(session), frame_rate, segment_s=args.segment_s)
            hit = _found_at(found, session.rhythm_hz, found.spectra.resolution_hz)
            hits += hit
            if not hit and amplitude >= 1.0:
                misses.append({"amplitude": amplitude, "frame_rate": frame_rate, "freq_hz": round(freq, 3),
                               "drift_hz": round(drift, 3), "apparent_hz": session.rhythm_hz,
                               "found_hz": [round(r.frequency_hz, 3) for r in found.rhythms]})
        rows[amplitude] = hits / args.sessions
        print(f"  amplitude {amplitude:4.2f} noise s.d.: detected in {hits:3d} of {args.sessions} sessions "
              f"({100 * hits / args.sessions:.0f} %)", flush=True)
    false = 0
    for k in range(args.clean_sessions):
        frame_rate = (15.0, 30.0)[k % 2]
        session = make_session(rng, n_rois=args.rois, duration_s=args.duration_s, frame_rate=frame_rate)
        found = find_rhythms(_dff(session), frame_rate, segment_s=args.segment_s)
        false += bool(found.rhythms)
    print(f"  clean sessions: a rhythm found in {false} of {args.clean_sessions} "
          f"({100 * false / args.clean_sessions:.1f} %)", flush=True)
    strong = [rows[a] for a in amplitudes if a >= 1.0]
    return {"by_amplitude": rows, "rate_at_least_1": float(np.mean(strong)),
            "false_detection_rate": false / args.clean_sessions, "misses": misses}


def _false_positives(dff: np.ndarray, session: Session, exclude) -> tuple[int, float]:
    """Inferred spikes not matched to a true spike (tolerance 0.1 s), and ROI-minutes, over the session."""
    import calcium
    from calcium.signal import estimate_noise

    frame_rate = session.frame_rate
    unmatched = 0
    for i in range(dff.shape[0]):
        kernel = calcium.Kernel(session.rise_s[i] * session.decay_s[i] / (session.rise_s[i] + session.decay_s[i]),
                                session.decay_s[i], session.spike_size[i])
        noise = estimate_noise(dff[i], frame_rate, exclude_hz=exclude or None)
        result = calcium.infer_spikes(dff[i], frame_rate, kernel=kernel, noise_sd=noise)
        score = calcium.score_spikes(result.spike_times, session.spikes[i], tolerance_s=0.1,
                                     duration_s=dff.shape[1] / frame_rate)
        unmatched += score.n_inferred - score.n_matched
    return unmatched, dff.shape[0] * dff.shape[1] / frame_rate / 60.0


def inference(args, seed: int) -> dict:
    """False positives of the inference: clean twin, with the rhythm, and after its removal by each method."""
    from calcium.signal.rhythms import find_rhythms, remove_rhythms

    conditions = ("clean", "with rhythm", *(f"after {m}" for m in METHODS))
    totals = dict.fromkeys(conditions, 0)
    minutes = 0.0
    found_any = 0
    for k in range(args.fp_sessions):
        frame_rate = (15.0, 30.0)[k % 2]
        picker = np.random.default_rng([seed, k, 1])
        freq, drift = random_rhythm(picker, frame_rate, aliased=k % 3 == 1)
        amplitude = picker.uniform(1.0, 2.5)
        twins = {}
        for name, a in (("clean", 0.0), ("with rhythm", amplitude)):
            twins[name] = make_session(np.random.default_rng([seed, k, 2]), n_rois=args.fp_rois,
                                       duration_s=args.fp_duration_s, frame_rate=frame_rate, amplitude=a,
                                       freq_hz=freq, drift_hz=drift, share=1.0,
                                       rhythm_rng=np.random.default_rng([seed, k, 3]))
        clean, rhythmic = _dff(twins["clean"]), _dff(twins["with rhythm"])
        found = find_rhythms(rhythmic, frame_rate)
        found_any += bool(found.rhythms)
        traces = {"clean": (clean, []), "with rhythm": (rhythmic, found.bands_hz)}
        for method in METHODS:
            cleaned = remove_rhythms(rhythmic, frame_rate, found, method=method).cleaned if found.rhythms else rhythmic
            traces[f"after {method}"] = (cleaned, found.bands_hz)
        counts = {}
        for name, (values, exclude) in traces.items():
            counts[name], roi_minutes = _false_positives(values, twins["clean"], exclude)
            totals[name] += counts[name]
        minutes += roi_minutes
        print(f"  {k + 1:2d}/{args.fp_sessions}: {frame_rate:g} Hz, rhythm {freq:6.2f} Hz (drift {drift:.2f} Hz), "
              f"amplitude {amplitude:.2f}; found at {[round(r.frequency_hz, 2) for r in found.rhythms]} Hz; false "
              f"positives " + ", ".join(f"{name} {count}" for name, count in counts.items()), flush=True)
    rates = {name: count / minutes for name, count in totals.items()}
    print("  false positives per ROI-minute: " + ", ".join(f"{k} {v:.3f}" for k, v in rates.items()))
    return {"per_roi_minute": rates, "roi_minutes": minutes, "sessions_with_a_find": found_any,
            "over_clean": {name: rate / rates["clean"] for name, rate in rates.items()}}


def speed(args) -> dict:
    """find_rhythms on 2000 ROIs x 36,000 frames against one scipy.signal.welch pass over the same array."""
    import gc

    from calcium.signal.rhythms import SEGMENT_S, find_rhythms

    rng = np.random.default_rng(args.seed + 99)
    frame_rate, n_frames, n_rois = 30.0, 36_000, args.speed_rois
    freq, drift = 50.0, 0.0
    session = make_session(rng, n_rois=n_rois, duration_s=n_frames / frame_rate, frame_rate=frame_rate,
                           amplitude=1.0, freq_hz=freq, drift_hz=drift, share=0.7)
    dff = _dff(session)
    del session
    gc.collect()
    nperseg = int(round(SEGMENT_S * frame_rate))
    times = {"welch (same segments)": [], "welch (256-frame segments)": [], "find_rhythms": []}
    for _ in range(args.repeat):
        for name in times:
            start = time.perf_counter()
            if name == "find_rhythms":
                found = find_rhythms(dff, frame_rate)
            elif name.startswith("welch (same"):
                scipy.signal.welch(dff, frame_rate, nperseg=nperseg, axis=-1)
            else:
                scipy.signal.welch(dff, frame_rate, axis=-1)
            times[name].append(time.perf_counter() - start)
            gc.collect()
    best = {name: min(values) for name, values in times.items()}
    ratio = best["find_rhythms"] / best["welch (same segments)"]
    print(f"  {n_rois} ROIs x {n_frames} frames: welch {best['welch (same segments)']:.2f} s "
          f"({nperseg}-frame segments), {best['welch (256-frame segments)']:.2f} s (256), find_rhythms "
          f"{best['find_rhythms']:.2f} s: {ratio:.2f}x the same-segment welch, "
          f"{best['find_rhythms'] / best['welch (256-frame segments)']:.2f}x the 256-frame one "
          f"(found {[round(r.frequency_hz, 2) for r in found.rhythms]})")
    return {"seconds": best, "ratio": ratio,
            "ratio_256": best["find_rhythms"] / best["welch (256-frame segments)"]}


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--sessions", type=int, default=40, help="sessions per amplitude (default 40)")
    parser.add_argument("--clean-sessions", type=int, default=200, help="clean sessions (default 200)")
    parser.add_argument("--rois", type=int, default=60, help="ROIs per session (default 60)")
    parser.add_argument("--duration-s", type=float, default=600.0, help="session length (default 600 s)")
    parser.add_argument("--fp-sessions", type=int, default=12, help="twin sessions for the inference (default 12)")
    parser.add_argument("--fp-rois", type=int, default=60, help="ROIs per twin session (default 60)")
    parser.add_argument("--fp-duration-s", type=float, default=300.0, help="twin session length (default 300 s)")
    parser.add_argument("--speed-rois", type=int, default=2000, help="ROIs of the speed test (default 2000)")
    parser.add_argument("--repeat", type=int, default=2, help="timed repeats, best kept (default 2)")
    parser.add_argument("--skip-speed", action="store_true")
    parser.add_argument("--segment-s", type=float, default=10.0,
                        help="Welch segment of the detection part (default 10 s, the library's default)")
    parser.add_argument("--skip-inference", action="store_true")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--json", help="also write the figures to this JSON file")
    args = parser.parse_args(argv)
    print(f"bench_rhythms: Python {platform.python_version()}, numpy {np.__version__}, scipy {scipy.__version__}")
    rng = np.random.default_rng(args.seed)
    print(f"detection ({args.sessions} sessions per amplitude, {args.rois} ROIs x {args.duration_s:g} s at 15 or "
          f"30 Hz, {args.segment_s:g}-s segments):", flush=True)
    results = {"detection": detection(args, rng)}
    if not args.skip_inference:
        print(f"inference ({args.fp_sessions} twin sessions of {args.fp_rois} ROIs x {args.fp_duration_s:g} s):",
              flush=True)
        results["inference"] = inference(args, args.seed)
    if not args.skip_speed:
        print("speed:", flush=True)
        results["speed"] = speed(args)
    det, inf = results["detection"], results.get("inference")
    print("\nsummary against the targets:")
    print(f"  detection at amplitude >= 1 noise s.d.: {100 * det['rate_at_least_1']:.1f} % (target >= 95 %)")
    print(f"  false detections on clean sessions:     {100 * det['false_detection_rate']:.1f} % (target <= 5 %)")
    ratios = inf["over_clean"] if inf else {}
    if inf:
        print(f"  inference false positives after removal / clean: {ratios['after ' + METHODS[0]]:.3f} ({METHODS[0]}; "
              f"target within 10 %); " + ", ".join(f"{name} {ratios[name]:.2f}" for name in ratios
                                                    if name not in ("clean", "after " + METHODS[0])))
    if "speed" in results:
        print(f"  detection time / one scipy.signal.welch pass: {results['speed']['ratio']:.2f}x (target < 3x)")
    if args.json:
        with open(args.json, "w", encoding="utf-8") as handle:
            json.dump(results, handle, indent=2, default=float)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
