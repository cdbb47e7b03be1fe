"""Clinician inputs that the criteria need but must not guess, recorded per visit: the CIDP phenotype and,
per side, whether the median distal latency is explained by neuropathy at the wrist.

A change keeps the visit's earlier values as a revision and is written to the audit trail.
"""

from __future__ import annotations

import datetime as dt

import pandas as pd
from sqlalchemy import select, update
from sqlalchemy.orm import Session

from tracker.db.models import NerveTest, Visit, utc_now
from tracker.domain.vocabulary import PHENOTYPES, SIDES
from tracker.errors import NotFound, TrackerError
from tracker.services.access import audit
from tracker.services.history import keep_history, stored_fingerprints
from tracker.services.records import find_patient


def set_clinician_inputs(
    session: Session,
    code: str,
    visit_date: dt.date,
    *,
    username: str,
    phenotype: str | None = None,
    wrist_entrapment: dict[str, bool] | None = None,
) -> list[str]:
    """Record the inputs; return a line per change (empty when nothing changed)."""
    patient = find_patient(session, code)
    visit = session.scalar(
        select(Visit).where(Visit.patient_id == patient.id, Visit.visit_date == visit_date)
    )
    if visit is None:
        raise NotFound(f"Patient {code} has no visit on {visit_date.isoformat()}.")
    if phenotype is not None and phenotype not in PHENOTYPES:
        raise TrackerError(
            f"Invalid value for 'phenotype'. Allowed values are {', '.join(PHENOTYPES)}, but got "
            f"{phenotype!r} instead."
        )
    if phenotype is not None and visit.diagnosis not in (None, "cidp"):
        raise TrackerError(
            f"A phenotype is recorded for CIDP only; this visit's diagnosis is {visit.diagnosis}."
        )
    changes: list[str] = []
    new_values: dict[str, object] = {}
    if phenotype is not None and phenotype != visit.phenotype:
        new_values["phenotype"] = phenotype
        changes.append(f"phenotype: {visit.phenotype or '—'} → {phenotype}")
    median_updates = []
    for side, value in (wrist_entrapment or {}).items():
        if side not in SIDES:
            raise TrackerError(f"Invalid side {side!r}; expected left or right.")
        test = session.scalar(
            select(NerveTest).where(
                NerveTest.visit_id == visit.id,
                NerveTest.nerve == "median",
                NerveTest.side == side,
                NerveTest.modality == "motor",
            )
        ) or session.scalar(
            select(NerveTest).where(
                NerveTest.visit_id == visit.id, NerveTest.nerve == "median", NerveTest.side == side
            )
        )
        if test is None:
            raise NotFound(f"The visit has no {side} median nerve test to annotate.")
        if test.wrist_entrapment != value:
            median_updates.append((side, value))
            changes.append(f"{side} median wrist entrapment: {_word(test.wrist_entrapment)} → {_word(value)}")
    if not changes:
        return []
    history = pd.DataFrame(
        [
            {
                "visit_id": visit.id,
                "version": visit.version,
                "status": visit.status,
                "db_fingerprint": visit.content_sha256,
                "fingerprint": "",
                "patient": code,
                "visit_date": visit.visit_date,
            }
        ]
    )
    keep_history(session, history, username=username, reason="clinician inputs changed")
    if new_values:
        session.execute(update(Visit).where(Visit.id == visit.id).values(**new_values))
    for side, value in median_updates:
        session.execute(
            update(NerveTest)
            .where(NerveTest.visit_id == visit.id, NerveTest.nerve == "median", NerveTest.side == side)
            .values(wrist_entrapment=value)
        )
    fingerprint = stored_fingerprints(session, [visit.id])[visit.id]
    session.execute(
        update(Visit)
        .where(Visit.id == visit.id)
        .values(content_sha256=fingerprint, version=visit.version + 1, updated_at=utc_now())
    )
    audit.record(
        session,
        username=username,
        action="set_clinician_inputs",
        entity="visits",
        entity_key=f"{code}/{visit_date.isoformat()}",
        before={"version": visit.version},
        after={"version": visit.version + 1, "changes": changes},
    )
    return changes


def _word(value: bool | None) -> str:
    return "—" if value is None else ("yes" if value else "no")
