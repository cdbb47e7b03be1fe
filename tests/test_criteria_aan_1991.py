"""AAN 1991 research criteria for CIDP, electrodiagnostic part (≥ 3 of 4 items).

Source of every threshold below: Ad Hoc Subcommittee of the American Academy of Neurology AIDS Task Force,
Research criteria for diagnosis of CIDP, Neurology 1991;41:617–618 (citation from memory, not verified; the
thresholds verified in a J Neurol Neurosurg Psychiatry table reproducing the criteria — reference sheet S13).
Written "AAN 1991 (Neurology 1991)" beside each test.

Normal limits: Preston & Shapiro appendix defaults (median DML ULN 4.4 ms, CMAP LLN 4.0 mV, CV LLN 49 m/s,
F ULN 31 ms; ulnar DML 3.3 ms, CMAP 6.0 mV, F 32 ms). All nerve values are invented test data.
"""

from __future__ import annotations

import pytest

from criteria_cases import Motor, Sensory, Visit, evaluate, finding, healthy_four_nerves, outcome
from tracker.criteria.model import MET, NOT_APPLICABLE, NOT_EVALUABLE, NOT_MET, Settings

ID = "aan-1991-cidp"
ULNAR = dict(amplitudes=(9.0, 8.6, 8.4), durations=(5.5, 5.8, 6.0))


def test_healthy_study_meets_no_item():
    # AAN 1991 (Neurology 1991): a normal invented study meets none of the four items
    result = evaluate([Visit(healthy_four_nerves())], ID)
    assert outcome(result) == "not_met"
    assert outcome(result, "items_met") == 0
    assert not (result.findings["status"] == MET).any()
    assert list(result.outcomes.columns) == ["visit_key", "outcome", "rule", "items_met", "undecided_items"]
    assert result.extra_keys == ("items_met",)


# --- item 1: conduction velocity -------------------------------------------------------------------------


@pytest.mark.parametrize("latency_2, status", [(8.49, NOT_MET), (8.5, NOT_MET), (8.51, MET)])
def test_velocity_below_eighty_percent_of_lln(latency_2, status):
    # AAN 1991 (Neurology 1991): CV < 80 % of LLN when CMAP > 80 % of LLN; 0.8 × 49 = 39.2 m/s.
    # 196 mm over 4.99 / 5.00 / 5.01 ms = 39.28 / 39.20 / 39.12 m/s (distal CMAP 8 mV, normal amplitude)
    median = Motor("median", latencies=(3.5, latency_2), segment_mm=196)
    result = evaluate([Visit([median])], ID)
    row = finding(result, "median", "cv")
    assert row["status"] == status
    assert row["threshold"] == 39.2
    assert row["segment"] == "wrist → elbow"


@pytest.mark.parametrize("latency_2, status", [(13.49, NOT_MET), (13.5, NOT_MET), (13.51, MET)])
def test_velocity_below_seventy_percent_of_lln_when_cmap_is_low(latency_2, status):
    # AAN 1991 (Neurology 1991): CV < 70 % of LLN when CMAP < 80 % of LLN; 0.7 × 49 = 34.3 m/s.
    # 343 mm over 9.99 / 10.00 / 10.01 ms = 34.33 / 34.30 / 34.27 m/s; distal CMAP 3.0 mV < 3.2 mV
    median = Motor("median", latencies=(3.5, latency_2), segment_mm=343, amplitudes=(3.0, 2.9))
    row = finding(evaluate([Visit([median])], ID), "median", "cv")
    assert row["status"] == status
    assert row["threshold"] == 34.3


@pytest.mark.parametrize("distal, status", [(3.19, NOT_MET), (3.2, MET), (3.21, MET)])
def test_velocity_amplitude_switch_at_eighty_percent_of_lln(distal, status):
    # AAN 1991 (Neurology 1991): the switch is 80 % of the CMAP LLN (0.8 × 4.0 = 3.2 mV). Exactly 80 % is not
    # covered by "> 80 %" / "< 80 %"; project decision: it takes the normal-amplitude branch (< 39.2 m/s).
    # CV 180 mm / 5.0 ms = 36 m/s: met on the normal branch (< 39.2), not on the low branch (< 34.3).
    median = Motor("median", latencies=(3.5, 8.5), segment_mm=180, amplitudes=(distal, distal - 0.1))
    assert finding(evaluate([Visit([median])], ID), "median", "cv")["status"] == status


def test_velocity_needs_two_nerves():
    # AAN 1991 (Neurology 1991): item 1 needs reduced CV in ≥ 2 motor nerves
    one = evaluate([Visit([Motor("median", cv=35.0), Motor("ulnar", **ULNAR)])], ID)
    two = evaluate([Visit([Motor("median", cv=35.0), Motor("ulnar", cv=35.0, **ULNAR)])], ID)
    assert finding(one, "median", "cv")["status"] == MET
    assert outcome(one, "items_met") == 0
    assert outcome(two, "items_met") == 1
    assert "1 (conduction velocity)" in outcome(two, "rule")


# --- item 3: distal motor latency ------------------------------------------------------------------------


@pytest.mark.parametrize("dml, status", [(5.49, NOT_MET), (5.5, NOT_MET), (5.51, MET)])
def test_distal_latency_above_125_percent_of_uln(dml, status):
    # AAN 1991 (Neurology 1991): DML > 125 % of ULN when CMAP > 80 % of LLN; 1.25 × 4.4 = 5.5 ms (strict)
    row = finding(evaluate([Visit([Motor("median", dml=dml)])], ID), "median", "dml")
    assert row["status"] == status
    assert row["threshold"] == 5.5


@pytest.mark.parametrize("dml, status", [(6.59, NOT_MET), (6.6, NOT_MET), (6.61, MET)])
def test_distal_latency_above_150_percent_of_uln_when_cmap_is_low(dml, status):
    # AAN 1991 (Neurology 1991): DML > 150 % of ULN when CMAP < 80 % of LLN; 1.5 × 4.4 = 6.6 ms (strict)
    row = finding(evaluate([Visit([Motor("median", dml=dml, amplitudes=(3.0, 2.9))])], ID), "median", "dml")
    assert row["status"] == status
    assert row["threshold"] == 6.6
    assert "distal CMAP < 80 % of LLN" in row["limit_name"]


@pytest.mark.parametrize("distal, status", [(3.19, NOT_MET), (3.2, MET), (3.21, MET)])
def test_distal_latency_amplitude_switch_at_eighty_percent_of_lln(distal, status):
    # AAN 1991 (Neurology 1991): DML 6.0 ms is > 5.5 ms (125 % branch) but not > 6.6 ms (150 % branch);
    # exactly 3.2 mV (80 % of LLN 4.0 mV) takes the normal-amplitude branch (project decision).
    median = Motor("median", dml=6.0, amplitudes=(distal, distal - 0.1))
    assert finding(evaluate([Visit([median])], ID), "median", "dml")["status"] == status


def test_wrist_entrapment_does_not_remove_the_median_latency_by_default():
    # AAN 1991 (Neurology 1991) item 3 has no wrist-entrapment exclusion (as restated in the
    # JNNP table of the reference sheet, S13): the publication's reading is the default and
    # the trace says the mark was not applied
    row = finding(evaluate([Visit([Motor("median", dml=7.0, wrist_entrapment=True)])], ID), "median", "dml")
    assert row["status"] == MET
    assert "no such exclusion" in row["reason"] and "aan_wrist_exclusion off" in row["reason"]


def test_wrist_entrapment_exclusion_is_a_named_setting():
    # project rule carried over from EFNS/PNS 2010 (Van den Bergh et al., Eur J Neurol 2010), off by default
    result = evaluate(
        [Visit([Motor("median", dml=7.0, wrist_entrapment=True)])], ID, Settings(aan_wrist_exclusion=True)
    )
    row = finding(result, "median", "dml")
    assert row["status"] == NOT_APPLICABLE and "aan_wrist_exclusion on" in row["reason"]
    unmarked = finding(
        evaluate([Visit([Motor("median", dml=7.0)])], ID, Settings(aan_wrist_exclusion=True)), "median", "dml"
    )
    assert unmarked["status"] == MET and unmarked["reason"] in ("", None)


# --- item 4: F-waves -------------------------------------------------------------------------------------


@pytest.mark.parametrize("f, status", [(37.19, NOT_MET), (37.2, NOT_MET), (37.21, MET)])
def test_f_latency_above_120_percent_of_uln(f, status):
    # AAN 1991 (Neurology 1991): minimal F > 120 % of ULN when CMAP > 80 % of LLN; 1.2 × 31 = 37.2 ms
    row = finding(evaluate([Visit([Motor("median", f_latency=f)])], ID), "median", "f_latency")
    assert row["status"] == status
    assert row["threshold"] == 37.2


@pytest.mark.parametrize("f, status", [(46.49, NOT_MET), (46.5, NOT_MET), (46.51, MET)])
def test_f_latency_above_150_percent_of_uln_when_cmap_is_low(f, status):
    # AAN 1991 (Neurology 1991): minimal F > 150 % of ULN when CMAP < 80 % of LLN; 1.5 × 31 = 46.5 ms
    row = finding(
        evaluate([Visit([Motor("median", f_latency=f, amplitudes=(3.0, 2.9))])], ID), "median", "f_latency"
    )
    assert row["status"] == status
    assert row["threshold"] == 46.5


@pytest.mark.parametrize("distal, status", [(3.19, NOT_MET), (3.2, MET), (3.21, MET)])
def test_f_latency_amplitude_switch_at_eighty_percent_of_lln(distal, status):
    # AAN 1991 (Neurology 1991): F 40 ms is > 37.2 (120 %) but not > 46.5 (150 %); 3.2 mV = 80 % of LLN
    median = Motor("median", f_latency=40.0, amplitudes=(distal, distal - 0.1))
    assert finding(evaluate([Visit([median])], ID), "median", "f_latency")["status"] == status


def test_absent_f_waves_count_with_a_recordable_cmap():
    # AAN 1991 (Neurology 1991): "F-waves absent" counts for item 4 (no amplitude condition in the text)
    low = evaluate([Visit([Motor("median", f_absent=True, amplitudes=(0.5, 0.4))])], ID)
    assert finding(low, "median", "f_absent")["status"] == MET
    assert finding(low, "median", "f_latency")["status"] == NOT_APPLICABLE


def test_absent_f_waves_without_a_motor_response_are_not_counted():
    # project rule: no distal CMAP at all is inexcitability, not an AAN 1991 (Neurology 1991) F-wave finding
    dead = Motor("median", f_absent=True, dml=None, cv=None, amplitudes=(0.0, 0.0))
    row = finding(evaluate([Visit([dead])], ID), "median", "f_absent")
    assert row["status"] == NOT_APPLICABLE
    assert "no recordable response" in row["reason"]


def test_f_waves_not_recorded_are_not_evaluable_never_normal():
    # AAN 1991 (Neurology 1991) item 4 cannot be judged without F-waves
    result = evaluate([Visit([Motor("median", f_latency=None)])], ID)
    assert finding(result, "median", "f_latency")["status"] == NOT_EVALUABLE
    assert finding(result, "median", "f_absent")["status"] == NOT_EVALUABLE
    assert finding(result, "median", "f_absent")["reason"] == "F-waves not recorded"


def test_absent_and_prolonged_f_waves_pool_to_two_nerves():
    # AAN 1991 (Neurology 1991): "F-waves absent or prolonged in ≥ 2 motor nerves" — one of each counts
    nerves = [
        Motor("median", f_absent=True),
        Motor("ulnar", f_latency=38.5, **ULNAR),
    ]  # ulnar 1.2 × 32 = 38.4 ms
    result = evaluate([Visit(nerves)], ID)
    assert outcome(result, "items_met") == 1
    assert "4 (F-waves)" in outcome(result, "rule")


# --- item 2: partial block or abnormal dispersion --------------------------------------------------------


@pytest.mark.parametrize("proximal, status", [(6.41, NOT_MET), (6.4, NOT_MET), (6.39, MET)])
def test_block_needs_more_than_twenty_percent_drop(proximal, status):
    # AAN 1991 (Neurology 1991): > 20 % drop of negative-peak area or amplitude, median wrist → elbow.
    # 8.0 → 6.41 / 6.40 / 6.39 mV = 19.875 / 20.0 / 20.125 % (areas follow the amplitudes)
    row = finding(
        evaluate([Visit([Motor("median", amplitudes=(8.0, proximal), durations=(5.0, 5.2))])], ID),
        "median",
        "cb_td",
    )
    assert row["status"] == status
    assert row["threshold"] == 20
    assert row["segment"] == "wrist → elbow"


@pytest.mark.parametrize("proximal_area, status", [(16.01, NOT_MET), (16.0, NOT_MET), (15.99, MET)])
def test_block_by_area_alone(proximal_area, status):
    # AAN 1991 (Neurology 1991): "area or amplitude" — amplitude drop 12.5 %
    # only, area 20.0 → 16.01/16.0/15.99
    median = Motor("median", amplitudes=(8.0, 7.0), areas=(20.0, proximal_area), durations=(5.0, 5.2))
    assert finding(evaluate([Visit([median])], ID), "median", "cb_td")["status"] == status


@pytest.mark.parametrize(
    "proximal_duration, label",
    [(5.74, "partial conduction block"), (5.75, "partial conduction block"), (5.76, "dispersion")],
)
def test_duration_change_of_fifteen_percent_labels_block_or_dispersion(proximal_duration, label):
    # AAN 1991 (Neurology 1991): < 15 % duration change = partial block, > 15 % = dispersion
    # and possible block; both count. 5.0 → 5.75 ms is exactly +15 %: project decision,
    # labelled block (dispersion needs > 15 %).
    median = Motor("median", amplitudes=(8.0, 6.0), durations=(5.0, proximal_duration))  # 25 % drop
    row = finding(evaluate([Visit([median])], ID), "median", "cb_td")
    assert row["status"] == MET
    assert label in row["reason"]


def test_missing_area_is_judged_on_amplitude_and_says_so():
    # AAN 1991 (Neurology 1991): area or amplitude; the missing area is named in the trace
    median = Motor("median", amplitudes=(8.0, 6.0), areas=(None, None), durations=(5.0, 5.2))
    row = finding(evaluate([Visit([median])], ID), "median", "cb_td")
    assert row["status"] == MET
    assert "area not recorded" in row["reason"]


@pytest.mark.parametrize(
    "nerve, distal, proximal, status",
    [
        ("ulnar", 10.0, 8.0, NOT_MET),
        ("ulnar", 10.0, 7.99, MET),  # exactly 20 % / 20.1 %, wrist → below elbow
        ("fibular", 5.0, 4.0, NOT_MET),
        ("fibular", 5.0, 3.99, MET),  # exactly 20 % / 20.2 %, ankle → below fibular head
    ],
)
def test_block_threshold_in_the_ulnar_and_peroneal_segments(nerve, distal, proximal, status):
    # AAN 1991 (Neurology 1991): > 20 % drop (strict) in each of the three named segments
    motor = Motor(nerve, amplitudes=(distal, proximal, proximal), durations=(5.0, 5.2, 5.3), dml=3.0, cv=50)
    assert finding(evaluate([Visit([motor])], ID), nerve, "cb_td")["status"] == status


def test_ulnar_stimulated_only_above_the_elbow_is_not_evaluable():
    # AAN 1991 (Neurology 1991): ulnar block is judged wrist → below elbow only; wrist → above elbow crosses
    # the elbow, so a 50 % fall there is not used
    ulnar = Motor(
        "ulnar", amplitudes=(8.0, 4.0), durations=(5.5, 5.8), labels=("wrist", "above_elbow"), dml=2.8
    )
    row = finding(evaluate([Visit([ulnar])], ID), "ulnar", "cb_td")
    assert row["status"] == NOT_EVALUABLE
    assert "standard segment" in row["reason"]


def test_block_across_the_ulnar_elbow_does_not_count():
    # AAN 1991 (Neurology 1991): ulnar only wrist → below elbow. 8.0 → 7.8 mV (2.5 %), then 7.8 → 3.0 mV
    # across the elbow (61.5 %), which the criteria leave out — also with the wider block-path setting.
    ulnar = Motor("ulnar", amplitudes=(8.0, 7.8, 3.0), durations=(5.5, 5.6, 5.8), dml=2.8)
    for settings in (None, Settings(block_path="outside_entrapment"), Settings(block_path="standard")):
        row = finding(evaluate([Visit([ulnar])], ID, settings), "ulnar", "cb_td")
        assert row["status"] == NOT_MET
        assert row["segment"] == "wrist → below_elbow"
        assert row["value"] == 2.5


def test_block_in_the_upper_arm_does_not_count():
    # AAN 1991 (Neurology 1991): median only wrist → elbow; a fall elbow → axilla is outside the item
    median = Motor(
        "median", amplitudes=(8.0, 7.8, 3.0), durations=(5.5, 5.6, 5.8), labels=("wrist", "elbow", "axilla")
    )
    assert finding(evaluate([Visit([median])], ID), "median", "cb_td")["status"] == NOT_MET


def test_peroneal_block_counts_only_below_the_fibular_head():
    # AAN 1991 (Neurology 1991): peroneal ankle → below fibular head
    below = Motor(
        "fibular", amplitudes=(5.0, 3.5, 3.4), durations=(5.5, 5.8, 5.9), dml=4.5, cv=48
    )  # 30 % drop
    across = Motor(
        "fibular", amplitudes=(5.0, 4.8, 2.0), durations=(5.5, 5.8, 5.9), dml=4.5, cv=48
    )  # fall across the head
    assert finding(evaluate([Visit([below])], ID), "fibular", "cb_td")["status"] == MET
    assert finding(evaluate([Visit([across])], ID), "fibular", "cb_td")["status"] == NOT_MET


def test_tibial_block_is_outside_the_item():
    # AAN 1991 (Neurology 1991) names peroneal, median and ulnar segments only
    tibial = Motor("tibial", amplitudes=(10.0, 4.0), durations=(5.5, 6.0), cv=46, segment_mm=400, dml=4.5)
    row = finding(evaluate([Visit([tibial])], ID), "tibial", "cb_td")
    assert row["status"] == NOT_APPLICABLE
    assert "only peroneal, median and ulnar" in row["reason"]


def test_block_without_proximal_stimulation_is_not_evaluable():
    # AAN 1991 (Neurology 1991) item 2 needs the proximal site of the standard segment
    row = finding(
        evaluate([Visit([Motor("median", amplitudes=(8.0,), durations=(5.5,))])], ID), "median", "cb_td"
    )
    assert row["status"] == NOT_EVALUABLE
    assert "proximal" in row["reason"]


# --- combination: ≥ 3 of 4 items ------------------------------------------------------------------------


def _demyelinating(f_median: float, f_ulnar: float) -> list:
    """Invented: CV 35 m/s (< 39.2) and DML above 125 % of ULN in median and ulnar; F as given."""
    return [
        Motor("median", dml=5.6, cv=35.0, f_latency=f_median),  # 5.6 > 5.5 ms
        Motor("ulnar", dml=4.2, cv=35.0, f_latency=f_ulnar, **ULNAR),  # 4.2 > 4.125 ms
    ]


def test_two_items_are_not_enough():
    # AAN 1991 (Neurology 1991): at least 3 of the 4 items; CV and DML (items 1 and 3) only → not met
    result = evaluate([Visit(_demyelinating(28.0, 28.0))], ID)
    assert outcome(result, "items_met") == 2
    assert outcome(result) == "not_met"


def test_three_items_are_met():
    # AAN 1991 (Neurology 1991): adding prolonged F in both nerves (38 > 37.2 ms,
    # 39 > 38.4 ms) → 3 items → met
    result = evaluate([Visit(_demyelinating(38.0, 39.0))], ID)
    assert outcome(result, "items_met") == 3
    assert outcome(result) == "met"
    assert outcome(result, "rule").startswith("3 of 4 items met")


def test_four_items():
    # AAN 1991 (Neurology 1991): a 25 % median forearm drop adds item 2
    nerves = _demyelinating(38.0, 39.0)
    nerves[0].amplitudes = (8.0, 6.0)
    result = evaluate([Visit(nerves)], ID)
    assert outcome(result, "items_met") == 4
    assert isinstance(result.outcomes["items_met"].iloc[0].item(), int)


def test_missing_data_is_not_evaluable_and_leaves_the_outcome_unsettled():
    # AAN 1991 (Neurology 1991): CV and DML met (2 items); F-waves not
    # recorded → item 4 undecided, never normal
    result = evaluate([Visit(_demyelinating(None, None))], ID)
    assert finding(result, "median", "f_latency")["status"] == NOT_EVALUABLE
    # DESIGN.md §5: missing data that could make the set met leave it undecided, the items listed
    assert outcome(result) == "undecided"
    assert "undecided" in outcome(result, "rule")
    assert "4 (F-waves)" in outcome(result, "rule")
    assert {f["item"] for f in outcome(result, "undecided_items")} == {"f_latency", "f_absent"}


def test_unknown_distal_amplitude_leaves_the_threshold_unchosen():
    # AAN 1991 (Neurology 1991): the thresholds depend on the CMAP; without it the finding is not evaluable
    median = Motor("median", dml=6.0, amplitudes=(None, None))
    row = finding(evaluate([Visit([median])], ID), "median", "dml")
    assert row["status"] == NOT_EVALUABLE
    assert "cannot be chosen" in row["reason"]


def test_visits_are_evaluated_independently():
    # AAN 1991 (Neurology 1991): one row per visit, each with its own item count
    result = evaluate(
        [Visit(_demyelinating(38.0, 39.0)), Visit(healthy_four_nerves(), visit_date="2024-06-01")], ID
    )
    assert sorted(result.outcomes["items_met"].tolist()) == [0, 3]
    assert sorted(result.outcomes["outcome"].tolist()) == ["met", "not_met"]


def test_visit_without_motor_nerves_says_so():
    # AAN 1991 (Neurology 1991): all four items are motor; a sensory-only visit cannot meet them
    result = evaluate([Visit([Sensory("median")])], ID)
    assert outcome(result) == "not_met"
    assert outcome(result, "items_met") == 0
    assert "no motor nerve studied" in outcome(result, "rule")
