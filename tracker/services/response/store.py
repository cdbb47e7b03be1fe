"""Saving what the response analysis showed: one row per regimen, rule set (and version) and day judged, with
the visits compared and the evidence, audited when it is new or differs from what was saved before."""

from __future__ import annotations

import datetime as dt
import json

from sqlalchemy import select
from sqlalchemy.orm import Session

from tracker.db.models import ResponseAssessment
from tracker.services.access import audit
from tracker.services.records import find_patient
from tracker.services.response.patient import PatientResponse


def _plain(value):
    if isinstance(value, dt.date):
        return value.isoformat()
    if isinstance(value, list | tuple):
        return [_plain(v) for v in value]
    if isinstance(value, dict):
        return {k: _plain(v) for k, v in value.items()}
    if isinstance(value, float) and value != value:
        return None
    return value


def save_assessments(session: Session, result: PatientResponse, *, username: str) -> int:
    """Save (or update) every regimen's classification of ``result``; return how many rows were written."""
    if result.at is None:
        return 0
    patient = find_patient(session, result.patient)
    existing = {
        (row.therapy, row.regimen_start): row
        for row in session.scalars(
            select(ResponseAssessment).where(
                ResponseAssessment.patient_id == patient.id,
                ResponseAssessment.rule_set == result.rule_set.id,
                ResponseAssessment.rule_set_version == result.rule_set.version,
                ResponseAssessment.judged_on == result.at,
            )
        )
    }
    written = 0
    for c in result.classifications:
        evidence = _plain(
            {
                "evidence": c.evidence,
                "missing": c.missing,
                "notes": c.notes,
                "settings": result.settings.describe(),
            }
        )
        compared = [d.isoformat() for d in c.compared]
        row = existing.get((c.regimen.therapy, c.regimen.start_date))
        after = {
            "classification": c.classification,
            "visits_compared": compared,
            "regimen": c.regimen.label(),
        }
        if row is not None:
            if (row.classification, row.visits_compared, json.dumps(row.evidence, sort_keys=True)) == (
                c.classification,
                compared,
                json.dumps(evidence, sort_keys=True),
            ):
                continue
            before = {
                "classification": row.classification,
                "visits_compared": row.visits_compared,
                "regimen": row.regimen,
            }
            row.classification, row.visits_compared, row.evidence, row.regimen = (
                c.classification,
                compared,
                evidence,
                c.regimen.label(),
            )
            row.computed_at = dt.datetime.now(dt.UTC)
        else:
            before = None
            session.add(
                ResponseAssessment(
                    patient_id=patient.id,
                    therapy=c.regimen.therapy,
                    regimen_start=c.regimen.start_date,
                    regimen=c.regimen.label(),
                    rule_set=result.rule_set.id,
                    rule_set_version=result.rule_set.version,
                    judged_on=result.at,
                    classification=c.classification,
                    visits_compared=compared,
                    evidence=evidence,
                )
            )
        audit.record(
            session,
            username=username,
            action="save_response",
            entity="response_assessments",
            entity_key=f"{result.patient}/{c.regimen.therapy}/{c.regimen.start_date.isoformat()}/{result.rule_set.id}@{result.rule_set.version}/{result.at.isoformat()}",
            before=before,
            after=after,
        )
        written += 1
    session.flush()
    return written


def saved_assessments(session: Session, code: str) -> list[dict]:
    """Every saved classification of patient ``code``, oldest judgement first (plain dicts)."""
    patient = find_patient(session, code)
    rows = session.scalars(
        select(ResponseAssessment)
        .where(ResponseAssessment.patient_id == patient.id)
        .order_by(ResponseAssessment.judged_on, ResponseAssessment.regimen_start, ResponseAssessment.rule_set)
    )
    return [
        {
            "therapy": r.therapy,
            "regimen_start": r.regimen_start.isoformat(),
            "regimen": r.regimen,
            "rules": r.rule_set,
            "rules_version": r.rule_set_version,
            "judged_on": r.judged_on.isoformat(),
            "classification": r.classification,
            "visits_compared": r.visits_compared,
            "evidence": r.evidence,
        }
        for r in rows
    ]
