"""Tests of calcium.indicators: the table carries sources, names resolve, kernels match the table."""
import dataclasses
import re

import pytest

from calcium.indicators import INDICATORS, IndicatorKinetics, get_indicator, indicator_names
from calcium.kernel import Kernel

ROWS = {row.name: row for row in INDICATORS}


@pytest.mark.parametrize("row", INDICATORS, ids=lambda r: r.name)
def test_every_row_carries_a_source(row):
    assert isinstance(row.source, str) and row.source.strip()
    # a source names a year and a journal or other origin, not just a word
    assert any(str(year) in row.source for year in range(1980, 2030))


@pytest.mark.parametrize("row", INDICATORS, ids=lambda r: r.name)
def test_rows_recalled_from_memory_say_so_in_their_source(row):
    if row.from_memory:
        assert "from memory" in row.source


def test_a_row_without_a_source_or_with_an_unmarked_memory_value_is_refused():
    row = INDICATORS[0]
    with pytest.raises(ValueError, match="source"):
        dataclasses.replace(row, source="  ")
    with pytest.raises(ValueError, match="from memory"):
        dataclasses.replace(row, source="Some et al. 2020, Journal", from_memory=True)
    with pytest.raises(ValueError, match="exactly one"):
        dataclasses.replace(row, half_rise_s=0.01, time_to_peak_s=0.05)


def test_table_is_a_tuple_of_frozen_records():
    assert isinstance(INDICATORS, tuple) and all(isinstance(r, IndicatorKinetics) for r in INDICATORS)
    with pytest.raises(dataclasses.FrozenInstanceError):
        INDICATORS[0].half_decay_s = 1.0
    assert indicator_names() == tuple(r.name for r in INDICATORS)


def test_requested_indicators_are_tabulated():
    for name in ("GCaMP6s", "GCaMP6f", "GCaMP6m", "jGCaMP7f", "jGCaMP7s", "jGCaMP8f", "jGCaMP8m", "jGCaMP8s",
                 "OGB-1", "Cal-520", "GCaMP3"):
        assert name in ROWS


@pytest.mark.parametrize("row", INDICATORS, ids=lambda r: r.name)
def test_kernel_of_each_row_reproduces_its_tabulated_times_and_amplitude(row):
    kernel = Kernel.from_indicator(row)
    assert kernel.half_decay_s == pytest.approx(row.half_decay_s, rel=1e-9)
    if row.half_rise_s is not None:
        assert kernel.half_rise_s == pytest.approx(row.half_rise_s, rel=1e-9)
    else:
        assert kernel.time_to_peak_s == pytest.approx(row.time_to_peak_s, rel=1e-9)
    # peak ΔF/F of one spike is the tabulated value (by the Kernel's normalisation)
    assert float(kernel.evaluate(kernel.time_to_peak_s)) == pytest.approx(row.dff_single_spike, rel=1e-12)
    assert kernel.is_linear and 0 < kernel.rise_s < kernel.decay_s


def test_names_are_case_insensitive_and_aliases_resolve():
    assert get_indicator("gcamp6s") is ROWS["GCaMP6s"]
    assert get_indicator("JGCAMP8F") is ROWS["jGCaMP8f"]
    assert get_indicator("OGB1") is ROWS["OGB-1"]
    assert get_indicator("cal 520") is ROWS["Cal-520"]


def test_unknown_indicator_lists_the_known_names():
    with pytest.raises(ValueError) as err:
        get_indicator("GCaMP99")
    assert "GCaMP99" in str(err.value)
    for name in indicator_names():
        assert name in str(err.value)
    with pytest.raises(ValueError):
        get_indicator(6)


def test_kernel_from_indicator_with_overrides():
    base = Kernel.from_indicator("GCaMP6f")
    assert base == Kernel.from_indicator(ROWS["GCaMP6f"])
    rise_s, decay_s = ROWS["GCaMP6f"].time_constants()
    assert base == Kernel(rise_s, decay_s, ROWS["GCaMP6f"].dff_single_spike)
    changed = Kernel.from_indicator("gcamp6f", amplitude=0.5, dff_max=3.0)
    assert changed.amplitude == 0.5 and changed.dff_max == 3.0 and changed.decay_s == base.decay_s


def test_fast_medium_slow_variants_are_ordered_as_their_papers_name_them():
    # Chen et al. 2013 (Nature) name GCaMP6 f/m/s for fast/medium/slow kinetics; Zhang et al. 2023 (Nature)
    # likewise for jGCaMP8 f/m/s; Dana et al. 2019 (Nat Methods) for jGCaMP7 f/s.
    for family in (("GCaMP6f", "GCaMP6m", "GCaMP6s"), ("jGCaMP8f", "jGCaMP8m", "jGCaMP8s"), ("jGCaMP7f", "jGCaMP7s")):
        decays = [ROWS[name].half_decay_s for name in family]
        assert decays == sorted(decays)
    # Zhang et al. 2023 abstract (looked up): jGCaMP8 rises much faster than earlier GCaMPs.
    assert max(ROWS[n].half_rise_s for n in ("jGCaMP8f", "jGCaMP8m", "jGCaMP8s")) < min(
        ROWS[n].half_rise_s for n in ("jGCaMP7f", "jGCaMP7s"))


def test_kernel_from_a_row_of_ones_own_is_built_from_its_times():
    # a row that is not in the table: Kernel.from_indicator takes the record itself
    own = dataclasses.replace(ROWS["jGCaMP8m"], name="my sensor", aliases=(), dff_single_spike=0.42, half_decay_s=0.2)
    kernel = Kernel.from_indicator(own)
    assert kernel.amplitude == 0.42
    assert kernel.half_decay_s == pytest.approx(0.2, rel=1e-9)
    assert kernel.half_rise_s == pytest.approx(own.half_rise_s, rel=1e-9)
    with pytest.raises(ValueError, match="my sensor"):
        Kernel.from_indicator("my sensor")  # not in the table by name


@pytest.mark.parametrize("row", INDICATORS, ids=lambda r: r.name)
def test_deprecated_row_kernel_warns_and_gives_the_same_kernel(row):
    with pytest.warns(DeprecationWarning, match=re.escape(f"Kernel.from_indicator({row.name!r})")):
        kernel = row.kernel()
    assert kernel == Kernel.from_indicator(row.name)
    assert kernel.exponential_terms() == Kernel.from_indicator(row.name).exponential_terms()


def test_no_row_quotes_a_number_its_own_values_contradict_without_saying_why():
    # (a note that cites another figure for the same quantity must say they are different measurements)
    from calcium.indicators import INDICATORS

    for row in INDICATORS:
        text = row.source + " " + row.notes
        if "abstract" in text and "half-rise" in text:
            assert "different measurements" in row.notes, row.name
