"""Reference kinetics of common calcium indicators: a data table with sources.

:data:`INDICATORS` is a tuple of :class:`IndicatorKinetics` records, one per
indicator: the published (or recalled) peak ΔF/F for one action potential,
the half-decay time, the half-rise time or time to peak, the conditions of
the measurement and where the numbers come from.
:meth:`Kernel.from_indicator <calcium.kernel.Kernel.from_indicator>` turns a
record (or its name) into a :class:`~calcium.kernel.Kernel` whose difference of
exponentials has exactly those times (see
:func:`calcium.kernel.time_constants_from_half_times`).

This module is data and times only: it imports the shape mathematics from
:mod:`calcium._double_exponential` and nothing above it, and
:mod:`calcium.kernel` imports it.

Read before use
---------------
Values marked ``from_memory=True`` were recalled, not copied from the papers;
they are approximate and say "from memory" in their ``source`` text.  Check
them against the cited figure or table before any quantitative use.
Single-spike responses vary several-fold between cells, preparations,
expression levels and imaging set-ups; treat every row as a starting point
for fitting (``calcium.fit.fit_kernel``), not as ground truth.

References
----------
.. [1] Tian, L. et al. (2009). Imaging neural activity in worms, flies and
   mice with improved GCaMP calcium indicators. Nat. Methods 6, 875-881.
.. [2] Akerboom, J. et al. (2012). Optimization of a GCaMP calcium indicator
   for neural activity imaging. J. Neurosci. 32, 13819-13840.
.. [3] Chen, T.-W. et al. (2013). Ultrasensitive fluorescent proteins for
   imaging neuronal activity. Nature 499, 295-300.
.. [4] Dana, H. et al. (2019). High-performance calcium sensors for imaging
   activity in neuronal populations and microcompartments. Nat. Methods 16,
   649-657.
.. [5] Zhang, Y. et al. (2023). Fast and sensitive GCaMP calcium indicators
   for imaging neural populations. Nature 615, 884-891.
.. [6] Kerr, J. N. D., Greenberg, D. & Helmchen, F. (2005). Imaging input and
   output of neocortical networks in vivo. PNAS 102, 14063-14068.
.. [7] Tada, M., Takeuchi, A., Hashizume, M., Kitamura, K. & Kano, M. (2014).
   A highly sensitive fluorescent indicator dye for calcium imaging of neural
   activity in vitro and in vivo. Eur. J. Neurosci. 39, 1720-1728.
"""
from __future__ import annotations

import warnings
from dataclasses import dataclass

from ._checks import check_positive
from ._double_exponential import time_constants_from_half_times

__all__ = ["IndicatorKinetics", "INDICATORS", "get_indicator", "indicator_names"]

_IN_VIVO_V1 = ("mouse primary visual cortex, layer 2/3 pyramidal neurons, in vivo (anaesthetised), "
               "two-photon imaging with simultaneous loose-seal recording")
_MEMORY_CAVEAT = "from memory: approximate, check the cited figure/table before quantitative use"


@dataclass(frozen=True)
class IndicatorKinetics:
    """Single-spike kinetics of one indicator, with the source of the numbers.

    Attributes
    ----------
    name : str
        Usual name of the indicator (e.g. ``"GCaMP6s"``).
    kind : str
        ``"protein"`` (genetically encoded) or ``"synthetic dye"``.
    dff_single_spike : float
        Peak ΔF/F of the response to one action potential (a fraction:
        0.2 means 20 %).
    half_decay_s : float
        Time from the peak to half the peak, in seconds.
    half_rise_s : float or None
        Time from the spike to half the peak, in seconds (None when the
        source gives a time to peak instead).
    time_to_peak_s : float or None
        Time from the spike to the peak, in seconds (None when the source
        gives a half-rise time).
    conditions : str
        Preparation and measurement (in vivo / slice / culture, cell type).
    temperature_c : float or None
        Temperature of the preparation in °C, when known.
    source : str
        Authors, year, journal, figure or table; says "from memory" when
        the numbers were recalled.
    from_memory : bool
        True when the numbers were recalled rather than copied from the
        source: approximate.
    kd_nm : float or None
        In-vitro dissociation constant for Ca2+ in nM, when tabulated.
    hill_n : float or None
        In-vitro Hill coefficient, when tabulated.
    aliases : tuple of str
        Other names accepted by :func:`get_indicator`.
    notes : str
        Anything else a user should know about the row.

    Notes
    -----
    How each value of a row was obtained: the peak ΔF/F, the half-decay
    time and the half-rise time (or time to peak) were recalled from the
    figure or table named in ``source`` (``from_memory=True``; a value
    looked up is said so in ``source``), and the rise and decay time
    constants of the kernel are computed from the two times by
    :func:`calcium.kernel.time_constants_from_half_times` (the exact
    inversion of the difference of exponentials), never stored.
    """

    name: str
    kind: str
    dff_single_spike: float
    half_decay_s: float
    half_rise_s: float | None
    time_to_peak_s: float | None
    conditions: str
    temperature_c: float | None
    source: str
    from_memory: bool
    kd_nm: float | None = None
    hill_n: float | None = None
    aliases: tuple[str, ...] = ()
    notes: str = ""

    def __post_init__(self):
        check_positive(self.dff_single_spike, "dff_single_spike")
        check_positive(self.half_decay_s, "half_decay_s")
        if (self.half_rise_s is None) == (self.time_to_peak_s is None):
            raise ValueError(f"{self.name}: give exactly one of half_rise_s and time_to_peak_s")
        if not self.source.strip():
            raise ValueError(f"{self.name}: every indicator row needs a source")
        if self.from_memory and "from memory" not in self.source:
            raise ValueError(f"{self.name}: a row recalled from memory must say 'from memory' in its source")

    def time_constants(self) -> tuple[float, float]:
        """(rise_s, decay_s) of the difference of exponentials with this row's times."""
        return time_constants_from_half_times(self.half_decay_s, half_rise_s=self.half_rise_s,
                                              time_to_peak_s=self.time_to_peak_s)

    def kernel(self):
        """Deprecated: use ``Kernel.from_indicator(row.name)`` (or ``Kernel.from_indicator(row)``).

        The :class:`~calcium.kernel.Kernel` with this row's times and peak ΔF/F (linear).  Kept for one
        release: the table sits below :mod:`calcium.kernel`, which imports it, so building a kernel here is
        the one import upwards left in this module, and it goes with this method.
        """
        warnings.warn(f"IndicatorKinetics.kernel() is deprecated and will be removed in the next release; use "
                      f"calcium.kernel.Kernel.from_indicator({self.name!r}) (or Kernel.from_indicator(row))",
                      DeprecationWarning, stacklevel=2)
        from .kernel import Kernel  # deprecated shim: the only upward import of this module, removed with it

        return Kernel.from_indicator(self)


_TIME_TO_PEAK_NOTE = ("The rise figure is recalled as a single-spike rise time and stored as a time to peak: read "
                      "as a half-rise time, no difference of exponentials with this half-decay time could have it "
                      "(half-rise / half-decay must stay below 0.138).  The kernel's own half-rise (about a "
                      "fifth of the time to peak) is then faster than the measured onset: a difference of "
                      "exponentials cannot follow the delayed, sigmoid onset of these slow sensors.")

_CHEN_2013 = "Chen et al. 2013, Nature 499:295, Fig. 3 and Supplementary Table 3; values " + _MEMORY_CAVEAT
_DANA_2019 = "Dana et al. 2019, Nat Methods 16:649, Fig. 3 (in vivo single spikes); values " + _MEMORY_CAVEAT
_ZHANG_2023 = ("Zhang et al. 2023, Nature 615:884, Fig. 3 (in vivo single spikes); values " + _MEMORY_CAVEAT)
_ZHANG_2023_RISE_NOTE = ("The half-rise here (recalled as the in-vivo single-spike value) is not the 2 ms of the "
                         "paper's abstract (looked up): that figure is the family's fastest half-rise, measured in "
                         "another condition; the two numbers are different measurements, not a typo of one "
                         "another. Check the cited figure before quantitative use.")

INDICATORS: tuple[IndicatorKinetics, ...] = (
    IndicatorKinetics(
        name="GCaMP3", kind="protein", dff_single_spike=0.05, half_decay_s=0.52, half_rise_s=None,
        time_to_peak_s=0.15, conditions=_IN_VIVO_V1 + "; half-decay after the end of a visual stimulus",
        temperature_c=37.0,
        source=("Tian et al. 2009, Nat Methods 6:875 (single-spike amplitude and rise, " + _MEMORY_CAVEAT + "); "
                "half-decay 520 ms from Akerboom et al. 2012, J Neurosci 32:13819, Fig. 8I (looked up: median "
                "after visual-stimulus offset, 10% most responsive cells, not a single-spike value)"),
        from_memory=True, aliases=("GCaMP-3",),
        notes="Single spikes are often below the noise with GCaMP3 in vivo.",
    ),
    IndicatorKinetics(
        name="GCaMP6s", kind="protein", dff_single_spike=0.23, half_decay_s=0.55, half_rise_s=None,
        time_to_peak_s=0.179, conditions=_IN_VIVO_V1, temperature_c=37.0,
        source=_CHEN_2013,
        from_memory=True, kd_nm=144.0, hill_n=2.90, aliases=("GCaMP6-slow",), notes=_TIME_TO_PEAK_NOTE,
    ),
    IndicatorKinetics(
        name="GCaMP6m", kind="protein", dff_single_spike=0.13, half_decay_s=0.27, half_rise_s=None,
        time_to_peak_s=0.08, conditions=_IN_VIVO_V1, temperature_c=37.0,
        source=_CHEN_2013,
        from_memory=True, kd_nm=167.0, hill_n=2.96, aliases=("GCaMP6-medium",), notes=_TIME_TO_PEAK_NOTE,
    ),
    IndicatorKinetics(
        name="GCaMP6f", kind="protein", dff_single_spike=0.19, half_decay_s=0.142, half_rise_s=None,
        time_to_peak_s=0.045, conditions=_IN_VIVO_V1, temperature_c=37.0,
        source=_CHEN_2013,
        from_memory=True, kd_nm=375.0, hill_n=2.27, aliases=("GCaMP6-fast",), notes=_TIME_TO_PEAK_NOTE,
    ),
    IndicatorKinetics(
        name="jGCaMP7f", kind="protein", dff_single_spike=0.2, half_decay_s=0.27, half_rise_s=0.027,
        time_to_peak_s=None, conditions=_IN_VIVO_V1, temperature_c=37.0,
        source=_DANA_2019,
        from_memory=True, aliases=("GCaMP7f",),
    ),
    IndicatorKinetics(
        name="jGCaMP7s", kind="protein", dff_single_spike=0.4, half_decay_s=1.26, half_rise_s=0.07,
        time_to_peak_s=None, conditions=_IN_VIVO_V1, temperature_c=37.0,
        source=_DANA_2019,
        from_memory=True, aliases=("GCaMP7s",),
    ),
    IndicatorKinetics(
        name="jGCaMP8f", kind="protein", dff_single_spike=0.1, half_decay_s=0.0674, half_rise_s=0.0071,
        time_to_peak_s=None, conditions=_IN_VIVO_V1, temperature_c=37.0,
        source=_ZHANG_2023,
        from_memory=True, aliases=("GCaMP8f",), notes=_ZHANG_2023_RISE_NOTE,
    ),
    IndicatorKinetics(
        name="jGCaMP8m", kind="protein", dff_single_spike=0.18, half_decay_s=0.1183, half_rise_s=0.0071,
        time_to_peak_s=None, conditions=_IN_VIVO_V1, temperature_c=37.0,
        source=_ZHANG_2023,
        from_memory=True, aliases=("GCaMP8m",), notes=_ZHANG_2023_RISE_NOTE,
    ),
    IndicatorKinetics(
        name="jGCaMP8s", kind="protein", dff_single_spike=0.3, half_decay_s=0.3067, half_rise_s=0.0101,
        time_to_peak_s=None, conditions=_IN_VIVO_V1, temperature_c=37.0,
        source=_ZHANG_2023,
        from_memory=True, aliases=("GCaMP8s",), notes=_ZHANG_2023_RISE_NOTE,
    ),
    IndicatorKinetics(
        name="OGB-1", kind="synthetic dye", dff_single_spike=0.07, half_decay_s=0.6, half_rise_s=0.005,
        time_to_peak_s=None,
        conditions="rat/mouse neocortex layer 2/3 neurons, in vivo, AM-ester bulk loading, two-photon imaging",
        temperature_c=37.0,
        source=("Kerr et al. 2005, PNAS 102:14063 (single-spike transients in vivo); values " + _MEMORY_CAVEAT
                + "; Kd from the dye maker's handbook, from memory"),
        from_memory=True, kd_nm=170.0, hill_n=1.0, aliases=("OGB1", "Oregon Green BAPTA-1", "OGB-1 AM"),
        notes=("Akerboom et al. 2012, J Neurosci 32:13819, Fig. 8I (looked up) report a 1510 ms half-decay after "
               "visual-stimulus offset in vivo (many spikes), slower than the single-spike value here."),
    ),
    IndicatorKinetics(
        name="Cal-520", kind="synthetic dye", dff_single_spike=0.1, half_decay_s=0.5, half_rise_s=0.005,
        time_to_peak_s=None,
        conditions="mouse neocortex layer 2/3 neurons, in vivo, AM-ester bulk loading, two-photon imaging",
        temperature_c=37.0,
        source=("Tada et al. 2014, Eur J Neurosci 39:1720 (single-spike transients in vivo); values "
                + _MEMORY_CAVEAT + "; Kd from the dye maker's data sheet, from memory"),
        from_memory=True, kd_nm=320.0, hill_n=1.0, aliases=("Cal520", "Cal-520 AM"),
    ),
)


def _key(name: str) -> str:
    return "".join(ch for ch in str(name).lower() if ch.isalnum())


def _lookup() -> dict[str, IndicatorKinetics]:
    table = {}
    for row in INDICATORS:
        for alias in (row.name, *row.aliases):
            key = _key(alias)
            if key in table and table[key] is not row:
                raise RuntimeError(f"indicator name {alias!r} is used by two rows")  # table error, not user input
            table[key] = row
    return table


_BY_KEY = _lookup()


def indicator_names() -> tuple[str, ...]:
    """Names of the tabulated indicators, in table order."""
    return tuple(row.name for row in INDICATORS)


def get_indicator(name: str) -> IndicatorKinetics:
    """The table row of an indicator, by name (case, spaces and dashes ignored).

    Parameters
    ----------
    name : str
        E.g. ``"GCaMP6s"``, ``"gcamp6s"``, ``"OGB1"``.

    Returns
    -------
    IndicatorKinetics

    Raises
    ------
    ValueError
        For an unknown name; the message lists the known names.

    Examples
    --------
    >>> get_indicator("gcamp6f").name
    'GCaMP6f'
    """
    if not isinstance(name, str):
        raise ValueError(f"indicator must be a name (str), got {name!r}")
    row = _BY_KEY.get(_key(name))
    if row is None:
        raise ValueError(f"unknown indicator {name!r}; known indicators: {', '.join(indicator_names())}")
    return row
