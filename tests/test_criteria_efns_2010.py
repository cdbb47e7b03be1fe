"""EFNS/PNS 2010 CIDP criteria (Van den Bergh PYK et al., Eur J Neurol 2010;17:356–363; thresholds as
restated in Ann Clin Transl Neurol 2021;8:1110–1121, Table 2). Limits: Preston & Shapiro appendix
(median DML ULN 4.4 ms, CV LLN 49 m/s, CMAP LLN 4.0 mV, F ULN 31 ms — verified in the reference sheet)."""

from __future__ import annotations

import pytest

from criteria_cases import Motor, Sensory, Visit, evaluate, finding, healthy_four_nerves, outcome
from tracker.criteria.model import MET, NOT_APPLICABLE, NOT_EVALUABLE, NOT_MET

ID = "efns-pns-2010-cidp"


def test_healthy_study_meets_nothing():
    result = evaluate([Visit(healthy_four_nerves())], ID)
    assert outcome(result) == "not_met"
    assert not (result.findings["status"] == MET).any()


@pytest.mark.parametrize("dml, status", [(6.59, NOT_MET), (6.6, MET), (6.61, MET)])
def test_distal_latency_edge(dml, status):
    # ≥ 150 % of ULN 4.4 ms = 6.6 ms (binary float would make 1.5 × 4.4 = 6.6000000000000005)
    result = evaluate([Visit([Motor("median", dml=dml)])], ID)
    assert finding(result, "median", "dml")["status"] == status
    assert finding(result, "median", "dml")["threshold"] == 6.6


def test_two_nerves_with_long_latency_are_definite():
    result = evaluate(
        [
            Visit(
                [
                    Motor("median", dml=6.7),
                    Motor("ulnar", dml=5.0, amplitudes=(8.0, 7.6, 7.4), durations=(5.5, 5.7, 5.8)),
                ]
            )
        ],
        ID,
    )
    assert outcome(result) == "definite"
    assert outcome(result, "rule") == "(a) distal latency in ≥ 2 nerves"


def test_one_nerve_is_possible():
    result = evaluate(
        [
            Visit(
                [
                    Motor("median", dml=6.7),
                    Motor("ulnar", dml=2.8, amplitudes=(8.0, 7.6, 7.4), durations=(5.5, 5.7, 5.8)),
                ]
            )
        ],
        ID,
    )
    assert outcome(result) == "possible"


def test_wrist_entrapment_removes_the_median_latency():
    result = evaluate([Visit([Motor("median", dml=7.0, wrist_entrapment=True)])], ID)
    row = finding(result, "median", "dml")
    assert row["status"] == NOT_APPLICABLE and "wrist" in row["reason"]


def test_missing_latency_is_not_evaluable_never_normal():
    result = evaluate([Visit([Motor("median", dml=None, cv=None)])], ID)
    assert finding(result, "median", "dml")["status"] == NOT_EVALUABLE
    assert finding(result, "median", "cv")["status"] == NOT_EVALUABLE


def test_one_block_plus_another_parameter_in_another_nerve_is_definite():
    block = Motor("median", amplitudes=(6.0, 2.9), durations=(5.5, 5.8))  # 51.7 % reduction
    other = Motor("ulnar", dml=5.0, amplitudes=(8.0, 7.6, 7.4), durations=(5.5, 5.7, 5.8))  # DML ≥ 4.95 ms
    result = evaluate([Visit([block, other])], ID)
    assert finding(result, "median", "cb")["status"] == MET
    assert outcome(result) == "definite"
    assert (
        outcome(result, "rule") == "(e) conduction block in 1 nerve plus another parameter in another nerve"
    )


def test_block_and_other_parameter_in_the_same_nerve_is_only_possible():
    same = Motor("median", dml=6.8, amplitudes=(6.0, 2.9), durations=(5.5, 5.8))
    result = evaluate([Visit([same])], ID)
    assert outcome(result) == "possible"


def test_block_precondition_twenty_percent_of_lln():
    # distal CMAP must be ≥ 20 % of LLN 4.0 mV = 0.8 mV
    below = evaluate([Visit([Motor("median", amplitudes=(0.79, 0.3), durations=(5.5, 5.8))])], ID)
    at = evaluate([Visit([Motor("median", amplitudes=(0.8, 0.3), durations=(5.5, 5.8))])], ID)
    assert finding(below, "median", "cb")["status"] == NOT_APPLICABLE
    assert "precondition" in finding(below, "median", "cb")["reason"]
    assert finding(at, "median", "cb")["status"] == MET


def test_probable_block_excludes_the_tibial_nerve():
    result = evaluate(
        [Visit([Motor("tibial", amplitudes=(10.0, 6.0), durations=(5.5, 6.0), segment_mm=400, cv=46)])], ID
    )
    assert finding(result, "tibial", "probable_cb")["status"] == NOT_APPLICABLE
    assert "tibial" in finding(result, "tibial", "probable_cb")["reason"]


def test_ulnar_block_across_the_elbow_is_not_counted():
    # 60 % fall only between below and above the elbow (an entrapment segment)
    ulnar = Motor("ulnar", dml=2.8, amplitudes=(8.0, 7.8, 3.0), durations=(5.5, 5.6, 5.8))
    result = evaluate([Visit([ulnar])], ID)
    assert finding(result, "ulnar", "cb")["status"] == NOT_MET
    assert finding(result, "ulnar", "cb")["segment"] == "wrist → below_elbow"


@pytest.mark.parametrize("proximal, status", [(7.15, NOT_MET), (7.16, MET)])
def test_dispersion_is_strictly_above_thirty_percent(proximal, status):
    # 5.5 → 7.15 ms is exactly +30 % (not > 30 %)
    result = evaluate([Visit([Motor("median", durations=(5.5, proximal))])], ID)
    assert finding(result, "median", "td")["status"] == status


def test_f_wave_threshold_switches_below_eighty_percent_of_lln():
    # median ULN 31 ms: 130 % = 40.3 ms; with distal CMAP < 80 % of 4.0 mV
    # (3.2 mV) the cut-off is 150 % = 46.5 ms
    normal_cmap = evaluate([Visit([Motor("median", f_latency=40.3, amplitudes=(3.2, 3.0))])], ID)
    low_cmap = evaluate([Visit([Motor("median", f_latency=40.3, amplitudes=(3.19, 3.0))])], ID)
    assert finding(normal_cmap, "median", "f_latency")["status"] == MET
    assert finding(low_cmap, "median", "f_latency")["status"] == NOT_MET
    assert finding(low_cmap, "median", "f_latency")["threshold"] == 46.5


def test_absent_f_waves_need_twenty_percent_of_lln():
    counted = evaluate([Visit([Motor("median", f_absent=True, amplitudes=(0.8, 0.7))])], ID)
    not_counted = evaluate([Visit([Motor("median", f_absent=True, amplitudes=(0.79, 0.7))])], ID)
    assert finding(counted, "median", "f_absent")["status"] == MET
    assert finding(not_counted, "median", "f_absent")["status"] == NOT_APPLICABLE


def test_distal_duration_cut_offs_per_nerve():
    # median ≥ 6.6 ms, ulnar ≥ 6.7, fibular ≥ 7.6, tibial ≥ 8.8 (EFNS/PNS 2010 (g))
    nerves = [
        Motor("median", durations=(6.6, 6.8)),
        Motor("ulnar", durations=(6.69, 6.8, 6.9), amplitudes=(8, 7.8, 7.6)),
        Motor("fibular", durations=(7.6, 7.8, 7.9), amplitudes=(5, 4.8, 4.7), cv=48),
        Motor("tibial", durations=(8.79, 9.0), amplitudes=(10, 9), cv=46, segment_mm=400),
    ]
    result = evaluate([Visit(nerves)], ID)
    assert [
        finding(result, n, "dcmap_duration")["status"] for n in ("median", "ulnar", "fibular", "tibial")
    ] == [MET, NOT_MET, MET, NOT_MET]


def test_left_and_right_count_as_two_nerves_by_default():
    from tracker.criteria.model import Settings

    nerves = [Motor("median", side="left", dml=6.8), Motor("median", side="right", dml=6.8)]
    assert outcome(evaluate([Visit(nerves)], ID)) == "definite"
    assert outcome(evaluate([Visit(nerves)], ID, Settings(sides_are_separate_nerves=False))) == "possible"


def test_cold_limb_policy():
    from tracker.criteria.model import Settings

    cold = Motor("median", dml=6.8, temperature=31.0)
    kept = evaluate([Visit([cold])], ID)
    excluded = evaluate([Visit([cold])], ID, Settings(cold_limbs="exclude"))
    assert finding(kept, "median", "dml")["status"] == MET
    assert finding(excluded, "median", "dml")["status"] == NOT_EVALUABLE
    assert "cold" in finding(excluded, "median", "dml")["reason"]


def test_sensory_supportive_item():
    # sensory CV < 80 % of LLN 50 m/s = 40 m/s with a normal SNAP (median LLN 20 µV)
    slow = evaluate([Visit([Sensory("median", amplitude=25, cv=39.9)])], ID)
    edge = evaluate([Visit([Sensory("median", amplitude=25, cv=40.0)])], ID)
    assert outcome(slow, "sensory_supportive") == MET
    assert outcome(edge, "sensory_supportive") == NOT_MET


# ---- undecided (DESIGN.md §5): missing data that could meet an item are never "not met"


def _listed(result) -> set:
    return {(f["nerve"], f["item"]) for f in outcome(result, "undecided_items")}


def test_f_waves_not_recorded_leave_a_normal_study_undecided():
    # EFNS/PNS 2010 (Van den Bergh et al., Eur J Neurol 2010): one parameter in one nerve is "possible", so an
    # unrecorded F-wave study could change "not met"; invented study, normal otherwise
    nerves = healthy_four_nerves()
    nerves[0] = Motor("median", f_latency=None)
    result = evaluate([Visit(nerves)], ID)
    assert outcome(result) == "undecided"
    assert _listed(result) == {("median", "f_latency"), ("median", "f_absent")}
    complete = evaluate([Visit(healthy_four_nerves())], ID)
    assert outcome(complete) == "not_met" and outcome(complete, "undecided_items") == ()


@pytest.mark.parametrize("dml, expected", [(6.59, "undecided"), (6.6, "possible"), (6.61, "possible")])
def test_a_reached_level_stays_and_lists_what_could_raise_it(dml, expected):
    # EFNS/PNS 2010 (Van den Bergh et al., Eur J Neurol 2010): (a) distal latency ≥ 150 % of ULN
    # (median 4.4 ms → 6.6 ms) in ≥ 2 nerves is definite; one nerve is possible. The ulnar latency
    # is not recorded: it could make (a) two nerves, so the level is kept and the ulnar latency
    # listed; below the threshold it is undecided.
    ulnar = Motor("ulnar", amplitudes=(9.0, 8.6, 8.4), durations=(5.5, 5.8, 6.0), dml=None)
    result = evaluate([Visit([Motor("median", dml=dml), ulnar])], ID)
    assert outcome(result) == expected
    assert ("ulnar", "dml") in _listed(result)
    recorded = evaluate(
        [
            Visit(
                [
                    Motor("median", dml=dml),
                    Motor("ulnar", amplitudes=(9.0, 8.6, 8.4), durations=(5.5, 5.8, 6.0), dml=2.8),
                ]
            )
        ],
        ID,
    )
    assert (
        outcome(recorded) == ("not_met" if dml < 6.6 else "possible")
        and outcome(recorded, "undecided_items") == ()
    )


def test_not_applicable_items_never_leave_an_outcome_undecided():
    # EFNS/PNS 2010: tibial probable block is excluded (restated table, Ann Clin Transl Neurol 2021, Table 2)
    # and a distal CMAP below 20 % of LLN fails the block precondition — both settled, so "not met" stays
    tibial = Motor(
        "tibial", amplitudes=(10.0, 8.5), durations=(5.5, 6.5), dml=4.5, cv=46, f_latency=50, segment_mm=400
    )
    low = Motor("median", amplitudes=(0.79, 0.3), durations=(5.5, 5.8), dml=3.8, cv=55, f_latency=28)
    result = evaluate([Visit([tibial])], ID)
    assert finding(result, "tibial", "probable_cb")["status"] == NOT_APPLICABLE
    assert outcome(result) == "not_met" and outcome(result, "undecided_items") == ()
    assert finding(evaluate([Visit([low])], ID), "median", "cb")["status"] == NOT_APPLICABLE


def test_closest_miss_ignores_the_supportive_sensory_item():
    # EFNS/PNS 2010 (Van den Bergh et al., Eur J Neurol 2010): supportive sensory findings never change the
    # electrodiagnostic level, so they are no near miss of it. Invented: sural sensory velocity 32.1 m/s just
    # above 80 % of LLN 40 (32 m/s); motor study normal.
    from tracker.criteria import engine

    result = evaluate([Visit(healthy_four_nerves() + [Sensory("sural", amplitude=10, cv=32.1)])], ID)
    assert outcome(result) == "not_met"
    miss = engine.closest_miss(result)
    assert len(miss) == 1 and miss.iloc[0]["modality"] == "motor"
