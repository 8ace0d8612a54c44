"""Score inferred spike times against ground truth.

Numbers only (figures live in :mod:`calcium.report`):

* one-to-one matching of inferred to true spikes within a tolerance, by
  optimal assignment (most matches first, then the smallest total timing
  error), giving precision, recall, F1 and the timing error of matched spikes;
* Pearson correlation of the binned spike counts at several bin widths;
* the van Rossum (2001) distance, computed exactly from the spike times.

:func:`score_spikes` scores one pair of trains, :func:`score_many` scores
many ROIs and pools the counts.
"""
from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field

import numpy as np
from scipy.optimize import linear_sum_assignment

from ._checks import _UNSET, as_spike_times, check_positive, renamed_argument

__all__ = [
    "SpikeScore",
    "ScoreTable",
    "score_spikes",
    "score_many",
    "match_spikes",
    "van_rossum_distance",
    "as_spike_times",
]

DEFAULT_BIN_WIDTHS_S = (0.1, 0.2, 0.5, 1.0)


# ---------------------------------------------------------------------------
# input
# ---------------------------------------------------------------------------
# ---------------------------------------------------------------------------
# matching
# ---------------------------------------------------------------------------
def _blocks(inferred: np.ndarray, true: np.ndarray, tolerance_s: float):
    """Split both (sorted) trains into independent stretches.

    No inferred/true pair within the tolerance straddles a gap longer than the
    tolerance between consecutive events of the merged train, so the matching
    problem separates into one small assignment per stretch.
    """
    merged = np.concatenate([inferred, true])
    order = np.argsort(merged, kind="stable")
    gaps = np.diff(merged[order]) > tolerance_s
    starts = np.concatenate([[0], np.flatnonzero(gaps) + 1])
    ends = np.concatenate([starts[1:], [merged.size]])
    n_inf = inferred.size
    for a, b in zip(starts, ends):
        members = order[a:b]
        inf_idx = np.sort(members[members < n_inf])
        true_idx = np.sort(members[members >= n_inf] - n_inf)
        if inf_idx.size and true_idx.size:
            yield inf_idx, true_idx


def match_spikes(inferred_times, true_times, *, tolerance_s) -> np.ndarray:
    """Optimal one-to-one matching of inferred to true spikes.

    Parameters
    ----------
    inferred_times, true_times : array_like
        Spike times in seconds (sorted here, with a warning if they were not).
    tolerance_s : float
        Largest allowed ``|t_inferred - t_true|`` for a matched pair (inclusive).

    Returns
    -------
    pairs : ndarray of int, shape (n_matched, 2)
        Rows ``(i, j)``: index of the inferred spike and of the true spike in
        the *sorted* trains, ordered by ``j``.

    Notes
    -----
    The matching has the largest possible number of pairs and, among those,
    the smallest total ``|Δt|``. It is solved as a rectangular assignment
    (:func:`scipy.optimize.linear_sum_assignment`) with cost ``|Δt|`` for
    pairs within the tolerance and a cost ``B`` for the others, where
    ``B`` exceeds the largest possible total of admissible costs
    (``min(n, m) * tolerance_s``); every assignment then pays ``B`` once per
    inadmissible pair, so minimising the total first minimises the number of
    inadmissible pairs (= maximises the matching) and then ``Σ|Δt|``. The
    trains are cut into independent stretches first (at gaps longer than the
    tolerance), so memory grows with the largest burst, not the whole train.
    A greedy "closest pair first" rule can lose matches; see the tests.

    References
    ----------
    Kuhn HW (1955) The Hungarian method for the assignment problem.
    Naval Research Logistics Quarterly 2:83-97.

    Examples
    --------
    >>> match_spikes([0.08, 0.24], [0.0, 0.15], tolerance_s=0.1).tolist()
    [[0, 0], [1, 1]]
    """
    tolerance_s = check_positive(tolerance_s, "tolerance_s")
    inferred = as_spike_times(inferred_times, "inferred_times")
    true = as_spike_times(true_times, "true_times")
    return _match_sorted(inferred, true, tolerance_s)


def _match_sorted(inferred: np.ndarray, true: np.ndarray, tolerance_s: float) -> np.ndarray:
    # a hair of slack so that hand-written times such as 0.3 - 0.2 count as within 0.1
    limit = tolerance_s * (1.0 + 1e-9)
    pairs = []
    for inf_idx, true_idx in _blocks(inferred, true, tolerance_s * (1.0 + 1e-9)):
        dt = np.abs(inferred[inf_idx][:, None] - true[true_idx][None, :])
        ok = dt <= limit
        if not ok.any():
            continue
        big = (min(dt.shape) + 1) * tolerance_s * 2.0 + 1.0
        cost = np.where(ok, dt, big)
        rows, cols = linear_sum_assignment(cost)
        keep = ok[rows, cols]
        pairs.append(np.column_stack([inf_idx[rows[keep]], true_idx[cols[keep]]]))
    if not pairs:
        return np.zeros((0, 2), dtype=np.int64)
    out = np.concatenate(pairs).astype(np.int64)
    return out[np.argsort(out[:, 1], kind="stable")]


# ---------------------------------------------------------------------------
# van Rossum distance
# ---------------------------------------------------------------------------
def _sum_exp_within(times: np.ndarray, tau_s: float) -> float:
    """Σ_i Σ_j exp(-|t_i - t_j| / τ) for one sorted train, in O(n)."""
    total = float(times.size)
    running = 0.0  # Σ_{i<j} exp(-(t_j - t_i)/τ) for the current j
    for k in range(1, times.size):
        running = math.exp(-(times[k] - times[k - 1]) / tau_s) * (running + 1.0)
        total += 2.0 * running
    return total


def _sum_exp_across(a: np.ndarray, b: np.ndarray, tau_s: float) -> float:
    """Σ_i Σ_j exp(-|a_i - b_j| / τ) for two sorted trains, in O(n + m)."""
    if a.size == 0 or b.size == 0:
        return 0.0
    times = np.concatenate([a, b])
    label = np.concatenate([np.zeros(a.size, bool), np.ones(b.size, bool)])
    order = np.argsort(times, kind="stable")
    times, label = times[order], label[order]
    # forward pass: for each event, decayed count of earlier events of the other train
    total = 0.0
    run = [0.0, 0.0]  # decayed counts of train a / train b seen so far
    prev = times[0]
    for t, lab in zip(times, label):
        decay = math.exp(-(t - prev) / tau_s)
        run[0] *= decay
        run[1] *= decay
        total += run[0] if lab else run[1]   # pairs (earlier other-train, this)
        run[int(lab)] += 1.0
        prev = t
    return total


def van_rossum_distance(times_a, times_b, *, van_rossum_tau_s=_UNSET, tau_s=_UNSET) -> float:
    """Exact van Rossum distance between two spike trains.

    Parameters
    ----------
    times_a, times_b : array_like
        Spike times in seconds.
    van_rossum_tau_s : float
        Time constant of the causal exponential filter, seconds (the name
        :func:`score_spikes` gives it too).
    tau_s : float
        Former name of ``van_rossum_tau_s``, accepted for one release (with
        a DeprecationWarning).

    Returns
    -------
    float
        ``D`` with ``D² = (1/τ) ∫ (f(t) - g(t))² dt``, where ``f`` and ``g`` are
        the trains filtered with ``H(t) exp(-t/τ)`` (unit peak per spike).

    Notes
    -----
    With this normalisation (the one of van Rossum 2001), the integral has the
    closed form

    ``D² = ½ [Σ_ij e^{-|a_i-a_j|/τ} + Σ_ij e^{-|b_i-b_j|/τ} - 2 Σ_ij e^{-|a_i-b_j|/τ}]``

    because ``∫ H(t-s) H(t-u) e^{-(2t-s-u)/τ} dt = (τ/2) e^{-|s-u|/τ}``.
    One spike with no partner contributes ``D² = 1/2``; two spikes ``δ`` apart
    give ``D² = 1 - e^{-δ/τ}``. Each double sum is evaluated in linear time on
    the sorted trains with a decaying running sum (no ``n × m`` matrix).

    References
    ----------
    van Rossum MCW (2001) A novel spike distance. Neural Computation
    13:751-763.

    Examples
    --------
    >>> round(van_rossum_distance([1.0], [], van_rossum_tau_s=0.1) ** 2, 12)
    0.5
    """
    tau_s = renamed_argument("tau_s", tau_s, "van_rossum_tau_s", van_rossum_tau_s)
    if tau_s is _UNSET:
        raise ValueError("van_rossum_distance needs van_rossum_tau_s, the time constant of its filter (s)")
    tau_s = check_positive(tau_s, "van_rossum_tau_s")
    a = as_spike_times(times_a, "times_a")
    b = as_spike_times(times_b, "times_b")
    return _van_rossum_sorted(a, b, tau_s)


def _van_rossum_sorted(a: np.ndarray, b: np.ndarray, tau_s: float) -> float:
    d2 = 0.5 * (_sum_exp_within(a, tau_s) + _sum_exp_within(b, tau_s)
                - 2.0 * _sum_exp_across(a, b, tau_s))
    return math.sqrt(max(d2, 0.0))


# ---------------------------------------------------------------------------
# binned correlations
# ---------------------------------------------------------------------------
def _binned_correlation(a: np.ndarray, b: np.ndarray, start: float, stop: float,
                        bin_width: float) -> float:
    n_bins = max(math.ceil((stop - start) / bin_width - 1e-9), 1)  # bins cover [start, stop], no empty extra
    edges = start + bin_width * np.arange(n_bins + 1)
    ca = np.histogram(a, bins=edges)[0].astype(float)
    cb = np.histogram(b, bins=edges)[0].astype(float)
    if n_bins < 2 or np.ptp(ca) == 0 or np.ptp(cb) == 0:
        return float("nan")
    return float(np.corrcoef(ca, cb)[0, 1])


# ---------------------------------------------------------------------------
# results
# ---------------------------------------------------------------------------
def _ratio(num: int, den: int, both_empty: bool) -> float:
    if den > 0:
        return num / den
    return 1.0 if both_empty else 0.0


@dataclass(frozen=True)
class SpikeScore:
    """How well one inferred spike train matches the true one.

    Attributes
    ----------
    precision : float
        ``n_matched / n_inferred``: fraction of inferred spikes that are real.
    recall : float
        ``n_matched / n_true``: fraction of true spikes that were found.
    f1 : float
        ``2 n_matched / (n_true + n_inferred)`` (harmonic mean of the two).
        Convention for empty trains: both empty -> precision = recall = F1 =
        1.0 (nothing to find and nothing claimed); one empty -> the undefined
        ratio is 0.0 and F1 = 0.0.
    n_true, n_inferred, n_matched : int
        Spike counts.
    timing_error_mean_s, timing_error_sd_s : float
        Mean and sample s.d. (ddof=1) of ``t_inferred - t_true`` over matched
        pairs (positive = inferred late). NaN with no pair (mean) or fewer
        than two pairs (s.d.).
    correlations : tuple of (bin_width_s, r)
        Pearson correlation of the binned spike counts per bin width (NaN when
        either binned train is constant or there is a single bin).
    van_rossum : float
        Van Rossum distance (see :func:`van_rossum_distance`).
    van_rossum_tau_s : float
        Its time constant.
    matched_pairs : ndarray of int, shape (n_matched, 2)
        ``(inferred index, true index)`` into the sorted trains.
    timing_errors_s : ndarray
        ``t_inferred - t_true`` of each matched pair (same order).
    tolerance_s : float
        Matching tolerance.
    duration_s : float
        End of the binned span (seconds) used for the correlations.
    """

    precision: float
    recall: float
    f1: float
    n_true: int
    n_inferred: int
    n_matched: int
    timing_error_mean_s: float
    timing_error_sd_s: float
    correlations: tuple
    van_rossum: float
    van_rossum_tau_s: float
    matched_pairs: np.ndarray = field(repr=False)
    timing_errors_s: np.ndarray = field(repr=False)
    tolerance_s: float = float("nan")
    duration_s: float = float("nan")

    def correlation(self, bin_width_s: float) -> float:
        """Correlation of the binned counts at one of the scored bin widths."""
        for width, r in self.correlations:
            if math.isclose(width, bin_width_s, rel_tol=1e-9, abs_tol=0.0):
                return r
        widths = ", ".join(f"{w:g}" for w, _ in self.correlations)
        raise ValueError(f"bin_width_s={bin_width_s!r} was not scored; scored widths: {widths}")

    def __str__(self) -> str:
        corr = ", ".join(f"r({w:g} s)={r:.3f}" for w, r in self.correlations)
        return (f"precision {self.precision:.3f}  recall {self.recall:.3f}  F1 {self.f1:.3f}  "
                f"(matched {self.n_matched} of {self.n_true} true, {self.n_inferred} inferred; "
                f"tolerance {self.tolerance_s:g} s)\n"
                f"timing error {self.timing_error_mean_s * 1e3:.1f} ± {self.timing_error_sd_s * 1e3:.1f} ms; "
                f"van Rossum distance {self.van_rossum:.3f} (τ = {self.van_rossum_tau_s:g} s); {corr}")


def _check_bin_widths(bin_widths_s) -> tuple:
    try:
        widths = tuple(float(w) for w in np.atleast_1d(np.asarray(bin_widths_s, dtype=float)))
    except (TypeError, ValueError):
        raise ValueError(f"bin_widths_s must be a sequence of positive numbers, got {bin_widths_s!r}") from None
    if not widths or any(not (np.isfinite(w) and w > 0) for w in widths):
        raise ValueError(f"bin_widths_s must be a non-empty sequence of positive numbers, got {bin_widths_s!r}")
    return widths


def _check_common(tolerance_s, bin_widths_s, duration_s, van_rossum_tau_s):
    tolerance_s = check_positive(tolerance_s, "tolerance_s")
    widths = _check_bin_widths(bin_widths_s)
    if duration_s is not None:
        duration_s = check_positive(duration_s, "duration_s")
    tau = tolerance_s if van_rossum_tau_s is None else check_positive(van_rossum_tau_s, "van_rossum_tau_s")
    return tolerance_s, widths, duration_s, tau


def _score_sorted(inferred, true, tolerance_s, widths, duration_s, tau) -> SpikeScore:
    pairs = _match_sorted(inferred, true, tolerance_s)
    n_inf, n_true, n_match = inferred.size, true.size, pairs.shape[0]
    both_empty = n_inf == 0 and n_true == 0
    errors = inferred[pairs[:, 0]] - true[pairs[:, 1]] if n_match else np.zeros(0)
    mean_err = float(errors.mean()) if n_match else float("nan")
    sd_err = float(errors.std(ddof=1)) if n_match >= 2 else float("nan")

    everything = np.concatenate([inferred, true])
    start = 0.0  # (times are >= 0: checked by the callers)
    if duration_s is None:
        stop = float(everything.max()) if everything.size else 0.0
    else:
        stop = duration_s
        outside = int(np.sum((everything < 0) | (everything > duration_s)))
        if outside:
            warnings.warn(f"{outside} spike time(s) lie outside [0, duration_s={duration_s:g}] s; "
                          "they are left out of the binned correlations", UserWarning, stacklevel=3)
        start = 0.0
    correlations = tuple((w, _binned_correlation(inferred, true, start, stop, w)) for w in widths)

    return SpikeScore(
        precision=_ratio(n_match, n_inf, both_empty),
        recall=_ratio(n_match, n_true, both_empty),
        f1=_ratio(2 * n_match, n_inf + n_true, both_empty),
        n_true=int(n_true), n_inferred=int(n_inf), n_matched=int(n_match),
        timing_error_mean_s=mean_err, timing_error_sd_s=sd_err,
        correlations=correlations,
        van_rossum=_van_rossum_sorted(inferred, true, tau), van_rossum_tau_s=tau,
        matched_pairs=pairs, timing_errors_s=errors,
        tolerance_s=tolerance_s, duration_s=float(stop),
    )


def score_spikes(inferred_times, true_times, *, tolerance_s, bin_widths_s=DEFAULT_BIN_WIDTHS_S,
                 duration_s=None, van_rossum_tau_s=None) -> SpikeScore:
    """Score inferred spike times against true spike times.

    Parameters
    ----------
    inferred_times, true_times : array_like
        Spike times in seconds from the first frame (>= 0, as in a spike
        table). A repeated time counts as several spikes. Unsorted input is
        sorted with a warning.
    tolerance_s : float
        Largest ``|t_inferred - t_true|`` for an inferred spike to count as a
        detection of a true spike (inclusive). Each spike matches at most once.
    bin_widths_s : sequence of float
        Bin widths for the correlation of binned counts.
    duration_s : float, optional
        Length of the recording in seconds. Bins cover ``[0, duration_s]``;
        pass it so that the silent end of the recording counts. If omitted,
        the bins run from 0 to the last spike of either train.
    van_rossum_tau_s : float, optional
        Time constant of the van Rossum distance; defaults to ``tolerance_s``.

    Returns
    -------
    SpikeScore

    Raises
    ------
    ValueError
        Bad arguments; times that are not finite, or negative (the spike
        table reader refuses them too: align the clocks first).

    Notes
    -----
    Matching is optimal, not greedy: the most pairs within the tolerance, and
    among those the smallest total ``|Δt|`` (see :func:`match_spikes`).
    Precision, recall and F1 follow from the counts; for empty trains see
    :class:`SpikeScore`.

    References
    ----------
    van Rossum MCW (2001) A novel spike distance. Neural Computation
    13:751-763.

    Examples
    --------
    >>> s = score_spikes([0.11, 0.52, 0.90], [0.1, 0.5, 0.7], tolerance_s=0.05)
    >>> (s.n_matched, round(s.precision, 3), round(s.recall, 3))
    (2, 0.667, 0.667)
    """
    tolerance_s, widths, duration_s, tau = _check_common(tolerance_s, bin_widths_s, duration_s,
                                                         van_rossum_tau_s)
    inferred = as_spike_times(inferred_times, "inferred_times", nonnegative=True)
    true = as_spike_times(true_times, "true_times", nonnegative=True)
    return _score_sorted(inferred, true, tolerance_s, widths, duration_s, tau)


@dataclass(frozen=True)
class ScoreTable:
    """Scores of many ROIs, with pooled totals.

    Attributes
    ----------
    rois : tuple
        ROI keys (dict keys, or list positions) in order.
    scores : tuple of SpikeScore
        One score per ROI, same order.
    precision, recall, f1 : float
        Pooled over ROIs from the summed counts (not an average of ratios);
        empty-train conventions as in :class:`SpikeScore`.
    n_true, n_inferred, n_matched : int
        Summed counts.
    timing_error_mean_s, timing_error_sd_s : float
        Over all matched pairs of all ROIs.
    mean_correlations : tuple of (bin_width_s, r)
        Mean over ROIs of the per-ROI correlations (NaNs skipped; NaN if none).
    mean_van_rossum : float
        Mean over ROIs of the per-ROI van Rossum distance.
    """

    rois: tuple
    scores: tuple
    precision: float
    recall: float
    f1: float
    n_true: int
    n_inferred: int
    n_matched: int
    timing_error_mean_s: float
    timing_error_sd_s: float
    mean_correlations: tuple
    mean_van_rossum: float

    def __len__(self) -> int:
        return len(self.rois)

    def __getitem__(self, roi) -> SpikeScore:
        try:
            return self.scores[self.rois.index(roi)]
        except ValueError:
            raise KeyError(f"no ROI {roi!r} in this table; ROIs: {list(self.rois)[:10]}") from None

    def header(self) -> list:
        """Column names of :meth:`rows`."""
        widths = [w for w, _ in (self.scores[0].correlations if self.scores else ())]
        return (["roi", "n_true", "n_inferred", "n_matched", "precision", "recall", "f1",
                 "timing_error_mean_s", "timing_error_sd_s", "van_rossum"]
                + [f"r_{w:g}s" for w in widths])

    def rows(self, *, pooled_roi="pooled") -> list:
        """One list of values per ROI, then the pooled row, whose ``roi`` is ``pooled_roi`` (columns:
        :meth:`header`; ``pooled_roi=""`` keeps the column numeric in a CSV file)."""
        out = []
        for roi, s in zip(self.rois, self.scores):
            out.append([roi, s.n_true, s.n_inferred, s.n_matched, s.precision, s.recall, s.f1,
                        s.timing_error_mean_s, s.timing_error_sd_s, s.van_rossum]
                       + [r for _, r in s.correlations])
        out.append([pooled_roi, self.n_true, self.n_inferred, self.n_matched, self.precision, self.recall,
                    self.f1, self.timing_error_mean_s, self.timing_error_sd_s, self.mean_van_rossum]
                   + [r for _, r in self.mean_correlations])
        return out

    def __str__(self) -> str:
        def fmt(v):
            if isinstance(v, float):
                return "nan" if math.isnan(v) else f"{v:.3f}"
            return str(v)
        table = [self.header()] + [[fmt(v) for v in row] for row in self.rows()]
        widths = [max(len(str(row[c])) for row in table) for c in range(len(table[0]))]
        return "\n".join("  ".join(str(v).rjust(w) for v, w in zip(row, widths)) for row in table)


def _as_mapping(trains, name):
    if isinstance(trains, dict):
        return dict(trains)
    if isinstance(trains, np.ndarray) and trains.ndim == 1 and trains.dtype != object:
        raise ValueError(f"{name} must be a dict or list of spike-time arrays (one per ROI), "
                         "got a single 1-D array; use score_spikes for one ROI")
    try:
        return {i: t for i, t in enumerate(trains)}
    except TypeError:
        raise ValueError(f"{name} must be a dict or list of spike-time arrays, got {type(trains).__name__}") from None


def score_many(inferred, true, *, tolerance_s, bin_widths_s=DEFAULT_BIN_WIDTHS_S, duration_s=None,
               van_rossum_tau_s=None) -> ScoreTable:
    """Score many ROIs and pool the counts.

    Parameters
    ----------
    inferred, true : dict or list
        Spike-time arrays per ROI: dicts keyed by ROI (e.g. from
        :func:`calcium.io.spikes.read_spike_times`) or lists in ROI order.
        A ROI present in only one of two dicts is scored against an empty
        train, with a warning. Lists must have equal length.
    tolerance_s, bin_widths_s, duration_s, van_rossum_tau_s
        As in :func:`score_spikes` (the same for every ROI).

    Returns
    -------
    ScoreTable

    Notes
    -----
    Pooled precision, recall and F1 come from the summed counts, so ROIs with
    many spikes weigh more; the per-ROI values are in ``scores``.

    Examples
    --------
    >>> t = score_many([[0.1, 0.5], [1.0]], [[0.1, 0.52], [2.0]], tolerance_s=0.05)
    >>> (t.n_matched, t.n_true, round(t.f1, 3))
    (2, 3, 0.667)
    """
    tolerance_s, widths, duration_s, tau = _check_common(tolerance_s, bin_widths_s, duration_s,
                                                         van_rossum_tau_s)
    inf_map = _as_mapping(inferred, "inferred")
    true_map = _as_mapping(true, "true")
    if not isinstance(inferred, dict) and not isinstance(true, dict) and len(inf_map) != len(true_map):
        raise ValueError(f"inferred and true must list the same number of ROIs, got {len(inf_map)} "
                         f"and {len(true_map)}")
    keys = list(true_map)
    keys += [k for k in inf_map if k not in true_map]
    only_one = [k for k in keys if (k in inf_map) != (k in true_map)]
    if only_one:
        warnings.warn(f"{len(only_one)} ROI(s) appear in only one of inferred/true (first: {only_one[:5]}); "
                      "scored against an empty train", UserWarning, stacklevel=2)
    try:
        keys.sort()
    except TypeError:
        pass
    scores = []
    for k in keys:
        a = as_spike_times(inf_map.get(k, ()), f"inferred[{k!r}]", stacklevel=3, nonnegative=True)
        b = as_spike_times(true_map.get(k, ()), f"true[{k!r}]", stacklevel=3, nonnegative=True)
        scores.append(_score_sorted(a, b, tolerance_s, widths, duration_s, tau))

    n_true = sum(s.n_true for s in scores)
    n_inf = sum(s.n_inferred for s in scores)
    n_match = sum(s.n_matched for s in scores)
    both_empty = n_true == 0 and n_inf == 0
    errors = np.concatenate([s.timing_errors_s for s in scores]) if scores else np.zeros(0)
    mean_corr = []
    for c, w in enumerate(widths):
        vals = np.array([s.correlations[c][1] for s in scores], dtype=float)
        vals = vals[np.isfinite(vals)]
        mean_corr.append((w, float(vals.mean()) if vals.size else float("nan")))
    return ScoreTable(
        rois=tuple(keys), scores=tuple(scores),
        precision=_ratio(n_match, n_inf, both_empty), recall=_ratio(n_match, n_true, both_empty),
        f1=_ratio(2 * n_match, n_inf + n_true, both_empty),
        n_true=int(n_true), n_inferred=int(n_inf), n_matched=int(n_match),
        timing_error_mean_s=float(errors.mean()) if errors.size else float("nan"),
        timing_error_sd_s=float(errors.std(ddof=1)) if errors.size >= 2 else float("nan"),
        mean_correlations=tuple(mean_corr),
        mean_van_rossum=float(np.mean([s.van_rossum for s in scores])) if scores else float("nan"),
    )
