"""Visit history: the content fingerprint of stored visits, and revisions kept before a visit is amended."""

from __future__ import annotations

from typing import Any

import pandas as pd
from sqlalchemy import insert, select
from sqlalchemy.orm import Session

from tracker.db.models import NerveTest, StimulationSite, Visit, VisitRevision, utc_now
from tracker.services import audit
from tracker.services.measurement_file import NERVE_LEVEL, SITE_VALUES, VISIT_LEVEL, fingerprints_of
from tracker.services.rows import chunks as _chunks
from tracker.services.rows import clean as _clean


def stored_fingerprints(session: Session, visit_ids: list[int]) -> dict[int, str]:
    """Content fingerprints of stored visits, computed from their rows exactly as an import computes them."""
    key_columns = [Visit.id.label("visit_id"), Visit.patient_id.label("patient"), Visit.visit_date]
    visits, tests, sites = [], [], []
    for part in _chunks(visit_ids):
        visits += session.execute(select(*key_columns, *[getattr(Visit, c) for c in VISIT_LEVEL]).where(Visit.id.in_(part))).all()
        test_key = [NerveTest.visit_id, NerveTest.nerve, NerveTest.side, NerveTest.modality]
        tests += session.execute(select(*test_key, *[getattr(NerveTest, c) for c in NERVE_LEVEL]).where(NerveTest.visit_id.in_(part))).all()
        site_values = [getattr(StimulationSite, c) for c in SITE_VALUES]
        sites += session.execute(
            select(*test_key, *site_values).join(StimulationSite, StimulationSite.nerve_test_id == NerveTest.id).where(NerveTest.visit_id.in_(part))
        ).all()
    visit_frame = pd.DataFrame(visits, columns=["visit_id", "patient", "visit_date", *VISIT_LEVEL]).sort_values("visit_id")
    visit_frame["patient"] = visit_frame["visit_id"]  # one group per visit: the key only needs to be unique
    visit_frame["visit_date"] = 0
    test_frame = pd.DataFrame(tests, columns=["patient", "nerve", "side", "modality", *NERVE_LEVEL]).assign(visit_date=0)
    site_frame = pd.DataFrame(sites, columns=["patient", "nerve", "side", "modality", *SITE_VALUES]).assign(visit_date=0)
    visit_frame = visit_frame.sort_values(["patient", "visit_date"]).reset_index(drop=True)
    return dict(zip(visit_frame["visit_id"], fingerprints_of(site_frame, test_frame, visit_frame)))


def _snapshot(session: Session, visit_ids: list[int]) -> dict[int, dict[str, Any]]:
    """The stored content of each visit, as plain JSON-ready data."""
    tests_by_visit: dict[int, list[dict[str, Any]]] = {v: [] for v in visit_ids}
    test_columns = [c for c in NerveTest.__table__.columns if c.name not in ("id", "visit_id")]
    site_columns = [c for c in StimulationSite.__table__.columns if c.name not in ("id", "nerve_test_id")]
    visit_columns = [Visit.height_cm, Visit.diagnosis, Visit.phenotype, Visit.examiner, Visit.laboratory]
    visits = {}
    for part in _chunks(visit_ids):
        for row in session.execute(select(Visit.id, *visit_columns).where(Visit.id.in_(part))):
            visits[row[0]] = {c.key: _clean(v) for c, v in zip(visit_columns, row[1:])}
        tests = session.execute(select(NerveTest.id, NerveTest.visit_id, *test_columns).where(NerveTest.visit_id.in_(part))).all()
        test_ids = [t[0] for t in tests]
        sites: dict[int, list[dict[str, Any]]] = {t: [] for t in test_ids}
        for test_part in _chunks(test_ids):
            for s in session.execute(
                select(StimulationSite.nerve_test_id, *site_columns).where(StimulationSite.nerve_test_id.in_(test_part)).order_by(StimulationSite.site_order)
            ):
                sites[s[0]].append({c.name: _clean(v) for c, v in zip(site_columns, s[1:])})
        for t in tests:
            entry = {c.name: _clean(v) for c, v in zip(test_columns, t[2:])}
            entry["sites"] = sites[t[0]]
            tests_by_visit[t[1]].append(entry)
    return {v: {"visit": visits.get(v, {}), "nerve_tests": tests_by_visit[v]} for v in visit_ids}


def keep_history(session: Session, changed: pd.DataFrame, *, username: str, reason: str = "import --replace") -> None:
    """Snapshot each visit in ``changed`` (``visit_id``, ``version``, ``status``, fingerprints, ``patient``,
    ``visit_date``) into ``visit_revisions`` before it is amended, and audit the replacement."""
    visit_ids = [int(v) for v in changed["visit_id"]]
    snapshots = _snapshot(session, visit_ids)
    now = utc_now()
    for row in changed.itertuples():
        visit_id = int(row.visit_id)
        session.execute(
            insert(VisitRevision),
            [
                {
                    "visit_id": visit_id,
                    "revision": int(row.version),
                    "status": row.status,
                    "content_sha256": row.db_fingerprint,
                    "snapshot": snapshots[visit_id],
                    "replaced_at": now,
                    "replaced_by": username,
                    "reason": reason,
                }
            ],
        )
        audit.record(
            session,
            username=username,
            action="replace_visit",
            entity="visits",
            entity_key=f"{row.patient}/{row.visit_date.isoformat()}",
            before={"version": int(row.version), "content_sha256": row.db_fingerprint, "kept_as_revision": int(row.version)},
            after={"version": int(row.version) + 1, "content_sha256": row.fingerprint},
        )
