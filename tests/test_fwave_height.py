"""Minimal F-wave latency limits by height band in the shipped default limit set.

Sources:
- Height bands (below 160, 160–170, 180 cm or more) and their upper limits: the Buschbacher 1999 F-wave
  series, Am J Phys Med Rehabil 1999;78(6 Suppl) (median → APB, ulnar → ADM, peroneal → EDB, tibial → AH) —
  values from memory, not verified against the papers' tables.
- All adults, used from 170 to 180 cm and when the height is not recorded: Preston DC, Shapiro BE,
  Electromyography and Neuromuscular Disorders, appendix (median 31 ms, ulnar 32 ms verified; fibular and
  tibial 56 ms from memory, not verified).
- That F latencies must be normalised for height: same appendix (verified); normatives.md §1.5.
Heights are band edges (lower bound inclusive). Every study below is invented test data.
"""

from __future__ import annotations

import pytest

from criteria_cases import Motor, Visit, evaluate, finding
from tracker.criteria import limits
from tracker.criteria.model import MET, NOT_MET

EFNS, HADDEN = "efns-pns-2010-cidp", "hadden-1998-gbs"
BANDS = {  # nerve → (below 160, 160–170, all adults, 180 or more) in ms
    "median": (29.0, 30.0, 31.0, 32.5),
    "ulnar": (30.0, 31.0, 32.0, 33.5),
    "fibular": (51.0, 53.5, 56.0, 59.0),
    "tibial": (51.0, 53.5, 56.0, 59.0),
}
EDGES = [  # height (cm) → (band index, stratum words in the trace)
    (150.0, 0, "height below 160 cm"),
    (159.9, 0, "height below 160 cm"),
    (160.0, 1, "height 160–170 cm"),
    (169.9, 1, "height 160–170 cm"),
    (170.0, 2, "all adults"),
    (179.9, 2, "all adults"),
    (180.0, 3, "height 180 cm or more"),
    (184.0, 3, "height 180 cm or more"),
    (None, 2, "all adults"),
]


def f_finding(nerve: str, height: float | None, f_latency: float = 40.0, criteria: str = EFNS):
    result = evaluate([Visit([Motor(nerve, f_latency=f_latency)], height_cm=height)], criteria)
    return finding(result, nerve, "f_latency" if criteria == EFNS else "normal_f")


@pytest.mark.parametrize("nerve", sorted(BANDS))
@pytest.mark.parametrize("height, band, stratum", EDGES, ids=[str(e[0]) for e in EDGES])
def test_the_band_is_chosen_by_height_and_named_in_the_trace(nerve, height, band, stratum):
    row = f_finding(nerve, height)
    assert row["limit"] == BANDS[nerve][band]
    assert row["limit_source"].endswith(f"— stratum: {stratum}")
    if band == 2:
        assert row["limit_source"].startswith("Preston DC, Shapiro BE.")
    else:
        assert row["limit_source"].startswith("Buschbacher RM.") and row["limit_status"] == "memory"
        assert "(citation from memory, not verified)" in row["limit_source"]


def test_a_184_cm_patient_is_not_held_to_the_all_adults_tibial_limit():
    # Tibial minimal F 57 ms: above the all-adults 56 ms, within the 59 ms of the 180 cm band (Hadden 1998's
    # "normal" class asks F ≤ ULN; Ann Neurol 1998;44:780–788, class definition from memory, not verified).
    tall = f_finding("tibial", 184.0, f_latency=57.0, criteria=HADDEN)
    assert tall["status"] == MET and tall["limit"] == 59.0
    middle = f_finding("tibial", 175.0, f_latency=57.0, criteria=HADDEN)
    assert middle["status"] == NOT_MET and middle["limit"] == 56.0


@pytest.mark.parametrize(
    "f_latency, expected", [(76.69, NOT_MET), (76.7, MET), (76.71, MET)], ids=["below", "at", "above"]
)
def test_efns_2010_f_latency_uses_the_band_limit(f_latency, expected):
    # EFNS/PNS 2010 (c): F latency ≥ 130 % of ULN (Eur J Neurol 2010;17:356–363, verified via Ann Clin Transl
    # Neurol 2021, Table 2); tibial ULN 59 ms at 184 cm → 76.7 ms.
    row = f_finding("tibial", 184.0, f_latency=f_latency)
    assert row["threshold"] == 76.7 and row["status"] == expected


def test_the_shipped_bands_do_not_overlap_and_the_version_moved():
    rows = limits.default_limits()
    assert limits.overlapping_strata(rows) == []
    f_rows = rows[rows["parameter"] == "f_latency_ms"]
    assert len(f_rows) == 16 and set(f_rows["nerve"]) == set(BANDS)
    # Saved evaluations name the limit set's version: changing the shipped rows moved it.
    assert limits.DEFAULT_VERSION == 2


def test_saved_evaluations_move_to_the_new_shipped_version(db_url, monkeypatch):
    # A database evaluated with the previous shipped set (version 1) moves to this version: the default mark
    # follows the shipped set, and every saved evaluation is recomputed under it (the fingerprint names the
    # set and its version). Demo data: the invented clinic.
    from sqlalchemy import func, select

    from dashboard_support import fill_demo
    from tracker.db.models import Evaluation, LimitSet
    from tracker.db.session import make_engine, make_session_factory
    from tracker.services.evaluation import refresh_evaluations
    from tracker.services.limit_sets import resolve

    monkeypatch.setattr(limits, "DEFAULT_VERSION", 1)
    fill_demo(db_url)
    monkeypatch.setattr(limits, "DEFAULT_VERSION", 2)
    engine_ = make_engine(db_url)
    try:
        with make_session_factory(engine_).begin() as session:
            before = session.scalar(select(func.count()).select_from(Evaluation))
            info, rows = resolve(session, None)
            assert (info.name, info.version, info.is_default) == ("default", 2, True)
            marked = session.execute(select(LimitSet.name, LimitSet.version).where(LimitSet.is_default)).all()
            assert [tuple(m) for m in marked] == [("default", 2)]
            assert (rows["parameter"] == "f_latency_ms").sum() == 16
            counts = refresh_evaluations(session, username="invented-test-user")
            assert counts["unchanged"] == 0 and counts["recomputed"] == before > 0
            saved = session.scalar(
                select(func.count()).select_from(Evaluation).where(Evaluation.limit_set_id == info.id)
            )
            assert saved == before
            # Done once: a second pass finds nothing to recompute.
            assert refresh_evaluations(session, username="invented-test-user")["recomputed"] == 0
    finally:
        engine_.dispose()
