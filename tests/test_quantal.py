"""The quantal mixture behind the single-spike size (calcium.infer.quantal).

External references: the quantal model of del Castillo & Katz (1954) (sizes = whole quanta + Gaussian noise),
scipy.optimize.isotonic_regression for the pool-adjacent-violators step, Wilks (1938) for the likelihood interval.
"""
import numpy as np
import pytest
from scipy.optimize import isotonic_regression

from calcium.infer.quantal import _pava_non_increasing, fit_quantal_mixture


@pytest.mark.parametrize("quantum, noise, mean_extra, seed", [
    (0.2, 0.02, 0.3, 0), (0.15, 0.03, 0.5, 1), (1.0, 0.1, 0.2, 2), (0.05, 0.006, 0.4, 3)])
def test_known_quantum_is_recovered_from_poisson_counts_in_gaussian_noise(quantum, noise, mean_extra, seed):
    # del Castillo & Katz (1954): event size = quantum x (number of quanta) + Gaussian noise; here the number of
    # spikes per event is 1 + Poisson(mean_extra) (zero events are not events)
    rng = np.random.default_rng(seed)
    counts = 1 + rng.poisson(mean_extra, 500)
    sizes = quantum * counts + rng.normal(0.0, noise, counts.size)
    fit = fit_quantal_mixture(sizes, noise_size=noise)
    assert abs(fit.quantum / quantum - 1) < 0.04
    assert fit.interval[0] <= fit.quantum <= fit.interval[1]


def test_noise_events_do_not_halve_the_quantum():
    # the failure the mixture exists to avoid: many small noise events (a pile near 3 noise s.d., as a penalised
    # fit leaves) beside singles and doubles; half the quantum must not win
    rng = np.random.default_rng(5)
    noise, quantum = 0.02, 0.25
    pile = rng.gamma(8.0, 3.0 * noise / 8.0, 300)
    counts = 1 + rng.poisson(0.3, 200)
    sizes = np.concatenate([pile, quantum * counts + rng.normal(0, 0.15 * quantum, counts.size)])
    fit = fit_quantal_mixture(sizes, noise_size=noise)
    assert abs(fit.quantum / quantum - 1) < 0.08
    assert fit.noise_share > 0.4


def test_too_few_events_give_no_quantum():
    fit = fit_quantal_mixture([0.2, 0.4, 0.21], noise_size=0.01)
    assert np.isnan(fit.quantum) and fit.n_events == 3


def test_likelihood_interval_is_the_wilks_set_of_the_profile():
    # Wilks (1938): the 95 % likelihood interval is where the profile log-likelihood is within
    # chi2(1, 0.95) / 2 = 1.92 of its maximum
    rng = np.random.default_rng(7)
    sizes = 0.3 * (1 + rng.poisson(0.3, 150)) + rng.normal(0, 0.04, 150)
    fit = fit_quantal_mixture(sizes, noise_size=0.04)
    inside = fit.grid[fit.log_likelihood >= fit.log_likelihood.max() - 1.92]
    assert fit.interval == (inside.min(), inside.max())


@pytest.mark.parametrize("seed", range(5))
def test_pool_adjacent_violators_matches_scipy(seed):
    values = np.random.default_rng(seed).random(17)
    out = np.empty_like(values)
    _pava_non_increasing(values, out)
    expected = isotonic_regression(values, increasing=False).x
    np.testing.assert_allclose(out, expected, rtol=1e-12, atol=1e-15)


def test_bad_noise_size_is_refused():
    with pytest.raises(ValueError, match="noise_size"):
        fit_quantal_mixture([1.0, 2.0], noise_size=0.0)
