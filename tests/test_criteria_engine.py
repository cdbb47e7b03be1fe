"""Engine-wide properties: per-visit and vectorised paths agree, row order does not matter, worse values
never undo a met finding, missing data are never normal, limits strata are chosen by age."""

from __future__ import annotations

import random

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from criteria_cases import Motor, Sensory, Visit, evaluate, frames
from tracker.criteria import engine, limits
from tracker.criteria.model import MET, NOT_EVALUABLE

SETS = engine.available()


def random_visit(rng: random.Random, patient: str, day: int) -> Visit:
    """An invented study: four motor nerves and three sensory nerves with
    values from normal to very abnormal."""

    def motor(nerve, dml, cv, amp, f):
        n_sites = 3 if nerve in ("ulnar", "fibular") else 2
        amplitudes = [round(amp * rng.uniform(0.3, 1.5), 1)]
        for _ in range(n_sites - 1):
            amplitudes.append(round(amplitudes[-1] * rng.uniform(0.3, 1.0), 1))
        durations = [round(rng.uniform(4.5, 11), 1)]
        for _ in range(n_sites - 1):
            durations.append(round(durations[-1] * rng.uniform(1.0, 1.8), 1))
        absent = rng.random() < 0.15
        return Motor(
            nerve,
            dml=round(dml * rng.uniform(0.7, 2.2), 2),
            cv=round(cv * rng.uniform(0.4, 1.2), 1),
            amplitudes=tuple(amplitudes),
            durations=tuple(durations),
            f_latency=round(f * rng.uniform(0.8, 1.8), 1),
            f_absent=absent,
            temperature=round(rng.uniform(29, 35), 1),
            lff=rng.choice([2.0, 5.0, 10.0, 20.0, None]),
            wrist_entrapment=rng.choice([None, False, True]) if nerve == "median" else None,
            segment_mm=400 if nerve == "tibial" else 250,
        )

    nerves = [
        motor("median", 3.8, 55, 8, 28),
        motor("ulnar", 3.0, 57, 9, 29),
        motor("fibular", 5.0, 47, 5, 50),
        motor("tibial", 4.8, 46, 10, 50),
    ]
    nerves += [
        Sensory(n, amplitude=round(rng.uniform(0, 40), 1), cv=round(rng.uniform(25, 60), 1))
        for n in ("median", "ulnar", "sural")
    ]
    return Visit(
        nerves,
        patient=patient,
        visit_date=f"2024-{1 + day % 12:02d}-{1 + day % 27:02d}",
        age_years=rng.choice([35, 55, 75, None]),
        phenotype=rng.choice(["typical", "distal", "motor", "sensory", "multifocal", None]),
    )


@pytest.fixture(scope="module")
def cohort():
    rng = random.Random(11)
    return [random_visit(rng, f"G-{i:03d}", i) for i in range(20)]


def _outcomes(result) -> pd.DataFrame:
    return result.outcomes.drop(columns=["visit_key"]).reset_index(drop=True)


@pytest.mark.parametrize("criteria", SETS)
def test_per_visit_and_vectorised_paths_agree(cohort, criteria):
    together = engine.evaluate(*frames(cohort), limits.default_limits(), [criteria])[criteria]
    together_outcomes = together.outcomes.set_index("visit_key")
    v, t, s = frames(cohort)
    together = engine.evaluate(v, t, s, limits.default_limits(), [criteria])[criteria]
    for key in v["visit_key"]:
        alone = engine.evaluate(
            v[v.visit_key == key],
            t[t.visit_key == key],
            s[s.test_key.isin(t[t.visit_key == key].test_key)],
            limits.default_limits(),
            [criteria],
        )[criteria]
        a = alone.findings.sort_values(["nerve", "side", "modality", "item"]).reset_index(drop=True)
        b = (
            together.findings[together.findings.visit_key == key]
            .sort_values(["nerve", "side", "modality", "item"])
            .reset_index(drop=True)
        )
        pd.testing.assert_frame_equal(a, b)
        assert (
            alone.outcomes.drop(columns="visit_key").iloc[0].to_dict()
            == together.outcomes.set_index("visit_key").loc[key].to_dict()
        )
    assert len(together_outcomes) == len(cohort)


@pytest.mark.parametrize("criteria", SETS)
def test_row_order_does_not_matter(cohort, criteria):
    v, t, s = frames(cohort[:15])
    first = engine.evaluate(v, t, s, limits.default_limits(), [criteria])[criteria]
    shuffled = engine.evaluate(
        v.sample(frac=1, random_state=3),
        t.sample(frac=1, random_state=4),
        s.sample(frac=1, random_state=5),
        limits.default_limits(),
        [criteria],
    )[criteria]
    key = ["visit_key", "nerve", "side", "modality", "item"]
    pd.testing.assert_frame_equal(
        first.findings.sort_values(key).reset_index(drop=True),
        shuffled.findings.sort_values(key).reset_index(drop=True),
    )
    pd.testing.assert_frame_equal(
        first.outcomes.sort_values("visit_key").reset_index(drop=True),
        shuffled.outcomes.sort_values("visit_key").reset_index(drop=True),
    )


WORSENING_ITEMS = {"distal latency": "dml", "conduction velocity": "cv", "F-wave latency": "f"}


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    dml=st.floats(2.0, 12.0),
    extra_latency=st.floats(0.0, 5.0),
    cv=st.floats(15.0, 70.0),
    slower=st.floats(0.0, 10.0),
    f=st.floats(20.0, 70.0),
    extra_f=st.floats(0.0, 20.0),
    criteria=st.sampled_from([c for c in SETS]),
)
def test_longer_latency_or_slower_velocity_never_unmeets(
    dml, extra_latency, cv, slower, f, extra_f, criteria
):
    """Making a latency longer or a velocity slower never turns a met
    latency/velocity finding into not met."""
    base = Visit(
        [
            Motor("median", dml=round(dml, 2), cv=round(cv, 1), f_latency=round(f, 1)),
            Motor("ulnar", amplitudes=(8, 7.8, 7.6), durations=(5.5, 5.6, 5.7)),
        ]
    )
    worse = Visit(
        [
            Motor(
                "median",
                dml=round(dml + extra_latency, 2),
                cv=round(max(cv - slower, 5.0), 1),
                f_latency=round(f + extra_f, 1),
            ),
            Motor("ulnar", amplitudes=(8, 7.8, 7.6), durations=(5.5, 5.6, 5.7)),
        ]
    )
    a = evaluate([base], criteria).findings
    b = evaluate([worse], criteria).findings
    for parameter in WORSENING_ITEMS:
        before = a[(a.nerve == "median") & (a.parameter == parameter)].set_index("item")["status"]
        after = b[(b.nerve == "median") & (b.parameter == parameter)].set_index("item")["status"]
        for item, status in before.items():
            if str(item).startswith(("normal", "sural_normal")):
                continue  # normality checks (e.g. Hadden's "normal" class) rightly turn not met
            if status == MET:
                assert after[item] == MET, (criteria, parameter, item)


@pytest.mark.parametrize("criteria", SETS)
def test_a_study_without_values_is_never_normal(criteria):
    empty = Visit(
        [Motor("median", dml=None, cv=None, amplitudes=(None, None), durations=(None, None), f_latency=None)]
    )
    result = evaluate([empty], criteria)
    assert (result.findings["status"] == NOT_EVALUABLE).all(), result.findings[["item", "status"]]
    assert result.outcomes.iloc[0]["outcome"] not in ("normal", "met", "definite", "cidp")


def test_stratum_is_chosen_by_age():
    # Invented laboratory limits: a stricter distal latency limit under 60 years.
    rows = limits.default_limits()
    young = rows[
        (rows.nerve == "median") & (rows.modality == "motor") & (rows.parameter == "distal_latency_ms")
    ].assign(value=4.0, age_min=18.0, age_max=60.0)
    table = pd.concat([rows, young], ignore_index=True)
    v, t, s = frames(
        [Visit([Motor("median", dml=6.2)], age_years=40), Visit([Motor("median", dml=6.2)], age_years=70)]
    )
    result = engine.evaluate(v, t, s, table, ["efns-pns-2010-cidp"])["efns-pns-2010-cidp"]
    dml = result.findings[result.findings.item == "dml"].set_index("visit_key")
    # 1.5 × 4.0 = 6.0 ms (age 40: met); 1.5 × 4.4 = 6.6 ms (age 70: not met)
    assert dml.loc[v.visit_key[0], "threshold"] == 6.0 and dml.loc[v.visit_key[0], "status"] == MET
    assert dml.loc[v.visit_key[1], "threshold"] == 6.6 and dml.loc[v.visit_key[1], "status"] != MET
    assert np.isclose(dml.loc[v.visit_key[0], "limit"], 4.0)


def test_overlapping_strata_are_detected():
    rows = pd.DataFrame(
        [
            {
                "nerve": "median",
                "modality": "motor",
                "parameter": "distal_latency_ms",
                "bound": "uln",
                "value": 4.2,
                "age_min": 20,
                "age_max": 60,
            },
            {
                "nerve": "median",
                "modality": "motor",
                "parameter": "distal_latency_ms",
                "bound": "uln",
                "value": 4.5,
                "age_min": 50,
                "age_max": 90,
            },
            {
                "nerve": "median",
                "modality": "motor",
                "parameter": "distal_latency_ms",
                "bound": "uln",
                "value": 4.6,
                "age_min": 60,
                "age_max": 90,
                "sex": "male",
            },
        ]
    )
    assert limits.overlapping_strata(rows) == [(0, 1)]


def test_the_trace_names_the_stratum_used():
    # Invented laboratory limits for a test: an age band for the median distal latency.
    rows = limits.default_limits()
    young = rows[
        (rows.nerve == "median") & (rows.modality == "motor") & (rows.parameter == "distal_latency_ms")
    ].assign(value=4.0, age_min=18.0, age_max=60.0, source="invented laboratory limit")
    result = evaluate(
        [Visit([Motor("median", dml=6.2)], age_years=40)],
        "efns-pns-2010-cidp",
        limit_rows=pd.concat([rows, young], ignore_index=True),
    )
    source = result.findings[result.findings.item == "dml"].iloc[0]["limit_source"]
    assert source == "invented laboratory limit — stratum: age 18–60 y"


@pytest.mark.parametrize("criteria", SETS)
def test_statuses_are_the_contract_words_and_every_gap_says_why(cohort, criteria):
    # DESIGN.md §5 (project contract): met / not_met / not_evaluable (want of data) / not_applicable
    # (exclusion, precondition, pattern); both of the last two always name their reason.
    from tracker.criteria.model import NOT_APPLICABLE, STATUSES

    result = engine.evaluate(*frames(cohort), limits.default_limits(), [criteria])[criteria]
    statuses = result.findings["status"]
    assert set(statuses) <= set(STATUSES)
    gaps = result.findings[statuses.isin([NOT_EVALUABLE, NOT_APPLICABLE])]
    assert gaps["reason"].map(lambda r: isinstance(r, str) and r.strip() != "").all()


def test_met_turning_not_evaluable_and_outcome_turning_undecided_are_changes():
    # DESIGN.md §5 (project contract): a met finding lost for want of data is reported, and so is the outcome.
    # EFNS/PNS 2010 (Van den Bergh et al., Eur J Neurol 2010): median distal latency 7.0 ms ≥ 150 % of ULN
    # 4.4 ms in one nerve → possible; at the next visit (invented) the latency is not recorded → undecided.
    from tracker.check_report import json_payload, text
    from tracker.services.evaluation import VisitCheck
    from tracker.services.limit_sets import LimitSetInfo

    criteria = "efns-pns-2010-cidp"
    first = Visit([Motor("median", dml=7.0)], patient="T-9", visit_date="2024-01-10")
    second = Visit([Motor("median", dml=None)], patient="T-9", visit_date="2024-06-10")
    v, t, s = frames([first, second])
    result = engine.evaluate(v, t, s, limits.default_limits(), [criteria])[criteria]
    assert result.outcomes["outcome"].tolist() == ["possible", "undecided"]
    later = v["visit_key"].iloc[1]
    changes = engine.changes_between_visits(v, result)
    dml = changes[(changes["visit_key"] == later) & (changes["item"] == "dml")]
    assert dml["change"].tolist() == ["met → not evaluable (want of data)"]
    moved = engine.outcome_changes(v, result)
    assert moved[["previous_outcome", "outcome"]].values.tolist() == [["possible", "undecided"]]
    # check text and JSON say it
    only = engine.evaluate(v, t, s, limits.default_limits(), [criteria])[criteria]
    from tracker.services.evaluation import _only

    check = VisitCheck(
        patient="T-9",
        visit_date=pd.Timestamp("2024-06-10").date(),
        visit_key=int(later),
        phenotype=None,
        limits=LimitSetInfo(1, "default", 1, 0, True, None),
        results={criteria: _only(only, int(later))},
        warnings=pd.DataFrame(columns=["message"]),
        closest={criteria: pd.DataFrame()},
        changes={criteria: changes[changes["visit_key"] == later]},
        previous_date=pd.Timestamp("2024-01-10").date(),
        outcome_changes={criteria: ("possible", "undecided")},
    )
    words = text(check)
    assert "outcome: possible → undecided" in words and "met → not evaluable" in words
    assert (
        "data missing that could make the set met" in words
        and "median right (motor): distal motor latency" in words
    )
    payload = json_payload(check)
    assert payload["outcome"] == "undecided"
    assert {(f["nerve"], f["item"]) for f in payload["undecided_items"]} >= {("median", "dml")}
    assert payload["changes_since_previous"][0] == {
        "nerve": None,
        "side": None,
        "item": "outcome",
        "change": "possible → undecided",
        "previous": "possible",
        "current": "undecided",
    }


# ---------------------------------------------------------------- building blocks of the fast path (issue 12)
# Each is compared with the plain pandas operation it stands for (common practice, no source).


def test_codes_tell_apart_what_pandas_factorize_tells_apart():
    from tracker.criteria.codes import codes_of, distinct

    words = np.array(["ulnar", None, "median", np.nan, "ulnar", pd.NA, "médian"], dtype=object)
    codes, count = codes_of(words)
    expected, uniques = pd.factorize(words, use_na_sentinel=False)
    assert count == len(uniques)
    # Same partition of the rows (every missing value in one group), whatever the numbering.
    assert len(set(zip(codes, expected))) == len(set(codes)) == len(set(expected))
    # Floats by their bits: -0.0 and 0.0 apart, NaN together.
    float_codes, _ = codes_of(np.array([0.0, -0.0, np.nan, np.nan, 1.5]))
    assert float_codes[0] != float_codes[1] and float_codes[2] == float_codes[3]
    combined, first = distinct(np.array(["a", "b", "a", "b"], dtype=object), np.array([1, 1, 1, 2]))
    assert list(combined) == [0, 1, 0, 2] and list(first) == [0, 1, 3]


def test_stack_gives_what_pd_concat_gives():
    from tracker.criteria.rules import stack

    a = pd.DataFrame({"t": pd.Series(["x", None], dtype=object), "v": [1.0, np.nan], "k": [1, 2]})
    b = pd.DataFrame({"t": pd.Series([np.nan, "y"], dtype=object), "v": [3.0, 4.0], "k": [3, 4]})
    for parts in ([a, b], [a.iloc[:0], b], [b]):
        pd.testing.assert_frame_equal(stack(parts), pd.concat(parts, ignore_index=True), check_exact=True)
        assert stack(parts)["t"].tolist() == pd.concat(parts, ignore_index=True)["t"].tolist()
    # Different dtypes or columns: pandas decides, as before.
    c = b.assign(k=b["k"].astype(float))
    pd.testing.assert_frame_equal(stack([a, c]), pd.concat([a, c], ignore_index=True))
    d = b.rename(columns={"k": "other"})
    pd.testing.assert_frame_equal(stack([a, d]), pd.concat([a, d], ignore_index=True))
    # The result owns its arrays: editing it leaves the parts alone.
    out = stack([a, b])
    out.loc[0, "t"] = "changed"
    assert a.loc[0, "t"] == "x"


def test_codes_by_content_are_reused_only_for_read_only_columns():
    from tracker.criteria import memo

    frame = pd.DataFrame({"nerve": pd.Series(["ulnar", "median", "ulnar"], dtype=object)})
    calls = []

    def compute(values):
        calls.append(1)
        return np.arange(len(values))

    with memo.shared():
        column = frame["nerve"].to_numpy()  # read-only under copy-on-write
        assert not column.flags.writeable
        first = memo.by_content("codes", (column,), lambda: compute(column))
        again = memo.by_content(
            "codes", (frame.copy(deep=False)["nerve"].to_numpy(),), lambda: compute(column)
        )
        assert again is first and len(calls) == 1 and not first.flags.writeable
        writable = np.array(["ulnar", "median", "ulnar"], dtype=object)
        memo.by_content("codes", (writable,), lambda: compute(writable))
        memo.by_content("codes", (writable,), lambda: compute(writable))
        assert len(calls) == 3  # a writable array could change: never reused
    memo.by_content("codes", (column,), lambda: compute(column))
    assert len(calls) == 4  # outside an evaluation nothing is kept


def test_findings_of_an_evaluation_are_editable_and_own_their_arrays(cohort):
    """Within an evaluation the items share read-only columns; what the sets hand back is the callers' own."""
    results = engine.evaluate(*frames(cohort), limits.default_limits())
    for result in results.values():
        findings = result.findings
        assert len(findings)
        # A read-only column would refuse these edits (ValueError).
        for column in ("nerve", "criteria", "parameter", "source", "reason", "visit_key"):
            findings.loc[findings.index[:1], column] = findings[column].iloc[-1]
