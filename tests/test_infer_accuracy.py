"""Accuracy of infer_spikes on simulated recordings (small set; the full sweep is scripts/bench_infer.py).

References used below:
- the forward model (calcium.forward.simulate_recording) for the ground
  truth, with the tabulated indicator kernels;
- one-to-one optimal matching of spikes within +-2 frames with
  scipy.optimize.linear_sum_assignment (Kuhn-Munkres), F1 = 2 matched /
  (n_true + n_inferred) (common practice in spike-inference benchmarks);
- Pearson correlation of spike counts in 0.2 s bins (numpy.corrcoef).
Single-spike SNR = ΔF/F of one spike / noise s.d.
"""
import numpy as np
import pytest
from scipy.optimize import linear_sum_assignment

from calcium.forward import simulate_recording
from calcium.infer import infer_spikes
from calcium.kernel import Kernel

DURATION_S = 120.0


def f1_score(inferred, true, tolerance_s):
    if inferred.size == 0 and true.size == 0:
        return 1.0
    if inferred.size == 0 or true.size == 0:
        return 0.0
    gap = np.abs(inferred[:, None] - true[None, :])
    # pairs beyond the tolerance cost more than leaving both unmatched: maximal matching, then least |dt|
    cost = np.where(gap <= tolerance_s, gap / (10 * tolerance_s), 10.0)
    rows, cols = linear_sum_assignment(cost)
    matched = int(np.count_nonzero(gap[rows, cols] <= tolerance_s))
    return 2.0 * matched / (inferred.size + true.size)


def binned_correlation(inferred, true, duration_s, width_s=0.2):
    edges = np.arange(0.0, duration_s + width_s, width_s)
    a = np.histogram(inferred, edges)[0]
    b = np.histogram(true, edges)[0]
    return float(np.corrcoef(a, b)[0, 1])


def run(indicator, frame_rate, snr, seed, blind=False):
    kernel = Kernel.from_indicator(indicator)
    rec = simulate_recording(1, DURATION_S, frame_rate, indicator=indicator, rate_hz=0.5,
                             noise_sd=kernel.amplitude / snr, seed=seed)
    result = infer_spikes(rec.dff[0], frame_rate, **({} if blind else {"indicator": indicator}))
    truth = rec.spike_times[0]
    return (f1_score(result.spike_times, truth, 2.0 / frame_rate),
            binned_correlation(result.spike_times, truth, DURATION_S))


HIGH_SNR = [("GCaMP6s", 15.0), ("GCaMP6f", 30.0), ("jGCaMP7f", 60.0), ("jGCaMP8m", 30.0)]


@pytest.mark.parametrize("indicator,frame_rate", HIGH_SNR)
@pytest.mark.parametrize("snr", [4, 8])
def test_f1_is_at_least_0_9_at_snr_4_and_above(indicator, frame_rate, snr):
    # reference: forward-model ground truth, optimal matching within 2 frames (module docstring)
    f1, corr = run(indicator, frame_rate, snr, seed=snr * 7 + int(frame_rate))
    assert f1 >= 0.9
    assert corr >= 0.75


def test_mean_f1_is_at_least_0_75_at_snr_2():
    # reference: forward-model ground truth; averaged over indicators and frame rates (15-60 Hz)
    scores = [run(indicator, frame_rate, 2, seed=3 + i)[0]
              for i, (indicator, frame_rate) in enumerate([("GCaMP6s", 30.0), ("GCaMP6f", 60.0),
                                                           ("jGCaMP7f", 15.0), ("jGCaMP8m", 60.0)])]
    assert np.mean(scores) >= 0.75


@pytest.mark.parametrize("indicator,frame_rate", [("GCaMP6s", 30.0), ("GCaMP6f", 30.0)])
def test_blind_inference_reaches_f1_0_9_at_snr_4(indicator, frame_rate):
    # reference: forward-model ground truth; kinetics, noise and spike size all estimated from the trace
    f1, _ = run(indicator, frame_rate, 4, seed=17, blind=True)
    assert f1 >= 0.9
