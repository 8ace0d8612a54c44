"""Shape of a single-spike response built from exponentials: its peak, half-rise and half-decay times.

The low room that :mod:`calcium.kernel` (the derived times of a :class:`~calcium.kernel.Kernel`) and
:mod:`calcium.indicators` (the rise and decay time constants behind a row of tabulated times) both need. It
imports nothing of the package but :mod:`calcium._checks`, so neither of the two has to import the other to
share it. Its names are not underscored: they are the small interface of the pair, not public API (the public
door to :func:`time_constants_from_half_times` is :mod:`calcium.kernel`, and ``calcium`` itself).

The response is, for :math:`t \\ge 0`,

.. math:: h(t) = \\frac{A}{N}\\Big[(1-f)\\,e^{-t/\\tau_d} + f\\,e^{-t/\\tau_s} - e^{-t/\\tau_r}\\Big],

0 before the spike, with :math:`N` the peak of the bracket (so that the peak is :math:`A`); the rise term is
dropped when :math:`\\tau_r = 0` and the slow term when there is no slow component. The derived times are found
by root finding to about 1e-14 of the kernel's time scale (:func:`scipy.optimize.brentq`, Brent 1973).

References
----------
.. [1] Brent, R. P. (1973). Algorithms for Minimization without Derivatives. Prentice-Hall, ch. 4.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ._checks import check_nonnegative, check_positive

__all__ = ["ExponentialShape", "find_root", "time_constants_from_half_times", "XTOL_FRACTION", "RTOL"]

# Root-finding tolerances for the derived times: absolute tolerance relative
# to the kernel's time scale, and the smallest relative tolerance brentq takes.
XTOL_FRACTION = 1e-14
RTOL = 4 * np.finfo(float).eps


def find_root(func, lo: float, hi: float, scale: float) -> float:
    """Root of ``func`` in ``[lo, hi]`` (a sign change there) to ``XTOL_FRACTION * scale`` in absolute terms."""
    from scipy.optimize import brentq  # (scipy.optimize takes a third of a second to import: only when needed)

    return float(brentq(func, lo, hi, xtol=XTOL_FRACTION * scale, rtol=RTOL, maxiter=500))


def _unscaled_terms(rise_s: float, decay_s: float, slow_decay_s: float | None,
                    slow_fraction: float) -> list[tuple[float, float]]:
    """(weight, tau) of the bracket in the module docstring (peak not yet 1)."""
    terms = [(1.0 - slow_fraction, decay_s)]
    if slow_decay_s is not None:
        terms.append((slow_fraction, slow_decay_s))
    if rise_s > 0:
        terms.append((-1.0, rise_s))
    return terms


def _unscaled_peak_time(terms: list[tuple[float, float]], rise_s: float) -> float:
    if rise_s == 0:
        return 0.0
    # h'(t) = 0  <=>  sum_decays w/tau * exp(t (1/rise - 1/tau)) = 1/rise.  The left side
    # increases strictly from below 1/rise (every tau > rise), so the root is unique.
    rise = rise_s
    decays = [(w, tau) for w, tau in terms if w > 0]

    def slope_sign(t):
        return sum(w / tau * math.exp(t * (1.0 / rise - 1.0 / tau)) for w, tau in decays) - 1.0 / rise

    w0, tau0 = decays[0]
    # The first decay term alone reaches 1/rise here, so the bracket is closed.
    hi = math.log(tau0 / (w0 * rise)) / (1.0 / rise - 1.0 / tau0)
    if len(decays) == 1:
        # one decay: that end is the root itself, t = ln(w tau / rise) rise tau / (tau - rise) (set the
        # derivative of w exp(-t/tau) - exp(-t/rise) to zero)
        return hi
    while slope_sign(hi) <= 0:  # rounding at the bracket end (the root can sit exactly there)
        hi *= 1.0 + 1e-9
    return find_root(slope_sign, 0.0, hi, rise)


@dataclass(frozen=True)
class ExponentialShape:
    """A response :math:`h(t) = \\sum_i w_i e^{-t/\\tau_i}` (:math:`t \\ge 0`) scaled to peak at ``amplitude``.

    Built by :meth:`build` from time constants that the caller has validated (a :class:`~calcium.kernel.Kernel`
    checks its fields first); nothing is checked here.

    Attributes
    ----------
    terms : tuple of (weight, tau_s)
        The exponentials, weights including ``amplitude``; the rise term has a negative weight.
    time_to_peak_s : float
        Time from the spike to the peak (0 for an instantaneous rise).
    rise_s : float
        Rise time constant in seconds (0: instantaneous).
    amplitude : float
        Peak value of the response.
    """

    terms: tuple[tuple[float, float], ...]
    time_to_peak_s: float
    rise_s: float
    amplitude: float

    @classmethod
    def build(cls, rise_s: float, decay_s: float, amplitude: float = 1.0, *, slow_decay_s: float | None = None,
              slow_fraction: float = 0.0) -> "ExponentialShape":
        """The shape with these time constants (seconds), slow component and peak, as in the module docstring."""
        terms = _unscaled_terms(rise_s, decay_s, slow_decay_s, slow_fraction)
        t_peak = _unscaled_peak_time(terms, rise_s)  # solved once: the derived times all start from it
        peak = sum(w * math.exp(-t_peak / tau) for w, tau in terms)
        return cls(tuple((amplitude * w / peak, tau) for w, tau in terms), t_peak, rise_s, amplitude)

    def evaluate(self, time_s) -> np.ndarray:
        """Response at ``time_s`` seconds after the spike (0 before it); float64 array of the shape of ``time_s``."""
        t = np.asarray(time_s, dtype=np.float64)
        after = t >= 0
        tt = np.where(after, t, 0.0)
        out = np.zeros(t.shape)
        for w, tau in self.terms:
            out += w * np.exp(-tt / tau)
        return np.where(after, out, 0.0)

    @property
    def time_scale_s(self) -> float:
        """The longest time constant: the scale of the decay's root finding."""
        return max(tau for _, tau in self.terms)

    @property
    def half_rise_s(self) -> float:
        """Time from the spike until the response first reaches half its peak."""
        if self.rise_s == 0:
            return 0.0
        half = 0.5 * self.amplitude
        return find_root(lambda t: float(self.evaluate(t)) - half, 0.0, self.time_to_peak_s, self.rise_s)

    @property
    def half_decay_s(self) -> float:
        """Time from the peak until the response has fallen to half its peak."""
        t_peak = self.time_to_peak_s
        half = 0.5 * self.amplitude
        scale = self.time_scale_s
        hi = t_peak + scale
        while float(self.evaluate(hi)) > half:
            hi += 2 * (hi - t_peak)
        return find_root(lambda t: float(self.evaluate(t)) - half, t_peak, hi, scale) - t_peak


def time_constants_from_half_times(half_decay_s, *, half_rise_s=None, time_to_peak_s=None) -> tuple[float, float]:
    """Rise and decay time constants of the difference of exponentials with given times.

    Solves exactly (root finding to ~1e-14 relative) for the
    double-exponential kernel whose half-decay time (peak to half peak) is
    ``half_decay_s`` and whose half-rise time (spike to half peak) is
    ``half_rise_s`` -- or, instead, whose time to peak is ``time_to_peak_s``.

    Parameters
    ----------
    half_decay_s : float
        Half-decay time t½ in seconds (> 0).
    half_rise_s : float, optional
        Half-rise time in seconds; 0 means an instantaneous rise.
    time_to_peak_s : float, optional
        Time to peak in seconds; give exactly one of the two.

    Returns
    -------
    (rise_s, decay_s) : tuple of float

    Raises
    ------
    ValueError
        When no difference of exponentials has these times.  The shape of the
        kernel depends only on ``rise_s / decay_s`` in (0, 1); as it goes to
        1 (the alpha function) half-rise / half-decay grows to 0.13821 and
        time-to-peak / half-decay to 0.59582, the largest values possible.

    Notes
    -----
    Both ratios increase monotonically with ``rise_s / decay_s``; the ratio is
    found with :func:`scipy.optimize.brentq` on its logarithm, and the time
    scale then follows from the half-decay time.

    Examples
    --------
    An instantaneous rise leaves one exponential, whose half-decay time is
    ``decay_s ln 2``:

    >>> [round(value, 6) for value in time_constants_from_half_times(0.5, half_rise_s=0.0)]
    [0.0, 0.721348]
    """
    half_decay_s = check_positive(half_decay_s, "half_decay_s")
    if (half_rise_s is None) == (time_to_peak_s is None):
        raise ValueError("give exactly one of half_rise_s and time_to_peak_s")
    if half_rise_s is not None:
        target, name = check_nonnegative(half_rise_s, "half_rise_s"), "half_rise_s"

        def measure(shape):
            return shape.half_rise_s
    else:
        target, name = check_nonnegative(time_to_peak_s, "time_to_peak_s"), "time_to_peak_s"

        def measure(shape):
            return shape.time_to_peak_s
    if target == 0.0:
        return 0.0, half_decay_s / math.log(2.0)

    def ratio(log_rho):
        shape = ExponentialShape.build(math.exp(log_rho), 1.0)
        return measure(shape) / shape.half_decay_s

    lo, hi = math.log(1e-12), math.log(1.0 - 1e-7)
    wanted = target / half_decay_s
    r_lo, r_hi = ratio(lo), ratio(hi)
    if not (r_lo < wanted < r_hi):
        raise ValueError(f"{name}={target!r} s with half_decay_s={half_decay_s!r} s: the ratio {wanted:.4g} is "
                         f"outside ({r_lo:.3g}, {r_hi:.5f}), the range a difference of exponentials can have")
    from scipy.optimize import brentq

    log_rho = brentq(lambda v: ratio(v) - wanted, lo, hi, xtol=1e-14, rtol=RTOL, maxiter=500)
    shape = ExponentialShape.build(math.exp(log_rho), 1.0)
    decay = half_decay_s / shape.half_decay_s
    return math.exp(log_rho) * decay, decay
