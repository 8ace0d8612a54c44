"""The fluorescence response of a calcium indicator to one action potential.

A :class:`Kernel` describes the ΔF/F transient that one spike adds to a
trace: a difference of exponentials (an instantaneous jump followed by one
exponential when ``rise_s == 0``), optionally with a second, slower decay
component, scaled so that its peak equals ``amplitude``.  Responses to
spike trains add linearly; an optional saturating nonlinearity in Hill form
is then applied to the summed response (see :meth:`Kernel.saturate`).

Sampled at a fixed frame rate, a difference of two exponentials obeys an
exact second-order autoregressive recursion, AR(2), and a single exponential
an AR(1) recursion; :meth:`Kernel.ar_coefficients` and
:meth:`Kernel.from_ar_coefficients` convert between the two descriptions.

The shape mathematics (peak, half-rise and half-decay times, and
:func:`time_constants_from_half_times`, re-exported here) lives below this
module in :mod:`calcium._double_exponential`, which the indicator table
(:mod:`calcium.indicators`) uses too; this module imports the table for
:meth:`Kernel.from_indicator`, and the table never imports it.

References
----------
.. [1] Hill, A. V. (1910). The possible effects of the aggregation of the
   molecules of haemoglobin on its dissociation curves. J. Physiol. 40,
   iv-vii.
.. [2] Grynkiewicz, G., Poenie, M. & Tsien, R. Y. (1985). A new generation of
   Ca2+ indicators with greatly improved fluorescence properties. J. Biol.
   Chem. 260, 3440-3450.
.. [3] Yasuda, R. et al. (2004). Imaging calcium concentration dynamics in
   small neuronal compartments. Sci. STKE 2004(219), pl5.
.. [4] Box, G. E. P. & Jenkins, G. M. (1976). Time Series Analysis:
   Forecasting and Control. Holden-Day. (sampled exponentials and AR models)
"""
from __future__ import annotations

import dataclasses
import math
from dataclasses import KW_ONLY, dataclass

import numpy as np

from ._checks import check_frame_rate, check_int, check_nonnegative, check_positive
from ._double_exponential import ExponentialShape, time_constants_from_half_times
from .indicators import IndicatorKinetics, get_indicator

__all__ = ["Kernel", "time_constants_from_half_times", "DECAY_RANGE_S"]

# Decay time constants a Kernel accepts (seconds), for the main and the slow component.
# Lower end: calcium leaves the smallest neuronal compartments (dendritic spines) with time constants of about
# 10-20 ms (Sabatini, Oertner & Svoboda 2002, Neuron 33:439, from memory), and indicators only slow that down;
# 1 ms leaves a factor of ten below it, and equals the frame interval of a 1 kHz line scan.
# Upper end: single-spike decays of the slowest common indicators are about a second (GCaMP6s; Chen et al. 2013,
# Nature 499:295, from memory) and stay within seconds after bursts or in cold slices; a response slower than a
# minute cannot be told from baseline drift, which ΔF/F baselines follow over windows of about a minute.
DECAY_RANGE_S = (1e-3, 60.0)

def _check_decay(value, name: str) -> float:
    """A decay time constant in seconds, inside DECAY_RANGE_S; the message suggests a unit slip."""
    value = check_positive(value, name)
    low, high = DECAY_RANGE_S
    if low <= value <= high:
        return value
    text = (f"{name}={value!r} s is outside the range of calcium indicator decays ({low:g} to {high:g} s; "
            f"single-spike decays of common indicators are 0.05-2 s)")
    if value > high and low <= value / 1000.0 <= high:
        text += f": if it is in milliseconds, give {value / 1000.0:g} s"
    raise ValueError(text)


@dataclass(frozen=True)
class Kernel:
    r"""ΔF/F response of an indicator to one spike.

    The linear single-spike response is, for :math:`t \ge 0`,

    .. math::

        h(t) = \frac{A}{N}\Big[(1-f)\,e^{-t/\tau_d} + f\,e^{-t/\tau_s}
               - e^{-t/\tau_r}\Big],

    and 0 for :math:`t < 0`; :math:`\tau_r` = ``rise_s``, :math:`\tau_d` =
    ``decay_s``, :math:`\tau_s` = ``slow_decay_s``, :math:`f` =
    ``slow_fraction`` (0 unless a slow component is given) and :math:`A` =
    ``amplitude``.  :math:`N` is the peak of the bracket, so that
    :math:`\max_t h(t) = A`.  With ``rise_s == 0`` the rise term is dropped
    (an instantaneous jump to ``amplitude`` at the spike).

    Parameters
    ----------
    rise_s : float
        Rise time constant in seconds, ``0 <= rise_s < decay_s``; 0 means an
        instantaneous rise (a single exponential, AR(1) when sampled).
    decay_s : float
        Decay time constant in seconds, within :data:`DECAY_RANGE_S`
        (1 ms to 60 s; see the sources beside it).
    amplitude : float, default 1.0
        Peak ΔF/F of the linear response to one spike (> 0): the small-signal
        single-spike ΔF/F.  The nonlinearity below keeps this meaning.
    slow_decay_s : float or None, default None
        Time constant of a second, slower decay component (> ``decay_s``,
        within :data:`DECAY_RANGE_S`).
    slow_fraction : float, default 0.0
        Weight of the slow component, ``0 <= slow_fraction < 1``; must be > 0
        exactly when ``slow_decay_s`` is given.
    dff_max : float or None, default None
        Saturating ΔF/F of the indicator (> 0).  None means a linear
        indicator (:attr:`is_linear`).
    hill_n : float, default 1.0
        Hill coefficient (> 0) of the calcium binding curve.
    hill_k : float, default 1.0
        Dissociation constant of the indicator in units of the resting
        calcium concentration, :math:`K_d/[\mathrm{Ca}^{2+}]_{rest}` (> 0).
        With ``hill_n == 1`` the saturating curve does not depend on it.

    Notes
    -----
    *Saturation.*  Fluorescence follows the Hill equation [1]_ in the calcium
    concentration, :math:`F = F_{min} + (F_{max}-F_{min})\,\phi(c)`,
    :math:`\phi(c) = c^n/(c^n + K^n)`, with :math:`c` the calcium
    concentration relative to rest and :math:`K` = ``hill_k`` [2]_ [3]_.  ΔF/F
    relative to the resting fluorescence is then, whatever :math:`F_{min}`,

    .. math::

        \Delta F/F = D\,\frac{\phi(c)-\phi(1)}{1-\phi(1)}
                   = D\,\frac{c^n - 1}{c^n + K^n},

    with :math:`D` = ``dff_max`` the ΔF/F at saturation.  The summed linear
    response :math:`x` (in ΔF/F units) stands for the calcium increment,
    :math:`c = 1 + x\,(1+K^n)/(nD)`; the scale is chosen so that the slope of
    ΔF/F against :math:`x` is exactly 1 at rest.  Thus ``amplitude`` stays
    the small-signal single-spike ΔF/F, the response never reaches ``D``,
    and for ``hill_n == 1`` the curve is the hyperbola
    :math:`Dx/(D + x)`.  :meth:`saturate` and :meth:`unsaturate` implement
    the map and its exact inverse.

    *Sampling.*  Sampled at ``frame_rate`` the linear kernel of a
    difference of exponentials obeys
    :math:`h_k = g_1 h_{k-1} + g_2 h_{k-2}` with :math:`g_1 = d + r`,
    :math:`g_2 = -dr`, :math:`d = e^{-1/(\tau_d f_s)}`,
    :math:`r = e^{-1/(\tau_r f_s)}` [4]_.

    Examples
    --------
    >>> k = Kernel(0.05, 0.5, 0.2)
    >>> round(k.time_to_peak_s, 6)
    0.127921
    >>> k.impulse_response(10.0, 4).round(4)
    array([0.    , 0.1961, 0.1871, 0.1568])
    >>> k.ar_coefficients(10.0).round(6)
    array([ 0.954066, -0.110803])
    """

    rise_s: float
    decay_s: float
    amplitude: float = 1.0
    _: KW_ONLY
    slow_decay_s: float | None = None
    slow_fraction: float = 0.0
    dff_max: float | None = None
    hill_n: float = 1.0
    hill_k: float = 1.0

    def __post_init__(self):
        rise = check_nonnegative(self.rise_s, "rise_s")
        decay = _check_decay(self.decay_s, "decay_s")
        amplitude = check_positive(self.amplitude, "amplitude")
        if rise >= decay:
            raise ValueError(f"rise_s must be smaller than decay_s, got rise_s={rise!r} >= decay_s={decay!r}")
        fraction = check_nonnegative(self.slow_fraction, "slow_fraction")
        if fraction >= 1.0:
            raise ValueError(f"slow_fraction must be in [0, 1), got {fraction!r}")
        slow = self.slow_decay_s
        if slow is not None:
            slow = _check_decay(slow, "slow_decay_s")
            if slow <= decay:
                raise ValueError(f"slow_decay_s must be larger than decay_s ({decay!r}), got {slow!r}")
            if fraction == 0.0:
                raise ValueError("slow_decay_s is given but slow_fraction is 0; give a slow_fraction in (0, 1) "
                                 "or leave slow_decay_s as None")
        elif fraction > 0.0:
            raise ValueError(f"slow_fraction={fraction!r} needs a slow_decay_s (the slow decay time constant)")
        dff_max = None if self.dff_max is None else check_positive(self.dff_max, "dff_max")
        for name, value in (("rise_s", rise), ("decay_s", decay), ("amplitude", amplitude),
                            ("slow_fraction", fraction), ("slow_decay_s", slow), ("dff_max", dff_max),
                            ("hill_n", check_positive(self.hill_n, "hill_n")),
                            ("hill_k", check_positive(self.hill_k, "hill_k"))):
            object.__setattr__(self, name, value)
        # the shape and its peak time, solved once (calcium._double_exponential: shared with the indicator table)
        object.__setattr__(self, "_shape", ExponentialShape.build(rise, decay, amplitude, slow_decay_s=slow,
                                                                  slow_fraction=fraction))

    # ------------------------------------------------------------------ shape
    def exponential_terms(self) -> tuple[tuple[float, float], ...]:
        r"""The kernel as a sum of exponentials.

        Returns
        -------
        tuple of (weight, tau_s)
            :math:`h(t) = \sum_i w_i\, e^{-t/\tau_i}` for :math:`t \ge 0`; the
            rise term has a negative weight.  Weights include ``amplitude``.
        """
        return self._shape.terms

    def evaluate(self, time_s) -> np.ndarray:
        """Linear ΔF/F response at ``time_s`` seconds after one spike (0 before it).

        Parameters
        ----------
        time_s : float or array_like
            Times relative to the spike, in seconds.

        Returns
        -------
        ndarray of float64, same shape as ``time_s``
        """
        return self._shape.evaluate(time_s)

    # ---------------------------------------------------------- derived times
    @property
    def has_slow_component(self) -> bool:
        """True when a second, slower decay component is present."""
        return self.slow_decay_s is not None

    @property
    def time_to_peak_s(self) -> float:
        """Time from the spike to the peak of the response (0 for an instantaneous rise)."""
        return self._shape.time_to_peak_s

    @property
    def half_rise_s(self) -> float:
        """Time from the spike until the response first reaches half its peak."""
        return self._shape.half_rise_s

    @property
    def half_decay_s(self) -> float:
        """t½: time from the peak until the response has fallen to half its peak."""
        return self._shape.half_decay_s

    # ------------------------------------------------------------ sampling
    def impulse_response(self, frame_rate, n_frames) -> np.ndarray:
        """Linear response to one spike at t = 0, sampled at ``k / frame_rate``.

        The saturating nonlinearity (if any) is not applied: this is the
        kernel of the linear part, whose peak is ``amplitude``.

        Parameters
        ----------
        frame_rate : float
            Sampling rate in Hz.
        n_frames : int
            Number of samples (>= 1).

        Returns
        -------
        ndarray of float64, shape (n_frames,)
        """
        frame_rate = check_frame_rate(frame_rate)
        n_frames = check_int(n_frames, "n_frames", minimum=1)
        return self.evaluate(np.arange(n_frames) / frame_rate)

    def ar_coefficients(self, frame_rate) -> np.ndarray:
        """Exact autoregressive coefficients of the sampled kernel.

        Parameters
        ----------
        frame_rate : float
            Sampling rate in Hz.

        Returns
        -------
        ndarray of float64
            ``[g1, g2]`` (AR(2): ``h[k] = g1 h[k-1] + g2 h[k-2]``) with
            ``g1 = d + r`` and ``g2 = -d r``, ``d = exp(-1/(decay_s
            frame_rate))``, ``r = exp(-1/(rise_s frame_rate))``; or ``[d]``
            (AR(1)) when ``rise_s == 0``.

        Raises
        ------
        ValueError
            When the kernel has a slow decay component: a sum of three
            exponentials is not expressible as AR(1) or AR(2).
        """
        frame_rate = check_frame_rate(frame_rate)
        if self.has_slow_component:
            raise ValueError("a kernel with a slow decay component (slow_decay_s) is a sum of three exponentials: "
                             "it is not expressible with AR(1)/AR(2) coefficients")
        d = math.exp(-1.0 / (self.decay_s * frame_rate))
        if self.rise_s == 0:
            return np.array([d])
        r = math.exp(-1.0 / (self.rise_s * frame_rate))
        return np.array([d + r, -d * r])

    @classmethod
    def from_ar_coefficients(cls, coefficients, frame_rate, *, amplitude=1.0) -> "Kernel":
        """The kernel whose sampled form has the given AR(1) or AR(2) coefficients.

        Parameters
        ----------
        coefficients : array_like, length 1 or 2
            ``[g]`` (AR(1), ``0 < g < 1``) or ``[g1, g2]``; the roots of
            ``z**2 - g1 z - g2 = 0`` must be real, distinct and in
            ``[0, 1)`` with the larger one > 0.  A zero root means an
            instantaneous rise.
        frame_rate : float
            Sampling rate in Hz.
        amplitude : float, default 1.0
            Peak ΔF/F of the returned kernel.

        Returns
        -------
        Kernel
        """
        frame_rate = check_frame_rate(frame_rate)
        g = np.asarray(coefficients, dtype=np.float64).ravel()
        if g.size not in (1, 2) or not np.all(np.isfinite(g)):
            raise ValueError(f"coefficients must be 1 or 2 finite numbers (AR(1) or AR(2)), got {coefficients!r}")
        if g.size == 1:
            d, r = float(g[0]), 0.0
        else:
            g1, g2 = float(g[0]), float(g[1])
            disc = g1 * g1 + 4.0 * g2
            if disc < 0:
                raise ValueError(f"coefficients {coefficients!r} give complex roots (g1**2 + 4 g2 = {disc:.3g} < 0): "
                                 "an oscillating response, not a difference of exponentials")
            if disc == 0:
                raise ValueError(f"coefficients {coefficients!r} give a double root: rise and decay would be "
                                 "equal, which a Kernel does not allow (rise_s < decay_s)")
            sq = math.sqrt(disc)
            d = 0.5 * (g1 + sq)
            # r d = -g2 avoids the cancellation in (g1 - sq) / 2
            r = -g2 / d if d != 0 else 0.5 * (g1 - sq)
        if not (0.0 < d < 1.0) or not (0.0 <= r < d):
            raise ValueError(f"coefficients {coefficients!r} give roots {d!r} and {r!r}; both must lie in [0, 1) "
                             "with the larger one > 0 (decaying, non-oscillating response)")
        decay = -1.0 / (frame_rate * math.log(d))
        rise = 0.0 if r == 0.0 else -1.0 / (frame_rate * math.log(r))
        return cls(rise, decay, amplitude)

    # -------------------------------------------------------- constructors
    @classmethod
    def from_indicator(cls, name: "str | IndicatorKinetics", **overrides) -> "Kernel":
        """Kernel of a tabulated indicator (see :mod:`calcium.indicators`).

        The linear difference of exponentials whose half-decay time and
        half-rise time (or time to peak) are the row's
        (:meth:`~calcium.indicators.IndicatorKinetics.time_constants`), with
        the row's single-spike peak ΔF/F as ``amplitude``.

        Parameters
        ----------
        name : str or IndicatorKinetics
            Indicator name, case-insensitive (e.g. ``"GCaMP6s"``), or a row
            of the table (:func:`calcium.indicators.get_indicator`), which
            may be one of your own.
        **overrides
            Field values replacing the tabulated ones (e.g. ``amplitude=0.1``,
            ``dff_max=5.0``).

        Examples
        --------
        >>> k = Kernel.from_indicator("GCaMP6f")
        >>> round(k.half_decay_s, 6), k.amplitude
        (0.142, 0.19)
        """
        row = name if isinstance(name, IndicatorKinetics) else get_indicator(name)
        rise_s, decay_s = row.time_constants()
        kernel = cls(rise_s, decay_s, row.dff_single_spike)
        return dataclasses.replace(kernel, **overrides) if overrides else kernel

    def scaled(self, amplitude) -> "Kernel":
        """The same kernel with another peak ΔF/F."""
        return dataclasses.replace(self, amplitude=amplitude)

    def to_dict(self) -> dict:
        """The defining fields as a plain, JSON-serialisable dict; ``Kernel(**d)`` rebuilds the kernel."""
        return dataclasses.asdict(self)

    # -------------------------------------------------------- nonlinearity
    @property
    def is_linear(self) -> bool:
        """True when no saturating nonlinearity is set (``dff_max is None``)."""
        return self.dff_max is None

    def _calcium_gain(self) -> float:
        return (1.0 + self.hill_k ** self.hill_n) / (self.hill_n * self.dff_max)

    @property
    def saturate_domain_min(self) -> float:
        """Smallest linear ΔF/F :meth:`saturate` accepts (calcium at zero); -inf when linear."""
        return -math.inf if self.is_linear else -1.0 / self._calcium_gain()

    @property
    def unsaturate_domain(self) -> tuple[float, float]:
        """Open interval of ΔF/F values :meth:`unsaturate` accepts (whole line when linear)."""
        if self.is_linear:
            return (-math.inf, math.inf)
        return (-self.dff_max / self.hill_k ** self.hill_n, self.dff_max)

    def saturate(self, linear_dff):
        """Apply the indicator's saturation to a summed linear ΔF/F.

        Parameters
        ----------
        linear_dff : float or array_like
            Summed linear response (ΔF/F units), >= :attr:`saturate_domain_min`.

        Returns
        -------
        float or ndarray
            ``dff_max (c**n - 1) / (c**n + K**n)`` with ``c = 1 + linear_dff
            (1 + K**n) / (n dff_max)`` (see the class Notes); the input itself
            when the kernel is linear.
        """
        x = np.asarray(linear_dff, dtype=np.float64)
        if self.is_linear:
            return x.copy() if x.ndim else float(x)
        gain = self._calcium_gain()
        low = x * gain < -1.0
        if np.any(low):
            raise ValueError(f"linear_dff must be >= {self.saturate_domain_min!r} (zero calcium) for saturation, "
                             f"got {x[low].min() if x.ndim else float(x)!r}")
        with np.errstate(divide="ignore"):
            cn_minus_1 = np.expm1(self.hill_n * np.log1p(x * gain))  # c**n - 1 without cancellation
        out = self.dff_max * cn_minus_1 / (cn_minus_1 + 1.0 + self.hill_k ** self.hill_n)
        return out if out.ndim else float(out)

    def unsaturate(self, dff, *, clip: bool = False):
        """Exact inverse of :meth:`saturate`: the linear ΔF/F behind an observed ΔF/F.

        Parameters
        ----------
        dff : float or array_like
            Observed ΔF/F, inside :attr:`unsaturate_domain`.
        clip : bool, default False
            If False, values at or above ``dff_max`` (or at or below the
            zero-calcium level) raise ValueError.  If True, they are first
            clipped into the domain: above to ``(1 - 1e-6) dff_max``, below to
            ``(1 - 1e-6)`` times the lower limit, so the result is finite.

        Returns
        -------
        float or ndarray
            The input itself when the kernel is linear.
        """
        y = np.asarray(dff, dtype=np.float64)
        if self.is_linear:
            return y.copy() if y.ndim else float(y)
        lo, hi = self.unsaturate_domain
        if clip:
            y = np.clip(y, lo * (1 - 1e-6), hi * (1 - 1e-6))
        else:
            bad = (y >= hi) | (y <= lo) | np.isnan(y)
            if np.any(bad):
                value = y[bad][0] if y.ndim else float(y)
                raise ValueError(f"dff must lie in ({lo!r}, {hi!r}) (below dff_max, above the zero-calcium level) "
                                 f"to be unsaturated, got {value!r}; pass clip=True to clip")
        kn = self.hill_k ** self.hill_n
        cn_minus_1 = y * (1.0 + kn) / (self.dff_max - y)
        out = np.expm1(np.log1p(cn_minus_1) / self.hill_n) / self._calcium_gain()
        return out if out.ndim else float(out)

    # --------------------------------------------------------------- display
    def __str__(self) -> str:
        def ms(value):
            return f"{value * 1e3:.4g} ms"

        rise = "instantaneous rise" if self.rise_s == 0 else f"rise {ms(self.rise_s)}"
        text = f"Kernel: {rise}, decay {ms(self.decay_s)}"
        if self.has_slow_component:
            text += f" + {self.slow_fraction:.3g} x slow decay {ms(self.slow_decay_s)}"
        text += (f"; peak ΔF/F {self.amplitude:.4g} at {ms(self.time_to_peak_s)}, "
                 f"half-rise {ms(self.half_rise_s)}, half-decay {ms(self.half_decay_s)}")
        if not self.is_linear:
            text += f"; saturating at ΔF/F {self.dff_max:.4g} (Hill n={self.hill_n:.3g}, K={self.hill_k:.3g})"
        return text

