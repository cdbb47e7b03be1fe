"""Segment arithmetic against hand-worked examples, and the floating-point comparison rule."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from tracker.domain.conduction import (
    Site,
    at_least,
    at_most,
    greater_than,
    increase_pct,
    less_than,
    quantise,
    quantise_array,
    reduction_pct,
    summarise_nerve,
    velocity_m_per_s,
)


# Published case values: GBS patient, CMAJ case-report table, as transcribed in the reference sheet
# (shared/reference/criteria.md §7.2, source S32; authors not verified). Left ulnar (ADM): below elbow 8.3 ms,
# 5.0 mV; above elbow 11.4 ms, 4.8 mV; 110 mm apart; the table prints CV 35 m/s.
def test_ulnar_segment_of_published_gbs_case():
    below = Site(order=2, label="below_elbow", distance_mm=200.0, latency_ms=8.3, amplitude=5.0)
    above = Site(order=3, label="above_elbow", distance_mm=110.0, latency_ms=11.4, amplitude=4.8)
    wrist = Site(order=1, label="wrist", distance_mm=70.0, latency_ms=3.1, amplitude=5.2)
    summary = summarise_nerve("motor", [above, wrist, below])  # order of input must not matter
    segment = summary.segments[1]
    assert segment.name == "below_elbow → above_elbow"
    assert segment.velocity_m_per_s == pytest.approx(35.48, abs=0.01)  # 110 / 3.1 = 35.48…, printed as 35
    assert round(segment.velocity_m_per_s) == 35
    assert segment.amplitude_reduction_pct == pytest.approx(4.0)  # (5.0 − 4.8) / 5.0 = 4 % (no block)
    assert summary.distal_latency_ms == 3.1
    assert summary.distal_amplitude == 5.2


# Same source: left fibular (tibialis anterior), fibular head 4.5 ms → popliteal
# fossa 7.5 ms, 100 mm; printed CV 33.
def test_fibular_segment_of_published_gbs_case():
    assert velocity_m_per_s(100.0, 7.5 - 4.5) == pytest.approx(33.33, abs=0.01)
    assert reduction_pct(3.8, 3.8) == 0.0


def test_motor_velocity_is_millimetres_per_millisecond():
    # Common practice, no source: CV (m/s) = distance (mm) / latency difference
    # (ms); 230 mm over 4.6 ms = 50 m/s.
    assert velocity_m_per_s(230.0, 4.6) == 50.0


def test_sensory_velocity_uses_onset_latency():
    # Common practice (DESIGN.md §4.1): sensory CV = stimulation-to-recording distance / onset latency.
    site = Site(
        order=1, label="wrist", distance_mm=130.0, latency_ms=2.6, amplitude=25.0, peak_latency_ms=3.3
    )
    summary = summarise_nerve("sensory", [site])
    assert summary.sensory_velocity_m_per_s == 50.0
    assert summary.segments == ()


def test_duration_increase_and_area_reduction():
    # Hand-worked: duration 5.0 → 6.5 ms is +30 %; area 20 → 8 mV·ms is −60 %.
    assert increase_pct(5.0, 6.5) == 30.0
    assert reduction_pct(20.0, 8.0) == 60.0


@pytest.mark.parametrize(
    "distance, difference",
    [(None, 3.0), (100.0, None), (100.0, 0.0), (100.0, -0.5)],
)
def test_velocity_missing_or_impossible_is_none(distance, difference):
    assert velocity_m_per_s(distance, difference) is None


def test_no_response_gives_no_latency_and_no_velocity():
    distal = Site(order=1, label="ankle", distance_mm=90.0, latency_ms=None, amplitude=0.0)
    proximal = Site(order=2, label="popliteal_fossa", distance_mm=400.0, latency_ms=None, amplitude=0.0)
    summary = summarise_nerve("motor", [distal, proximal])
    assert summary.no_response
    assert summary.segments[0].velocity_m_per_s is None
    assert summary.segments[0].amplitude_reduction_pct is None  # distal amplitude 0: no ratio exists


# The comparison rule (tracker.domain.conduction docstring). Edge cases where plain binary floating point
# gives the clinically wrong answer.
def test_threshold_equal_in_decimal_is_equal_here():
    assert not (1.5 * 4.4 <= 6.6)  # plain float: 6.6000000000000005 > 6.6 — the bug the rule prevents
    assert at_least(
        6.6, 1.5 * 4.4
    )  # EFNS/PNS 2010: DML ≥ 150 % of ULN 4.4 ms (Van den Bergh, Eur J Neurol 2010)
    assert at_most(6.6, 1.5 * 4.4)
    assert not greater_than(6.6, 1.5 * 4.4)


def test_velocity_at_seventy_percent_of_lln():
    # EFNS/PNS 2010: CV ≤ 70 % of LLN; fibular LLN 44 m/s (Preston & Shapiro
    # appendix, from memory) → 30.8 m/s.
    assert not (30.8 <= 0.7 * 44)  # plain float: 0.7 × 44 = 30.799999999999997
    assert at_most(30.8, 0.7 * 44)
    assert not at_most(30.81, 0.7 * 44)
    assert at_most(30.79, 0.7 * 44)


def test_f_wave_at_one_hundred_thirty_percent_of_uln():
    # EFNS/PNS 2010: F ≥ 130 % of ULN; median ULN 31 ms (Preston & Shapiro appendix) → 40.3 ms.
    assert not (40.3 >= 1.3 * 31)  # plain float: 1.3 × 31 = 40.300000000000004
    assert at_least(40.3, 1.3 * 31)
    assert not at_least(40.29, 1.3 * 31)


def test_dispersion_exactly_thirty_percent_is_not_above():
    # EFNS/PNS 2010: temporal dispersion is a duration increase > 30 % (strict).
    # Hand-worked: 3.1 → 4.03 ms is exactly +30 % in decimal arithmetic.
    raw = (4.03 - 3.1) / 3.1 * 100
    assert raw > 30  # plain float: 30.000000000000004
    assert increase_pct(3.1, 4.03) == 30.0
    assert not greater_than(increase_pct(3.1, 4.03), 30)
    assert greater_than(increase_pct(3.1, 4.04), 30)


def test_missing_side_of_a_comparison_is_none_not_false():
    assert at_least(None, 4.4) is None
    assert less_than(3.0, None) is None


@given(st.floats(min_value=-1e6, max_value=1e6, allow_nan=False))
def test_vectorised_quantise_matches_scalar(value):
    assert quantise_array(np.array([value]))[0] == quantise(value)


@given(
    st.integers(min_value=1, max_value=99999),
    st.integers(min_value=1, max_value=99999),
    st.integers(min_value=1, max_value=300),
)
def test_ratio_equal_in_decimals_compares_equal(a, b, percent):
    # threshold = value × k, computed in two float orders; decimal equality must survive quantisation.
    value = a / 100
    threshold = value * percent / 100
    other_order = value * (percent / 100)
    assert quantise(threshold) == quantise(other_order)


def test_quantise_keeps_nan_in_arrays():
    result = quantise_array(np.array([1.0, math.nan]))
    assert result[0] == 1.0 and math.isnan(result[1])
