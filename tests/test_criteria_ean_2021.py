"""EAN/PNS 2021 CIDP criteria (Van den Bergh PYK, van Doorn PA, Hadden RDM, et al., Eur J Neurol
2021;28:3556–3583, doi:10.1111/ene.14959).

Every threshold of this set is FROM MEMORY, NOT VERIFIED against the guideline's tables (the table marks each
row ``memory``; ``test_every_row_is_cited_and_marked_from_memory`` keeps the comments below honest).
Normal limits: the shipped Preston & Shapiro appendix set — median motor DML ULN 4.4 ms, CMAP LLN 4.0 mV,
CV LLN 49 m/s, F ULN 31 ms; ulnar F ULN 32 ms; median sensory SNAP LLN 20 µV, CV LLN 50 m/s, peak latency ULN
3.5 ms (verified in the reference sheet); fibular and tibial motor and sural sensory limits from memory.
All nerve values below are invented for testing.
"""

from __future__ import annotations

import pytest

from criteria_cases import Motor, Sensory, Visit, evaluate, finding, healthy_four_nerves, outcome
from tracker.criteria.model import MET, NOT_APPLICABLE, NOT_EVALUABLE, NOT_MET, Settings
from tracker.criteria.thresholds import load

ID = "ean-pns-2021-cidp"
CITATION = (
    "Van den Bergh PYK, van Doorn PA, Hadden RDM, et al. European Academy of Neurology/Peripheral Nerve "
    "Society guideline on diagnosis and treatment of chronic inflammatory demyelinating "
    "polyradiculoneuropathy"
)

# Invented building blocks.
ULNAR = dict(amplitudes=(9.0, 8.6, 8.4), durations=(5.5, 5.8, 6.0))
TIBIAL = dict(amplitudes=(10.0, 9.0), durations=(5.0, 5.5), dml=4.5, cv=46, f_latency=50, segment_mm=400)
FIBULAR = dict(amplitudes=(5.0, 4.6, 4.5), durations=(5.5, 6.0, 6.1), dml=4.5, cv=48, f_latency=48)
SENSORY_ABNORMAL_2 = [
    Sensory("median", amplitude=10),
    Sensory("ulnar", amplitude=8),
]  # both below LLN (20, 17 µV)
# Invented; peak latencies below the shipped ULN (median 3.5, ulnar 3.1, sural 4.4 ms) so that every sensory
# measure is judged and the outcome is decided.
SENSORY_ABNORMAL_1 = [
    Sensory("median", amplitude=10, peak_latency=3.0),
    Sensory("ulnar", amplitude=25, peak_latency=2.8),
]
SENSORY_NORMAL = [
    Sensory("median", amplitude=30, peak_latency=3.0),
    Sensory("ulnar", amplitude=25, peak_latency=2.8),
    Sensory("sural", amplitude=10, cv=45, peak_latency=3.8),
]


def long_dml(nerve: str = "median", **kw) -> Motor:
    """A nerve meeting (a) only: median 6.7 ms ≥ 6.6; ulnar 5.0 ms ≥ 4.95."""
    if nerve == "ulnar":
        return Motor("ulnar", dml=5.0, **ULNAR, **kw)
    return Motor("median", dml=6.7, **kw)


def run(nerves, phenotype="typical", settings=None):
    return evaluate([Visit(nerves, phenotype=phenotype)], ID, settings)


def motor(result) -> str:
    return outcome(result, "motor")


def sensory(result) -> str:
    return outcome(result, "sensory")


# ---------------------------------------------------------------- the table itself


def test_every_row_is_cited_and_marked_from_memory():
    table = load(ID)
    assert table.version == "2021.2"
    for row in table.rows:
        assert row.citations == ("ean-pns-2021-cidp",)
        assert CITATION in row.source and "Eur J Neurol 2021;28:3556–3583" in row.source
        assert "doi:10.1111/ene.14959" in row.source
        assert row.status == "memory", (
            f"{row.item} {row.nerve}: update the 'from memory' notes of these tests if verified"
        )


def test_the_duration_table_has_four_filters_by_four_nerves():
    rows = [r for r in load(ID).rows if r.item == "dcmap_duration"]
    assert sorted((r.lff_hz, r.nerve) for r in rows) == sorted(
        (hz, n) for hz in (2, 5, 10, 20) for n in ("median", "ulnar", "fibular", "tibial")
    )
    assert {r.comparator for r in rows} == {"gt"}


def test_healthy_study_meets_nothing():
    result = run(healthy_four_nerves() + SENSORY_NORMAL)
    assert outcome(result) == "not_met"
    assert motor(result) == NOT_MET and sensory(result) == "normal"
    assert not (result.findings["status"] == MET).any()


# ---------------------------------------------------------------- motor thresholds, one nerve


# (a) DML ≥ 150 % of ULN (median ULN 4.4 → 6.6 ms). Van den Bergh et al., Eur J
#     Neurol 2021 — from memory, not verified.
@pytest.mark.parametrize("dml, status", [(6.59, NOT_MET), (6.6, MET), (6.61, MET)])
def test_distal_latency_edge(dml, status):
    row = finding(run([Motor("median", dml=dml)]), "median", "dml")
    assert row["status"] == status and row["threshold"] == 6.6


# (a) median excluded for neuropathy at the wrist. Van den Bergh et al., Eur J Neurol
#     2021 — from memory, not verified.
def test_wrist_entrapment_removes_the_median_latency():
    row = finding(run([Motor("median", dml=7.0, wrist_entrapment=True)]), "median", "dml")
    assert row["status"] == NOT_APPLICABLE and "wrist" in row["reason"]


# (b) CV ≤ 70 % of LLN (median LLN 49 → 34.3 m/s). Van den Bergh et al., Eur J Neurol
#     2021 — from memory, not verified.
@pytest.mark.parametrize(
    "segment_mm, status", [(171.45, MET), (171.5, MET), (171.55, NOT_MET)]
)  # over 5.0 ms: 34.29, 34.30, 34.31 m/s
def test_velocity_edge(segment_mm, status):
    row = finding(run([Motor("median", latencies=(3.0, 8.0), segment_mm=segment_mm)]), "median", "cv")
    assert row["status"] == status and row["threshold"] == 34.3


# (c) F latency ≥ 120 % of ULN (median ULN 31 → 37.2 ms). Van den Bergh et al., Eur J
#     Neurol 2021 — from memory, not verified.
@pytest.mark.parametrize("f, status", [(37.19, NOT_MET), (37.2, MET), (37.21, MET)])
def test_f_latency_edge(f, status):
    row = finding(run([Motor("median", f_latency=f)]), "median", "f_latency")
    assert row["status"] == status and row["threshold"] == 37.2


# (c) switch: ≥ 150 % of ULN (46.5 ms) when the distal CMAP is < 80 % of LLN (4.0 mV → 3.2 mV).
# Van den Bergh et al., Eur J Neurol 2021 — from memory, not verified.
@pytest.mark.parametrize("distal, threshold", [(3.19, 46.5), (3.2, 37.2), (3.21, 37.2)])
def test_f_wave_amplitude_switch_edge(distal, threshold):
    row = finding(run([Motor("median", f_latency=40.0, amplitudes=(distal, 3.0))]), "median", "f_latency")
    assert row["threshold"] == threshold
    assert row["status"] == (MET if threshold == 37.2 else NOT_MET)


# (c) the larger factor at its own edge (distal CMAP 3.0 mV, below the switch). Van den Bergh et al., Eur
#     J Neurol 2021 — from memory, not verified.
@pytest.mark.parametrize("f, status", [(46.49, NOT_MET), (46.5, MET), (46.51, MET)])
def test_f_latency_low_cmap_edge(f, status):
    assert (
        finding(run([Motor("median", f_latency=f, amplitudes=(3.0, 2.8))]), "median", "f_latency")["status"]
        == status
    )


# (d) absent F counted only with distal CMAP ≥ 20 % of LLN (0.8 mV). Van den Bergh et al., Eur J
#     Neurol 2021 — from memory, not verified.
@pytest.mark.parametrize("distal, status", [(0.79, NOT_APPLICABLE), (0.8, MET), (0.81, MET)])
def test_absent_f_waves_precondition_edge(distal, status):
    row = finding(run([Motor("median", f_absent=True, amplitudes=(distal, 0.7))]), "median", "f_absent")
    assert row["status"] == status
    if status == NOT_EVALUABLE:
        assert "precondition" in row["reason"]


def test_f_waves_not_recorded_are_not_evaluable():
    row = finding(run([Motor("median", f_latency=None)]), "median", "f_absent")
    assert row["status"] == NOT_EVALUABLE and "not recorded" in row["reason"]


# (e) CB ≥ 30 % amplitude reduction. Van den Bergh et al., Eur J Neurol 2021 — from memory, not verified.
@pytest.mark.parametrize(
    "proximal, status", [(7.01, NOT_MET), (7.0, MET), (6.99, MET)]
)  # from 10 mV: 29.9 %, 30 %, 30.1 %
def test_block_edge(proximal, status):
    row = finding(run([Motor("median", amplitudes=(10.0, proximal), durations=(5.5, 5.8))]), "median", "cb")
    assert row["status"] == status and row["threshold"] == 30


# (e) CB precondition: distal CMAP ≥ 20 % of LLN (0.8 mV). Van den Bergh et al., Eur J
#     Neurol 2021 — from memory, not verified.
@pytest.mark.parametrize("distal, status", [(0.79, NOT_APPLICABLE), (0.8, MET), (0.81, MET)])
def test_block_precondition_edge(distal, status):
    row = finding(run([Motor("median", amplitudes=(distal, 0.3), durations=(5.5, 5.8))]), "median", "cb")
    assert row["status"] == status
    if status == NOT_EVALUABLE:
        assert "precondition" in row["reason"]


# (e) tibial nerve excluded from CB. Van den Bergh et al., Eur J Neurol 2021 — from memory, not verified.
def test_tibial_block_is_excluded():
    result = run([Motor("tibial", **{**TIBIAL, "amplitudes": (10.0, 4.0)})])  # 60 % fall
    row = finding(result, "tibial", "cb")
    assert row["status"] == NOT_APPLICABLE and "tibial" in row["reason"]
    assert motor(result) == NOT_MET


# (e) from Erb's point ≥ 50 % is needed (distal 8.0 mV → 4.0 mV). Van den Bergh et al., Eur J
#     Neurol 2021 — from memory, not verified.
@pytest.mark.parametrize("erb, status", [(4.01, NOT_MET), (4.0, MET), (3.99, MET)])
def test_block_from_erbs_point_needs_fifty_percent(erb, status):
    median = Motor(
        "median",
        labels=("wrist", "elbow", "axilla", "erb"),
        amplitudes=(8.0, 7.8, 7.6, erb),
        durations=(5.5, 5.6, 5.7, 5.8),
    )
    result = run([median])
    assert finding(result, "median", "cb_erb")["status"] == status
    # the 30 % item ignores Erb's point: only the 5 % fall to the axilla is judged there
    assert finding(result, "median", "cb")["status"] == NOT_MET


def test_erb_block_across_the_elbow_is_not_evaluable():
    # ulnar wrist → Erb's point passes the elbow (an entrapment segment): a 60 % fall there is not judged
    ulnar = Motor(
        "ulnar",
        dml=2.8,
        labels=("wrist", "below_elbow", "above_elbow", "axilla", "erb"),
        amplitudes=(9.0, 8.8, 8.6, 8.4, 3.6),
        durations=(5.5, 5.6, 5.7, 5.8, 5.9),
    )
    row = finding(run([ulnar]), "ulnar", "cb_erb")
    assert row["status"] == NOT_APPLICABLE and "entrapment" in row["reason"]


def test_erb_block_is_reported_only_where_erbs_point_was_stimulated():
    result = run([Motor("median")])
    assert result.findings[result.findings["item"] == "cb_erb"].empty


# (f) TD > 30 % (5.5 ms → 7.15 ms is exactly 30 %). Van den Bergh et al., Eur J
#     Neurol 2021 — from memory, not verified.
@pytest.mark.parametrize("proximal, status", [(7.14, NOT_MET), (7.15, NOT_MET), (7.16, MET)])
def test_dispersion_edge(proximal, status):
    assert finding(run([Motor("median", durations=(5.5, proximal))]), "median", "td")["status"] == status


# (f) TD ≥ 100 % in the tibial nerve (5.0 ms → 10.0 ms). Van den Bergh et al., Eur J
#     Neurol 2021 — from memory, not verified.
@pytest.mark.parametrize("proximal, status", [(9.99, NOT_MET), (10.0, MET), (10.01, MET)])
def test_tibial_dispersion_needs_one_hundred_percent(proximal, status):
    row = finding(run([Motor("tibial", **{**TIBIAL, "durations": (5.0, proximal)})]), "tibial", "td")
    assert row["status"] == status and row["threshold"] == 100


def test_forty_percent_dispersion_counts_in_the_median_but_not_the_tibial():
    result = run(
        [Motor("median", durations=(5.0, 7.0)), Motor("tibial", **{**TIBIAL, "durations": (5.0, 7.0)})]
    )
    assert finding(result, "median", "td")["status"] == MET
    assert finding(result, "tibial", "td")["status"] == NOT_MET


# (g) distal CMAP duration, cut-off by low-frequency filter (LFF), "greater than".
# Van den Bergh et al., Eur J Neurol 2021, cut-offs table — from memory, not verified.
DURATION_CUTOFFS = [
    ("median", 2, 8.4),
    ("ulnar", 2, 9.6),
    ("fibular", 2, 8.8),
    ("tibial", 2, 9.2),
    ("median", 5, 8.0),
    ("ulnar", 5, 8.6),
    ("fibular", 5, 8.5),
    ("tibial", 5, 8.3),
    ("median", 10, 7.8),
    ("ulnar", 10, 8.5),
    ("fibular", 10, 8.3),
    ("tibial", 10, 8.2),
    ("median", 20, 7.4),
    ("ulnar", 20, 7.8),
    ("fibular", 20, 8.1),
    ("tibial", 20, 8.0),
]


@pytest.mark.parametrize("nerve, lff, cutoff", DURATION_CUTOFFS)
@pytest.mark.parametrize("delta, status", [(-0.01, NOT_MET), (0.0, NOT_MET), (0.01, MET)])
def test_distal_duration_cutoff_per_filter(nerve, lff, cutoff, delta, status):
    duration = round(cutoff + delta, 2)
    row = finding(run([Motor(nerve, lff=lff, durations=(duration, duration))]), nerve, "dcmap_duration")
    assert row["threshold"] == cutoff
    assert row["status"] == status


def test_the_filter_setting_changes_the_verdict():
    # 8.0 ms in the median: above the 20 Hz cut-off (7.4 ms) but not the 2 Hz cut-off (8.4 ms)
    assert (
        finding(run([Motor("median", lff=20, durations=(8.0, 8.0))]), "median", "dcmap_duration")["status"]
        == MET
    )
    assert (
        finding(run([Motor("median", lff=2, durations=(8.0, 8.0))]), "median", "dcmap_duration")["status"]
        == NOT_MET
    )


# filter not recorded = want of data (not evaluable); a recorded filter the table has no
# cut-off for = the item does not apply to that recording (not applicable). Project reading
# of Van den Bergh et al., Eur J Neurol 2021.
@pytest.mark.parametrize(
    "lff, words, status", [(None, "not recorded", NOT_EVALUABLE), (3.0, "3 Hz", NOT_APPLICABLE)]
)
def test_distal_duration_without_a_tabled_filter_is_not_evaluable(lff, words, status):
    row = finding(run([Motor("median", lff=lff, durations=(12.0, 12.0))]), "median", "dcmap_duration")
    assert row["status"] == status and words in row["reason"]


def test_distal_duration_of_a_nerve_without_a_cutoff_is_not_evaluable():
    row = finding(
        run([Motor("radial", amplitudes=(5.0, 4.8), durations=(12.0, 12.0))]), "radial", "dcmap_duration"
    )
    assert row["status"] == NOT_APPLICABLE and "no distal CMAP duration cut-off" in row["reason"]


# ---------------------------------------------------------- motor combinations (strongly / weakly supportive)
# Combination rules: Van den Bergh et al., Eur J Neurol 2021 — from memory, not verified.


def test_a_in_two_nerves_is_strongly_supportive():
    result = run([long_dml("median"), long_dml("ulnar")] + SENSORY_ABNORMAL_2)
    assert motor(result) == "strongly_supportive" and outcome(result) == "cidp"
    assert outcome(result, "rule").startswith("typical: motor strongly supportive ((a)")


def test_a_in_one_nerve_is_weakly_supportive():
    result = run([long_dml("median"), Motor("ulnar", dml=2.8, **ULNAR)] + SENSORY_ABNORMAL_2)
    assert motor(result) == "weakly_supportive" and outcome(result) == "possible_cidp"
    assert "one nerve only" in outcome(result, "rule")


def test_b_in_two_nerves():
    result = run([Motor("median", cv=30), Motor("ulnar", cv=30, **ULNAR)])
    assert motor(result) == "strongly_supportive" and "(b)" in outcome(result, "rule")


def test_c_in_two_nerves():
    # median ≥ 37.2 ms, ulnar ≥ 38.4 ms (120 % of ULN 31 / 32 ms)
    result = run([Motor("median", f_latency=38.0), Motor("ulnar", f_latency=39.0, **ULNAR)])
    assert motor(result) == "strongly_supportive" and "(c)" in outcome(result, "rule")


def test_d_absent_f_in_two_nerves_plus_another_parameter_in_a_third_nerve():
    nerves = [
        Motor("median", f_absent=True),
        Motor("ulnar", f_absent=True, **ULNAR),
        Motor("fibular", **{**FIBULAR, "dml": 10.0}),
    ]  # fibular DML ≥ 9.75
    result = run(nerves)
    assert motor(result) == "strongly_supportive" and "(d)" in outcome(result, "rule")


def test_d_other_parameter_inside_one_of_the_absent_f_nerves_is_not_enough():
    result = run([Motor("median", f_absent=True, dml=6.7), Motor("ulnar", f_absent=True, **ULNAR)])
    assert motor(result) == "weakly_supportive"


def test_d_absent_f_in_two_nerves_alone_is_weakly_supportive():
    result = run([Motor("median", f_absent=True), Motor("ulnar", f_absent=True, **ULNAR)])
    assert motor(result) == "weakly_supportive"


def ulnar_block(**kw) -> Motor:
    return Motor(
        "ulnar", dml=2.8, amplitudes=(9.0, 5.0, 4.9), durations=(5.5, 5.8, 6.0), **kw
    )  # 44 % wrist → below elbow


def median_block(**kw) -> Motor:
    return Motor("median", amplitudes=(8.0, 5.0), durations=(5.5, 5.8), **kw)  # 37.5 %


def test_e_block_in_two_nerves():
    result = run([median_block(), ulnar_block()])
    assert motor(result) == "strongly_supportive" and "(e) conduction block in ≥ 2 nerves" in outcome(
        result, "rule"
    )


def test_e_block_in_one_nerve_plus_another_parameter_in_another_nerve():
    result = run([median_block(), long_dml("ulnar")])
    assert motor(result) == "strongly_supportive"
    assert "(e) conduction block in 1 nerve plus another parameter (other than absent F-waves)" in outcome(
        result, "rule"
    )


def test_e_absent_f_does_not_count_as_the_other_parameter_for_block():
    result = run([median_block(), Motor("ulnar", f_absent=True, **ULNAR)])
    assert finding(result, "ulnar", "f_absent")["status"] == MET
    assert motor(result) == "weakly_supportive"


def test_e_block_and_another_parameter_in_the_same_nerve_is_weakly_supportive():
    assert motor(run([median_block(dml=6.8)])) == "weakly_supportive"


def test_e_erb_block_joins_the_block_item():
    median = Motor(
        "median",
        labels=("wrist", "elbow", "axilla", "erb"),
        amplitudes=(8.0, 7.8, 7.6, 3.5),
        durations=(5.5, 5.6, 5.7, 5.8),
    )
    result = run([median, long_dml("ulnar")])
    assert motor(result) == "strongly_supportive" and "(e)" in outcome(result, "rule")


def test_f_dispersion_in_two_nerves():
    result = run(
        [
            Motor("median", durations=(5.0, 7.0)),
            Motor("ulnar", amplitudes=(9.0, 8.6, 8.4), durations=(5.0, 7.0, 7.1)),
        ]
    )
    assert motor(result) == "strongly_supportive" and "(f)" in outcome(result, "rule")


def test_g_duration_plus_another_parameter_in_another_nerve():
    result = run([Motor("median", durations=(8.5, 8.6)), Motor("ulnar", cv=30, **ULNAR)])  # 8.5 > 8.4 at 2 Hz
    assert motor(result) == "strongly_supportive" and "(g)" in outcome(result, "rule")


def test_g_duration_plus_absent_f_in_another_nerve():
    # absent F-waves in one eligible nerve counts as "another parameter" for
    # (g) (decision; only (e) excludes it)
    result = run([Motor("median", durations=(8.5, 8.6)), Motor("ulnar", f_absent=True, **ULNAR)])
    assert motor(result) == "strongly_supportive" and "(g)" in outcome(result, "rule")


def test_g_duration_alone_or_in_two_nerves_is_weakly_supportive():
    assert motor(run([Motor("median", durations=(8.5, 8.6))])) == "weakly_supportive"
    two = run(
        [
            Motor("median", durations=(8.5, 8.6)),
            Motor("ulnar", amplitudes=(9.0, 8.6, 8.4), durations=(9.7, 9.8, 9.9)),
        ]
    )
    assert motor(two) == "weakly_supportive"


def test_left_and_right_count_as_two_nerves_by_default():
    nerves = [Motor("median", side="left", dml=6.8), Motor("median", side="right", dml=6.8)]
    assert motor(run(nerves)) == "strongly_supportive"
    assert motor(run(nerves, settings=Settings(sides_are_separate_nerves=False))) == "weakly_supportive"


# ---------------------------------------------------------------- sensory conduction
# "Abnormal" = SNAP < LLN, CV < LLN or peak latency > ULN. Van den Bergh et al., Eur
# J Neurol 2021 — from memory, not verified.


@pytest.mark.parametrize("amplitude, status", [(19.99, MET), (20.0, NOT_MET), (20.01, NOT_MET)])
def test_snap_amplitude_edge(amplitude, status):
    assert (
        finding(run([Sensory("median", amplitude=amplitude)]), "median", "snap_amplitude")["status"] == status
    )


@pytest.mark.parametrize("cv, status", [(49.99, MET), (50.0, NOT_MET), (50.01, NOT_MET)])
def test_sensory_velocity_edge(cv, status):
    assert finding(run([Sensory("median", cv=cv)]), "median", "sensory_cv")["status"] == status


@pytest.mark.parametrize("peak, status", [(3.49, NOT_MET), (3.5, NOT_MET), (3.51, MET)])
def test_sensory_peak_latency_edge(peak, status):
    assert (
        finding(run([Sensory("median", peak_latency=peak)]), "median", "sensory_peak_latency")["status"]
        == status
    )


def test_sensory_categories():
    assert sensory(run(SENSORY_ABNORMAL_2)) == "abnormal_2_nerves"
    assert sensory(run(SENSORY_ABNORMAL_1)) == "abnormal_1_nerve"
    assert sensory(run(SENSORY_NORMAL)) == "normal"
    assert sensory(run([Motor("median")])) == NOT_EVALUABLE  # no sensory nerve tested


def test_each_abnormal_parameter_makes_its_nerve_abnormal():
    nerves = [
        Sensory("median", cv=45),
        Sensory("ulnar", peak_latency=3.2),
        Sensory("superficial_fibular", amplitude=5),
    ]
    result = run(nerves)
    assert sensory(result) == "abnormal_2_nerves"
    assert {finding(result, "superficial_fibular", "snap_amplitude")["status"]} == {MET}


def test_missing_sensory_values_are_not_evaluable_never_normal():
    assert sensory(run([Sensory("median", amplitude=None, cv=None)])) == NOT_EVALUABLE
    # an amplitude alone, with no latency measure, does not make a nerve normal
    assert sensory(run([Sensory("median", amplitude=30, cv=None)])) == NOT_EVALUABLE
    # amplitude plus a peak latency does
    assert sensory(run([Sensory("median", amplitude=30, cv=None, peak_latency=3.0)])) == "normal"


def test_an_absent_snap_is_abnormal_not_missing():
    result = run([Sensory("median", amplitude=0, cv=None), Sensory("ulnar", amplitude=0, cv=None)])
    assert finding(result, "median", "snap_amplitude")["status"] == MET
    assert finding(result, "median", "sensory_cv")["status"] == NOT_APPLICABLE
    assert sensory(result) == "abnormal_2_nerves"


def test_median_with_wrist_entrapment_is_not_counted():
    result = run([Sensory("median", amplitude=10, wrist_entrapment=True), Sensory("ulnar", amplitude=8)])
    assert finding(result, "median", "snap_amplitude")["status"] == NOT_APPLICABLE
    assert sensory(result) == "abnormal_1_nerve"


# ---------------------------------------------------------------- sensory CIDP conduction criteria
# CV < 80 % of LLN, or < 70 % of LLN when the SNAP is < 80 % of LLN; sural sparing.
# Van den Bergh et al., Eur J Neurol 2021 — from memory, not verified.


@pytest.mark.parametrize("cv, status", [(39.99, MET), (40.0, NOT_MET), (40.01, NOT_MET)])
def test_sensory_cidp_velocity_edge(cv, status):
    result = run(
        [Sensory("median", amplitude=25, cv=cv)], phenotype="sensory"
    )  # SNAP ≥ 16 µV: 80 % of LLN 50 m/s
    assert finding(result, "median", "sensory_cidp_cv")["status"] == status


@pytest.mark.parametrize("cv, status", [(34.99, MET), (35.0, NOT_MET), (35.01, NOT_MET)])
def test_sensory_cidp_velocity_edge_with_a_low_snap(cv, status):
    # SNAP < 16 µV: 70 % of LLN. 140 mm keeps the onset latency exact at 35 m/s (4.0 ms).
    result = run([Sensory("median", amplitude=15.0, cv=cv, distance_mm=140.0)], phenotype="sensory")
    assert finding(result, "median", "sensory_cidp_cv")["status"] == status


@pytest.mark.parametrize("amplitude, threshold", [(15.99, 35.0), (16.0, 40.0), (16.01, 40.0)])
def test_sensory_cidp_amplitude_switch_edge(amplitude, threshold):
    row = finding(
        run([Sensory("median", amplitude=amplitude, cv=38.0)], phenotype="sensory"),
        "median",
        "sensory_cidp_cv",
    )
    assert row["threshold"] == threshold
    assert row["status"] == (MET if threshold == 40.0 else NOT_MET)


def test_sensory_cidp_items_are_only_reported_for_the_sensory_phenotype():
    result = run([Sensory("median", cv=30)])
    assert not result.findings["item"].str.startswith(("sensory_cidp", "sural_sparing")).any()


# ---------------------------------------------------------------- outcome by phenotype
# Categories: Van den Bergh et al., Eur J Neurol 2021 — from memory, not verified.

STRONG = [long_dml("median"), long_dml("ulnar")]
WEAK = [long_dml("median"), Motor("ulnar", dml=2.8, **ULNAR)]


def test_typical_needs_sensory_abnormal_in_two_nerves():
    assert outcome(run(STRONG + SENSORY_ABNORMAL_2)) == "cidp"
    assert outcome(run(WEAK + SENSORY_ABNORMAL_2)) == "possible_cidp"
    one = run(STRONG + SENSORY_ABNORMAL_1)
    assert outcome(one) == "not_met" and "abnormal in 1 nerve" in outcome(one, "rule")
    missing = run(STRONG)  # no sensory nerve studied: nothing missing could be filled in, so it is not met
    assert outcome(missing) == "not_met" and "not evaluable" in outcome(missing, "rule")


def test_typical_with_a_sensory_measure_missing_is_undecided():
    # Van den Bergh et al., Eur J Neurol 2021 (from memory, not verified): sensory abnormal in ≥ 2 nerves is
    # needed; the ulnar peak latency was not recorded and could be the second abnormal nerve (DESIGN.md §5:
    # undecided, never "not met").
    sensory = [Sensory("median", amplitude=10, peak_latency=3.0), Sensory("ulnar", amplitude=25)]
    result = run(STRONG + sensory)
    assert outcome(result) == "undecided"
    listed = {(f["nerve"], f["item"]) for f in outcome(result, "undecided_items")}
    assert listed == {("ulnar", "sensory_peak_latency")}
    # recorded and normal (2.8 < ULN 3.1 ms): decided, not met
    assert outcome(run(STRONG + SENSORY_ABNORMAL_1)) == "not_met"


def test_missing_phenotype_means_typical():
    result = run(STRONG + SENSORY_ABNORMAL_2, phenotype=None)
    assert outcome(result) == "cidp" and outcome(result, "phenotype") == "typical"


def test_distal_is_judged_as_typical():
    result = run(STRONG + SENSORY_ABNORMAL_2, phenotype="distal")
    assert outcome(result) == "cidp" and outcome(result, "rule").startswith("distal (judged as typical")
    assert outcome(run(STRONG + SENSORY_ABNORMAL_1, phenotype="distal")) == "not_met"


def test_multifocal_needs_sensory_abnormal_in_one_nerve():
    assert outcome(run(STRONG + SENSORY_ABNORMAL_1, phenotype="multifocal")) == "cidp"
    assert outcome(run(WEAK + SENSORY_ABNORMAL_1, phenotype="multifocal")) == "possible_cidp"
    assert outcome(run(STRONG + SENSORY_NORMAL, phenotype="multifocal")) == "not_met"


def test_focal_is_at_most_possible():
    result = run(STRONG + SENSORY_ABNORMAL_2, phenotype="focal")
    assert outcome(result) == "possible_cidp" and "at most possible" in outcome(result, "rule")


def test_motor_needs_normal_sensory_conduction():
    assert outcome(run(STRONG + SENSORY_NORMAL, phenotype="motor")) == "cidp"
    assert outcome(run(WEAK + SENSORY_NORMAL, phenotype="motor")) == "possible_cidp"
    assert outcome(run(STRONG + SENSORY_ABNORMAL_1, phenotype="motor")) == "not_met"
    unknown = run(STRONG, phenotype="motor")
    assert outcome(unknown) == "not_met" and "not evaluable" in outcome(unknown, "rule")


def test_sensory_with_slowing_in_two_nerves_and_normal_motor_conduction_is_possible():
    nerves = healthy_four_nerves() + [
        Sensory("median", amplitude=25, cv=38),
        Sensory("ulnar", amplitude=25, cv=38),
    ]
    result = run(nerves, phenotype="sensory")
    assert outcome(result) == "possible_cidp" and "velocity" in outcome(result, "rule")
    single = run(
        healthy_four_nerves()
        + [Sensory("median", amplitude=25, cv=38), Sensory("ulnar", amplitude=25, cv=45)],
        phenotype="sensory",
    )
    assert outcome(single) == "not_met"


def test_sensory_with_sural_sparing_is_possible():
    pattern = [Sensory("median", amplitude=15), Sensory("sural", amplitude=10, cv=45)]
    assert outcome(run(healthy_four_nerves() + pattern, phenotype="sensory")) == "possible_cidp"
    sural_low = [Sensory("median", amplitude=15), Sensory("sural", amplitude=5, cv=45)]
    assert outcome(run(healthy_four_nerves() + sural_low, phenotype="sensory")) == "not_met"
    wrist = [Sensory("median", amplitude=15, wrist_entrapment=True), Sensory("sural", amplitude=10, cv=45)]
    assert outcome(run(healthy_four_nerves() + wrist, phenotype="sensory")) == "not_met"


def test_sensory_is_never_cidp_and_needs_normal_motor_conduction():
    slow = [Sensory("median", amplitude=25, cv=38), Sensory("ulnar", amplitude=25, cv=38)]
    with_motor = run(STRONG + slow, phenotype="sensory")
    assert outcome(with_motor) == "not_met" and "sensory-predominant" in outcome(with_motor, "rule")
    no_motor = run(slow, phenotype="sensory")
    assert outcome(no_motor) == "not_met" and "motor conduction not evaluable" in outcome(no_motor, "rule")


def test_unknown_phenotype_is_not_met_with_a_reason():
    result = run(STRONG + SENSORY_ABNORMAL_2, phenotype="hereditary")
    assert outcome(result) == "not_met" and "hereditary" in outcome(result, "rule")


# ---------------------------------------------------------------- missing data, cohorts


def test_missing_motor_values_are_not_evaluable_never_normal():
    blank = Motor(
        "median", dml=None, cv=None, amplitudes=(None, None), durations=(None, None), f_latency=None
    )
    result = run([blank] + SENSORY_ABNORMAL_2)
    statuses = set(result.findings.loc[result.findings["modality"] == "motor", "status"])
    assert statuses == {NOT_EVALUABLE}
    assert motor(result) == NOT_MET
    assert "motor conduction not evaluable" in outcome(result, "rule")


def test_visits_are_judged_independently_in_one_pass():
    visits = [
        Visit(STRONG + SENSORY_ABNORMAL_2, visit_date="2024-01-10"),
        Visit(WEAK + SENSORY_NORMAL, visit_date="2024-06-10", phenotype="motor"),
        Visit(healthy_four_nerves() + SENSORY_NORMAL, visit_date="2024-12-10"),
    ]
    result = evaluate(visits, ID)
    assert result.outcomes["outcome"].tolist() == ["cidp", "possible_cidp", "not_met"]
    assert result.outcomes["phenotype"].tolist() == ["typical", "motor", "typical"]
    assert list(result.outcomes.columns) == [
        "visit_key",
        "outcome",
        "rule",
        "motor",
        "sensory",
        "phenotype",
        "undecided_items",
    ]
    assert result.extra_keys == ("motor", "sensory")


def test_phenotype_not_recorded_is_said():
    # DESIGN.md §5 / project wording: without a recorded phenotype the typical-CIDP rules of Van den Bergh et
    # al., Eur J Neurol 2021 (from memory, not verified) apply, and the rule says so instead of "typical:"
    result = run(STRONG + SENSORY_ABNORMAL_2, phenotype=None)
    assert outcome(result, "rule").startswith("phenotype not recorded — judged with the typical-CIDP rules:")
    assert outcome(run(STRONG + SENSORY_ABNORMAL_2), "rule").startswith("typical:")


def test_outcomes_are_worded_as_electrodiagnostic_criteria():
    # project wording: electrodiagnostic criteria, never a diagnosis; the "possible" specificity
    # figure is from Rajabally et al., J Neurol Neurosurg Psychiatry 2009;80:1364–1368
    # (69.2 %, 2006 version of the criteria)
    from tracker.check_report import outcome_words

    assert (
        outcome_words("ean-pns-2021-cidp", "cidp")
        == "meets the EAN/PNS 2021 electrodiagnostic criteria for CIDP"
    )
    possible = outcome_words("efns-pns-2010-cidp", "possible")
    assert (
        possible.startswith("EFNS/PNS 2010 electrodiagnostic category: possible")
        and "69.2 %" in possible
        and "Rajabally" in possible
    )
    assert "undecided" in outcome_words("aan-1991-cidp", "undecided")
