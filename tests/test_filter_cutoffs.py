"""Distal CMAP duration and the low-frequency filter: the EFNS/PNS 2010 cut-offs were derived at one filter
setting; the EAN/PNS 2021 set has filter-specific cut-offs.

Sources:
- EFNS/PNS 2010: Van den Bergh PYK et al. Eur J Neurol 2010;17:356–363 — distal CMAP duration median ≥ 6.6,
  ulnar ≥ 6.7, peroneal ≥ 7.6, tibial ≥ 8.8 ms (verified as restated in Ann Clin Transl Neurol
  2021;8:1110–1121, Table 2).
- The filter those cut-offs were derived at, 20 Hz: Isose S, Kuwabara S, Kokubun N, et al. J Peripher Nerv
  Syst 2009;14:151–158 — from memory, not verified (reference sheet criteria.md §10 question 9).
- EAN/PNS 2021: Van den Bergh PYK et al. Eur J Neurol 2021;28:3556–3583 — median > 8.4 ms at 2 Hz, > 7.4 ms at
  20 Hz: from memory, not verified (reference sheet §2.4).
- Rajabally YA et al. J Neurol Neurosurg Psychiatry 2015;86:115–119 adopts the 2010 cut-offs (from memory, not
  verified).
Every study below is invented test data.
"""

from __future__ import annotations

import pytest

from criteria_cases import Motor, Visit, evaluate, finding, outcome
from tracker.criteria.model import MET, NOT_EVALUABLE, NOT_MET, Settings
from tracker.criteria.thresholds import load

EFNS, EAN, RAJABALLY = "efns-pns-2010-cidp", "ean-pns-2021-cidp", "rajabally-2015-gbs"
STRICT = Settings(duration_filter_strict=True)


def median(duration: float, lff: float | None) -> Motor:
    return Motor("median", durations=(duration, duration + 0.3), lff=lff)


def duration_finding(criteria: str, nerve: Motor, settings: Settings | None = None):
    return finding(evaluate([Visit([nerve])], criteria, settings), nerve.nerve, "dcmap_duration")


@pytest.mark.parametrize("criteria", [EFNS, RAJABALLY])
def test_the_2010_cut_offs_name_the_filter_they_were_derived_at(criteria):
    rows = [r for r in load(criteria).rows if r.item == "dcmap_duration"]
    assert sorted(r.nerve for r in rows) == ["fibular", "median", "tibial", "ulnar"]
    for row in rows:
        assert row.derived_lff_hz == 20 and row.derived_lff_status == "memory" and row.lff_hz is None
        assert "isose-2009" in row.citations and "Isose S, Kuwabara S, Kokubun N, et al." in row.source


def test_the_issue_case_7_9_ms_median_at_2_hz():
    # 7.9 ms ≥ 6.6 ms (2010) but not > 8.4 ms (2021, 2 Hz): the 2010 verdict now says the filter differs.
    efns = duration_finding(EFNS, median(7.9, 2.0))
    assert efns["status"] == MET and efns["threshold"] == 6.6
    assert efns["reason"] == (
        "warning: recorded with a 2 Hz low-frequency filter, the cut-off was derived at 20 Hz "
        "(from memory, not verified); judged as published, one set of cut-offs "
        "(setting duration_filter_strict off)"
    )
    ean = duration_finding(EAN, median(7.9, 2.0))
    assert (
        ean["status"] == NOT_MET and ean["threshold"] == 8.4 and ean["limit_name"] == "cut-off for LFF 2 Hz"
    )
    # With the setting on, the 2010 item is not evaluable instead, and says why.
    strict = duration_finding(EFNS, median(7.9, 2.0), STRICT)
    assert strict["status"] == NOT_EVALUABLE
    assert strict["reason"] == (
        "recorded with a 2 Hz low-frequency filter; the cut-off was derived at 20 Hz "
        "(from memory, not verified): not evaluable (setting duration_filter_strict on)"
    )
    # The 2021 set does not depend on the setting.
    assert duration_finding(EAN, median(7.9, 2.0), STRICT)["status"] == NOT_MET


def test_the_setting_changes_the_2010_outcome_only_through_that_item():
    # (g) alone in one nerve → "possible" (a demyelinating parameter in one nerve); not evaluable → undecided.
    nerves = [median(7.9, 2.0)]
    assert outcome(evaluate([Visit(nerves)], EFNS)) == "possible"
    strict = evaluate([Visit(nerves)], EFNS, STRICT)
    assert outcome(strict) == "undecided"
    assert [(i["nerve"], i["item"]) for i in outcome(strict, "undecided_items")] == [
        ("median", "dcmap_duration")
    ]


@pytest.mark.parametrize(
    "duration, expected", [(6.59, NOT_MET), (6.6, MET), (6.61, MET)], ids=["below", "at", "above"]
)
@pytest.mark.parametrize("settings", [Settings(), STRICT], ids=["publication", "strict"])
def test_at_the_derivation_filter_nothing_is_said_and_the_edge_holds(duration, expected, settings):
    # 20 Hz, the filter of the cut-offs: judged as published (median ≥ 6.6 ms, inclusive), no warning.
    row = duration_finding(EFNS, median(duration, 20.0), settings)
    assert row["status"] == expected and row["reason"] == ""


@pytest.mark.parametrize("lff", [2.0, 5.0, 10.0])
def test_every_other_filter_warns_also_when_not_met(lff):
    row = duration_finding(EFNS, median(6.0, lff))
    assert row["status"] == NOT_MET
    assert row["reason"].startswith(f"warning: recorded with a {lff:g} Hz low-frequency filter")


def test_filter_not_recorded():
    publication = duration_finding(EFNS, median(7.9, None))
    assert publication["status"] == MET
    assert publication["reason"].startswith(
        "warning: low-frequency filter not recorded, the cut-off was derived at 20 Hz"
    )
    strict = duration_finding(EFNS, median(7.9, None), STRICT)
    assert strict["status"] == NOT_EVALUABLE and strict["reason"].startswith(
        "low-frequency filter not recorded;"
    )


def test_a_missing_duration_keeps_its_own_reason():
    row = duration_finding(EFNS, Motor("median", durations=(None, 6.0), lff=2.0))
    assert row["status"] == NOT_EVALUABLE and row["reason"] == "value missing"


@pytest.mark.parametrize("nerve, cut_off", [("ulnar", 6.7), ("fibular", 7.6), ("tibial", 8.8)])
def test_rajabally_adopts_the_2010_cut_offs_with_the_same_warning(nerve, cut_off):
    sites = {"ulnar": 3, "fibular": 3, "tibial": 2}[nerve]
    test = Motor(
        nerve,
        durations=(cut_off, cut_off + 0.2, cut_off + 0.3)[:sites],
        lff=2.0,
        amplitudes=(8.0, 7.8, 7.6)[:sites],
    )
    publication = duration_finding(RAJABALLY, test)
    assert (
        publication["status"] == MET
        and publication["threshold"] == cut_off
        and "setting duration_filter_strict off" in publication["reason"]
    )
    assert duration_finding(RAJABALLY, test, STRICT)["status"] == NOT_EVALUABLE
