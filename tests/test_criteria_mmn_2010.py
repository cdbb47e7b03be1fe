"""EFNS/PNS 2010 multifocal motor neuropathy guideline: conduction-block level per segment.

Source of every threshold below: Joint Task Force of the EFNS and the PNS, EFNS/PNS guideline on management of
multifocal motor neuropathy, first revision, J Peripher Nerv Syst 2010;15:295–301 (block definitions verified
in two secondary summaries — reference sheet §3.1). Written "EFNS/PNS MMN (J Peripher Nerv Syst 2010)" beside
each test.

Normal limits: Preston & Shapiro appendix defaults (CMAP LLN median 4.0 mV, ulnar 6.0 mV, peroneal 2.0 mV;
SNAP LLN median 20 µV). All nerve values are invented test data, including the demo patient's.
"""

from __future__ import annotations

import pytest

from criteria_cases import Motor, Sensory, Visit, evaluate, finding, healthy_four_nerves, outcome
from tracker.criteria.model import MET, NOT_APPLICABLE, NOT_EVALUABLE, NOT_MET, Settings
from tracker.criteria.sets import efns_pns_2010_mmn

ID = "efns-pns-2010-mmn"
ARM = ("wrist", "elbow", "axilla")


def median(areas, durations=(5.0, 5.5), amplitudes=(8.0, 4.0), **kw) -> Motor:
    return Motor("median", amplitudes=amplitudes, areas=areas, durations=durations, **kw)


def test_healthy_study_has_no_block():
    # EFNS/PNS MMN (J Peripher Nerv Syst 2010): a normal invented study has no definite or probable block
    result = evaluate(
        [Visit(healthy_four_nerves() + [Sensory("median"), Sensory("sural", amplitude=15)])], ID
    )
    assert outcome(result) == "not_met"
    assert outcome(result, "sensory") == "normal"
    assert list(result.outcomes.columns) == ["visit_key", "outcome", "rule", "sensory", "undecided_items"]
    assert result.extra_keys == ("sensory",)


@pytest.mark.parametrize(
    "proximal_area, level", [(10.01, "probable"), (10.0, "definite"), (9.99, "definite")]
)
def test_definite_block_needs_half_the_area(proximal_area, level):
    # EFNS/PNS MMN (J Peripher Nerv Syst 2010): definite = area reduction ≥ 50 %. 20.0 → 10.01 / 10.0 / 9.99
    # mV·ms = 49.95 / 50.0 / 50.05 %. Just below 50 % the long forearm segment still gives probable (≥ 30 %).
    result = evaluate([Visit([median(areas=(20.0, proximal_area))])], ID)
    row = finding(result, "median", "definite_cb")
    assert row["status"] == (MET if level == "definite" else NOT_MET)
    assert row["threshold"] == 50
    assert row["segment"] == "wrist → elbow"
    assert outcome(result) == level


@pytest.mark.parametrize(
    "proximal_duration, level", [(6.49, "definite"), (6.5, "definite"), (6.51, "probable")]
)
def test_duration_increase_of_thirty_percent(proximal_duration, level):
    # EFNS/PNS MMN (J Peripher Nerv Syst 2010): definite needs duration increase ≤ 30 %; area ≥ 50 %
    # with > 30 % is probable (ii). 5.0 → 6.49 / 6.5 / 6.51 ms = +29.8 / +30.0 / +30.2 %; area 20 → 8 = 60 %.
    result = evaluate([Visit([median(areas=(20.0, 8.0), durations=(5.0, proximal_duration))])], ID)
    assert outcome(result) == level
    dispersed = finding(result, "median", "probable_cb_dispersed")["status"]
    assert dispersed == (MET if level == "probable" else NOT_MET)


@pytest.mark.parametrize("distal, status", [(1.2, NOT_APPLICABLE), (1.21, MET)])
def test_precondition_twenty_percent_of_lln(distal, status):
    # EFNS/PNS MMN (J Peripher Nerv Syst 2010): distal CMAP of the segment > 20 % of LLN and > 1 mV.
    # Ulnar LLN 6.0 mV: 20 % = 1.2 mV, which binds here (above 1 mV). Area 3.0 → 1.2 = 60 %.
    ulnar = Motor(
        "ulnar", amplitudes=(distal, 0.5, 0.5), areas=(3.0, 1.2, 1.2), durations=(5.0, 5.5, 5.6), dml=2.8
    )
    row = finding(evaluate([Visit([ulnar])], ID), "ulnar", "definite_cb")
    assert row["status"] == status
    if status == NOT_EVALUABLE:
        assert "precondition" in row["reason"]


@pytest.mark.parametrize("distal, status", [(1.0, NOT_APPLICABLE), (1.01, MET)])
def test_precondition_one_millivolt(distal, status):
    # EFNS/PNS MMN (J Peripher Nerv Syst 2010): > 1 mV. Median LLN 4.0 mV: 20 % = 0.8 mV, so 1 mV binds.
    row = finding(
        evaluate([Visit([median(areas=(3.0, 1.2), amplitudes=(distal, 0.4))])], ID), "median", "definite_cb"
    )
    assert row["status"] == status


def test_precondition_uses_the_cmap_at_the_distal_end_of_the_segment():
    # EFNS/PNS MMN (J Peripher Nerv Syst 2010): "distal CMAP of that segment". Elbow → axilla falls 60 % in
    # area (5.0 → 2.0), but the CMAP at the elbow is 0.9 mV (≤ 1 mV) although the wrist CMAP is 8 mV.
    low = Motor(
        "median", labels=ARM, amplitudes=(8.0, 0.9, 0.4), areas=(20.0, 5.0, 2.0), durations=(5.0, 5.3, 5.5)
    )
    fine = Motor(
        "median", labels=ARM, amplitudes=(8.0, 7.5, 3.0), areas=(20.0, 19.0, 7.6), durations=(5.0, 5.3, 5.5)
    )
    low_result, fine_result = evaluate([Visit([low])], ID), evaluate([Visit([fine])], ID)
    # low: wrist → elbow is 75 % — a definite block there; the elbow → axilla segment is not evaluable
    assert finding(low_result, "median", "definite_cb")["segment"] == "wrist → elbow"
    assert "elbow → axilla" in finding(low_result, "median", "definite_cb")["reason"]
    # fine: the block is in the upper arm (19.0 → 7.6 = 60 %), a proximal segment outside entrapment sites
    row = finding(fine_result, "median", "definite_cb")
    assert row["status"] == MET and row["segment"] == "elbow → axilla"


@pytest.mark.parametrize("proximal_area, status", [(14.01, NOT_MET), (14.0, MET), (13.99, MET)])
def test_probable_block_over_a_long_upper_limb_segment(proximal_area, status):
    # EFNS/PNS MMN (J Peripher Nerv Syst 2010): probable (i) = area reduction ≥ 30 % over a long segment of an
    # upper-limb nerve with duration increase ≤ 30 %. 20.0 → 14.01 / 14.0 / 13.99 = 29.95 / 30.0 / 30.05 %.
    result = evaluate([Visit([median(areas=(20.0, proximal_area))])], ID)
    assert finding(result, "median", "probable_cb_long")["status"] == status
    assert outcome(result) == ("probable" if status == MET else "not_met")


def test_probable_long_segment_block_needs_duration_within_thirty_percent():
    # EFNS/PNS MMN (J Peripher Nerv Syst 2010): probable (i) also needs duration increase ≤ 30 % (here +40 %)
    result = evaluate([Visit([median(areas=(20.0, 12.0), durations=(5.0, 7.0))])], ID)
    assert finding(result, "median", "probable_cb_long")["status"] == NOT_MET
    assert outcome(result) == "not_met"


def test_probable_long_segment_block_is_for_upper_limb_nerves_only():
    # EFNS/PNS MMN (J Peripher Nerv Syst 2010): a 40 % area fall in the peroneal leg segment is below the 50 %
    # of definite block and not eligible for probable (i), which is for upper-limb nerves
    fibular = Motor(
        "fibular",
        amplitudes=(5.0, 3.0, 3.0),
        areas=(12.5, 7.5, 7.5),
        durations=(5.5, 5.8, 5.9),
        dml=4.5,
        cv=48,
    )
    result = evaluate([Visit([fibular])], ID)
    assert finding(result, "fibular", "probable_cb_long")["status"] == NOT_APPLICABLE
    assert "upper-limb" in finding(result, "fibular", "probable_cb_long")["reason"]
    assert outcome(result) == "not_met"


def test_probable_block_needs_a_long_segment():
    # EFNS/PNS MMN (J Peripher Nerv Syst 2010): axilla → Erb's point is a short segment; 40 % there is neither
    # definite (< 50 %) nor probable (i) (not a long segment)
    nerve = Motor(
        "median",
        labels=("wrist", "elbow", "axilla", "erb"),
        amplitudes=(8.0, 7.8, 7.6, 4.5),
        areas=(20.0, 19.5, 19.0, 11.4),
        durations=(5.0, 5.2, 5.4, 5.6),
    )
    result = evaluate([Visit([nerve])], ID)
    assert outcome(result) == "not_met"
    assert "short segment" in finding(result, "median", "probable_cb_long")["reason"]


def test_precondition_binds_the_probable_items(monkeypatch):
    # EFNS/PNS MMN (J Peripher Nerv Syst 2010) states > 20 % LLN and > 1 mV under definite block; project
    # decision: it binds the probable items too. Median CMAP 1.0 mV, area 40 % over the forearm.
    nerve = median(areas=(2.5, 1.5), amplitudes=(1.0, 0.6))
    bound = evaluate([Visit([nerve])], ID)
    assert finding(bound, "median", "probable_cb_long")["status"] == NOT_APPLICABLE
    assert outcome(bound) == "not_met"
    monkeypatch.setattr(efns_pns_2010_mmn, "PRECONDITION_BINDS_PROBABLE", False)
    unbound = evaluate([Visit([nerve])], ID)
    assert finding(unbound, "median", "probable_cb_long")["status"] == MET
    assert outcome(unbound) == "probable"


def test_block_across_the_ulnar_elbow_is_excluded():
    # EFNS/PNS MMN (J Peripher Nerv Syst 2010): block must lie outside common entrapment sites. 70 % area fall
    # below → above the elbow only; the forearm segment is normal.
    ulnar = Motor(
        "ulnar", amplitudes=(9.0, 8.8, 2.6), areas=(25.0, 24.5, 7.5), durations=(5.5, 5.7, 5.9), dml=2.8
    )
    result = evaluate([Visit([ulnar])], ID)
    row = finding(result, "ulnar", "definite_cb")
    assert row["status"] == NOT_MET
    assert row["segment"] == "wrist → below_elbow"
    assert "below_elbow → above_elbow (entrapment segment" in row["reason"]
    assert outcome(result) == "not_met"


def test_block_across_the_fibular_head_is_excluded():
    # EFNS/PNS MMN (J Peripher Nerv Syst 2010): peroneal fibular head is an
    # entrapment site (60 % area fall there)
    fibular = Motor(
        "fibular",
        amplitudes=(5.0, 4.8, 2.0),
        areas=(12.5, 12.0, 4.8),
        durations=(5.5, 5.8, 5.9),
        dml=4.5,
        cv=48,
    )
    assert outcome(evaluate([Visit([fibular])], ID)) == "not_met"


def test_segment_of_unknown_kind_is_not_evaluable():
    # EFNS/PNS MMN (J Peripher Nerv Syst 2010): wrist → above elbow crosses the
    # elbow; entrapment cannot be ruled out
    ulnar = Motor(
        "ulnar",
        amplitudes=(8.0, 3.0),
        areas=(20.0, 7.5),
        durations=(5.5, 5.8),
        labels=("wrist", "above_elbow"),
        dml=2.8,
    )
    row = finding(evaluate([Visit([ulnar])], ID), "ulnar", "definite_cb")
    assert row["status"] == NOT_EVALUABLE
    assert "cannot be ruled out" in row["reason"]


def test_tibial_nerve_is_not_named_for_definite_block():
    # EFNS/PNS MMN (J Peripher Nerv Syst 2010): definite block "whatever the segment
    # length (median, ulnar, peroneal)"
    tibial = Motor(
        "tibial",
        amplitudes=(10.0, 4.0),
        areas=(25.0, 10.0),
        durations=(5.5, 6.0),
        cv=46,
        segment_mm=400,
        dml=4.5,
    )
    result = evaluate([Visit([tibial])], ID)
    assert finding(result, "tibial", "definite_cb")["status"] == NOT_APPLICABLE
    assert outcome(result) == "not_met"


def test_missing_area_is_not_evaluable_even_with_an_amplitude_drop():
    # EFNS/PNS MMN (J Peripher Nerv Syst 2010) defines block by negative-peak area; amplitude 8 → 2 mV (75 %)
    # alone does not decide it, and the visit is not silently normal
    result = evaluate([Visit([median(areas=(None, None), amplitudes=(8.0, 2.0))])], ID)
    row = finding(result, "median", "definite_cb")
    assert row["status"] == NOT_EVALUABLE
    assert "area not recorded" in row["reason"] and "75" in row["reason"]
    # DESIGN.md §5: the area could show a block, so the outcome is undecided, never "not met"
    assert outcome(result) == "undecided"
    assert "undecided" in outcome(result, "rule")
    assert [(f["nerve"], f["item"]) for f in outcome(result, "undecided_items")][:1] == [
        ("median", "definite_cb")
    ]


def test_missing_duration_matters_only_once_the_area_criterion_is_reached():
    # EFNS/PNS MMN (J Peripher Nerv Syst 2010): the level above 50 % area
    # depends on duration (≤ 30 % or > 30 %)
    reached = evaluate([Visit([median(areas=(20.0, 8.0), durations=(None, None))])], ID)
    short = evaluate([Visit([median(areas=(20.0, 18.0), durations=(None, None))])], ID)
    assert finding(reached, "median", "definite_cb")["status"] == NOT_EVALUABLE
    assert "duration not measured" in finding(reached, "median", "definite_cb")["reason"]
    assert finding(short, "median", "definite_cb")["status"] == NOT_MET


def test_no_proximal_stimulation_is_not_evaluable():
    # EFNS/PNS MMN (J Peripher Nerv Syst 2010): block needs proximal versus distal stimulation
    row = finding(
        evaluate([Visit([Motor("median", amplitudes=(8.0,), durations=(5.5,))])], ID), "median", "definite_cb"
    )
    assert row["status"] == NOT_EVALUABLE
    assert "no proximal stimulation" in row["reason"]


def test_invented_demo_patient_left_ulnar_forearm_block():
    # EFNS/PNS MMN (J Peripher Nerv Syst 2010). Invented demo patient DEMO-04, first visit
    # (demo_data/measurements.csv): left ulnar wrist 7.5 mV, area 26.7 mV·ms, duration 6.4 ms,
    # latency 3.00 ms; below elbow 2.6 mV, 10.0 mV·ms, 7.4 ms, 7.47 ms (235 mm); above elbow 2.5 mV,
    # 10.0 mV·ms, 7.7 ms, 9.57 ms (112 mm). By hand: amplitude (7.5 − 2.6) / 7.5 = 65.3 %; area
    # (26.7 − 10.0) / 26.7 = 16.7 / 26.7 = 62.55 % (≥ 50 %); duration (7.4 − 6.4) / 6.4 = +15.6 % (≤ 30 %);
    # CMAP at the wrist 7.5 mV > 1.2 mV (20 % of 6.0) and > 1 mV → definite block over wrist → below elbow.
    # Across the elbow the area does not fall (10.0 → 10.0).
    ulnar = Motor(
        "ulnar",
        side="left",
        latencies=(3.00, 7.47, 9.57),
        amplitudes=(7.5, 2.6, 2.5),
        durations=(6.4, 7.4, 7.7),
        areas=(26.7, 10.0, 10.0),
        segment_mm=235,
        f_latency=31.2,
    )
    other = Motor(
        "ulnar",
        side="right",
        latencies=(2.76, 6.93, 8.80),
        amplitudes=(9.4, 9.3, 9.0),
        durations=(5.7, 6.0, 6.1),
        areas=(29.8, 29.9, 29.3),
        segment_mm=235,
        f_latency=29.8,
    )
    sensory = [
        Sensory("median", side="left", amplitude=27.7),
        Sensory("ulnar", side="left", amplitude=31.8),
        Sensory("ulnar", amplitude=31.8),
        Sensory("sural", amplitude=15.1),
    ]
    result = evaluate([Visit([ulnar, other] + sensory, patient="DEMO-04", visit_date="2024-02-20")], ID)
    row = finding(result, "ulnar", "definite_cb", side="left")
    assert row["status"] == MET
    assert row["segment"] == "wrist → below_elbow"
    assert row["value"] == pytest.approx(62.546816, abs=1e-6)
    assert finding(result, "ulnar", "definite_cb", side="right")["status"] == NOT_MET
    assert outcome(result) == "definite"
    assert "ulnar left wrist → below_elbow" in outcome(result, "rule")
    assert outcome(result, "sensory") == "normal"


@pytest.mark.parametrize("snap, key", [(19.9, "abnormal"), (20.0, "normal"), (20.1, "normal")])
def test_sensory_key_is_snap_amplitude_at_least_lln(snap, key):
    # EFNS/PNS MMN (J Peripher Nerv Syst 2010): normal SNAP amplitudes (from memory, not verified for this
    # guideline); median SNAP LLN 20 µV. Reported beside the block level, which it does not change.
    nerves = [median(areas=(20.0, 8.0)), Sensory("median", amplitude=snap), Sensory("sural", amplitude=15)]
    result = evaluate([Visit(nerves)], ID)
    assert outcome(result, "sensory") == key
    assert outcome(result) == "definite"


def test_sensory_key_not_evaluable_without_sensory_nerves_or_values():
    # EFNS/PNS MMN (J Peripher Nerv Syst 2010): no sensory study → the normal-sensory
    # requirement cannot be judged
    assert outcome(evaluate([Visit([median(areas=(20.0, 19.0))])], ID), "sensory") == "not_evaluable"
    missing = evaluate(
        [
            Visit(
                [
                    median(areas=(20.0, 19.0)),
                    Sensory("median", amplitude=None),
                    Sensory("sural", amplitude=15),
                ]
            )
        ],
        ID,
    )
    assert outcome(missing, "sensory") == "not_evaluable"
    dead = evaluate(
        [Visit([median(areas=(20.0, 19.0)), Sensory("sural", amplitude=0)])], ID
    )  # no response = a finding
    assert outcome(dead, "sensory") == "abnormal"


def test_cold_limb_exclusion_setting_applies():
    # EFNS/PNS MMN (J Peripher Nerv Syst 2010) block, with the project's cold-limb setting set to exclude
    nerve = median(areas=(20.0, 8.0), temperature=31.0)
    assert outcome(evaluate([Visit([nerve])], ID)) == "definite"
    excluded = evaluate([Visit([nerve])], ID, Settings(cold_limbs="exclude"))
    # excluded data are wanting data: a warm recording could show the block (DESIGN.md §5, undecided)
    assert outcome(excluded) == "undecided"
    assert "cold" in finding(excluded, "median", "definite_cb")["reason"]


def test_one_finding_per_nerve_and_item():
    # EFNS/PNS MMN (J Peripher Nerv Syst 2010): per-nerve findings carry the deciding segment
    ulnar = Motor(
        "ulnar", amplitudes=(9.0, 8.8, 8.6), areas=(25.0, 24.5, 24.0), durations=(5.5, 5.7, 5.9), dml=2.8
    )
    result = evaluate([Visit([ulnar, Motor("ulnar", side="left", amplitudes=(9.0, 8.8, 8.6), dml=2.8)])], ID)
    motor = result.findings[result.findings["modality"] == "motor"]
    assert len(motor) == 6
    assert not motor.duplicated(["nerve", "side", "item"]).any()


def test_visit_without_proximal_stimulation_says_so():
    # EFNS/PNS MMN (J Peripher Nerv Syst 2010): block needs a proximal stimulation site in some motor nerve
    result = evaluate([Visit([Motor("median", amplitudes=(8.0,), durations=(5.5,)), Sensory("median")])], ID)
    assert outcome(result) == "undecided"  # DESIGN.md §5: a block could lie in the unstimulated nerve
    assert "no motor segment with proximal stimulation" in outcome(result, "rule")


def test_amplitude_drop_without_area_is_undecided_not_negative():
    # EFNS/PNS MMN (J Peripher Nerv Syst 2010) defines block by negative-peak area; a 56.7 %
    # amplitude drop (6.0 → 2.6 mV, invented) with no area recorded could be a definite
    # block (area ≥ 50 %): undecided, listed
    result = evaluate([Visit([median(areas=(None, None), amplitudes=(6.0, 2.6))])], ID)
    assert outcome(result) == "undecided"
    assert ("median", "definite_cb") in {(f["nerve"], f["item"]) for f in outcome(result, "undecided_items")}
    # with the area recorded (20 → 18 mV·ms, 10 %) the block is judged and the outcome decided
    decided = evaluate([Visit([median(areas=(20.0, 18.0), amplitudes=(6.0, 2.6))])], ID)
    assert outcome(decided) == "not_met" and outcome(decided, "undecided_items") == ()


def test_probable_block_stays_and_lists_the_segment_that_could_be_definite():
    # EFNS/PNS MMN (J Peripher Nerv Syst 2010): a reached level is kept while missing data could raise it.
    # Median forearm area 40 % (probable (i), long upper-limb segment) and the ulnar forearm area missing:
    # that segment could be definite (≥ 50 %), so "probable" stays with it listed. Invented values.
    ulnar = Motor(
        "ulnar", amplitudes=(9.0, 3.0, 3.0), areas=(25.0, None, None), durations=(5.5, 5.7, 5.9), dml=2.8
    )
    result = evaluate([Visit([median(areas=(20.0, 12.0)), ulnar])], ID)
    assert outcome(result) == "probable"
    assert ("ulnar", "definite_cb") in {(f["nerve"], f["item"]) for f in outcome(result, "undecided_items")}


def test_closest_miss_ignores_the_snap_check():
    # EFNS/PNS MMN (J Peripher Nerv Syst 2010): the sensory nerve check supports the diagnosis but cannot
    # change the conduction-block level, so it is never the closest miss. Invented: median SNAP 19.9 µV just
    # below LLN 20 µV (a near miss of the SNAP item) and a forearm area drop of 10 % (far from 30 %).
    from tracker.criteria import engine

    result = evaluate([Visit([median(areas=(20.0, 18.0)), Sensory("median", amplitude=19.9)])], ID)
    assert outcome(result) == "not_met"
    miss = engine.closest_miss(result)
    assert len(miss) == 1 and miss.iloc[0]["item"] in efns_pns_2010_mmn.LEVELS
    assert miss.iloc[0]["modality"] == "motor"
