"""Visit history: the content fingerprint of stored visits, and revisions kept before a visit is amended."""

from __future__ import annotations

import datetime as dt
from typing import Any

import pandas as pd
from sqlalchemy import insert, select
from sqlalchemy.orm import Session

from tracker.db.models import NerveTest, StimulationSite, Visit, VisitRevision, utc_now
from tracker.domain import catalogue
from tracker.errors import Problem
from tracker.services.access import audit
from tracker.services.importing.fingerprints import fingerprints_of
from tracker.services.importing.measurements_check import MeasurementBatch
from tracker.services.importing.measurements_columns import NERVE_LEVEL, SITE_VALUES, VISIT_KEY, VISIT_LEVEL
from tracker.services.rows import chunks as _chunks
from tracker.services.rows import clean as _clean
from tracker.services.tables import ROW


def stored_fingerprints(session: Session, visit_ids: list[int]) -> dict[int, str]:
    """Content fingerprints of stored visits, computed from their rows exactly as an import computes them."""
    key_columns = [Visit.id.label("visit_id"), Visit.patient_id.label("patient"), Visit.visit_date]
    visits, tests, sites = [], [], []
    for part in _chunks(visit_ids):
        visits += session.execute(
            select(*key_columns, *[getattr(Visit, c) for c in VISIT_LEVEL]).where(Visit.id.in_(part))
        ).all()
        test_key = [NerveTest.visit_id, NerveTest.nerve, NerveTest.side, NerveTest.modality]
        tests += session.execute(
            select(*test_key, *[getattr(NerveTest, c) for c in NERVE_LEVEL]).where(
                NerveTest.visit_id.in_(part)
            )
        ).all()
        site_values = [getattr(StimulationSite, c) for c in SITE_VALUES]
        sites += session.execute(
            select(*test_key, *site_values)
            .join(StimulationSite, StimulationSite.nerve_test_id == NerveTest.id)
            .where(NerveTest.visit_id.in_(part))
        ).all()
    visit_frame = pd.DataFrame(
        visits, columns=["visit_id", "patient", "visit_date", *VISIT_LEVEL]
    ).sort_values("visit_id")
    visit_frame["patient"] = visit_frame["visit_id"]  # one group per visit: the key only needs to be unique
    visit_frame["visit_date"] = 0
    test_frame = pd.DataFrame(tests, columns=["patient", "nerve", "side", "modality", *NERVE_LEVEL]).assign(
        visit_date=0
    )
    site_frame = pd.DataFrame(sites, columns=["patient", "nerve", "side", "modality", *SITE_VALUES]).assign(
        visit_date=0
    )
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
        tests = session.execute(
            select(NerveTest.id, NerveTest.visit_id, *test_columns).where(NerveTest.visit_id.in_(part))
        ).all()
        test_ids = [t[0] for t in tests]
        sites: dict[int, list[dict[str, Any]]] = {t: [] for t in test_ids}
        for test_part in _chunks(test_ids):
            for s in session.execute(
                select(StimulationSite.nerve_test_id, *site_columns)
                .where(StimulationSite.nerve_test_id.in_(test_part))
                .order_by(StimulationSite.site_order)
            ):
                sites[s[0]].append({c.name: _clean(v) for c, v in zip(site_columns, s[1:])})
        for t in tests:
            entry = {c.name: _clean(v) for c, v in zip(test_columns, t[2:])}
            entry["sites"] = sites[t[0]]
            tests_by_visit[t[1]].append(entry)
    return {v: {"visit": visits.get(v, {}), "nerve_tests": tests_by_visit[v]} for v in visit_ids}


def keep_history(
    session: Session,
    changed: pd.DataFrame,
    *,
    username: str,
    reason: str = "import --replace",
    forced: dict[int, dict[str, Any]] | None = None,
) -> None:
    """Snapshot each visit in ``changed`` (``visit_id``, ``version``, ``status``, fingerprints, ``patient``,
    ``visit_date``) into ``visit_revisions`` before it is amended, and audit the replacement.

    ``forced``: visit id → what a ``--force`` overrode (the stored version, the version the file was based
    on), recorded in that visit's audit event.
    """
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
        after: dict[str, Any] = {"version": int(row.version) + 1, "content_sha256": row.fingerprint}
        if forced and visit_id in forced:
            after["forced"] = forced[visit_id]
        audit.record(
            session,
            username=username,
            action="replace_visit",
            entity="visits",
            entity_key=f"{row.patient}/{row.visit_date.isoformat()}",
            before={
                "version": int(row.version),
                "content_sha256": row.db_fingerprint,
                "kept_as_revision": int(row.version),
            },
            after=after,
        )


def _moment(value: dt.datetime | None) -> str:
    """An instant as a person reads it, in UTC (SQLite gives naive UTC back, PostgreSQL an aware time)."""
    if value is None:
        return "an unknown time"
    if value.tzinfo is not None:
        value = value.astimezone(dt.UTC)
    return value.strftime("%Y-%m-%d %H:%M UTC")


def last_changes(session: Session, visit_ids: list[int]) -> dict[int, str]:
    """Who made each visit's current version, in words: "changed by alice on 2026-03-02 10:14 UTC (import
    --replace)" from the revision kept when it was made, or "first stored on …" for version 1."""
    found: dict[int, str] = {}
    for part in _chunks(visit_ids):
        visits = session.execute(
            select(Visit.id, Visit.version, Visit.created_at).where(Visit.id.in_(part))
        ).all()
        revisions = {
            (r.visit_id, r.revision): r
            for r in session.execute(
                select(
                    VisitRevision.visit_id,
                    VisitRevision.revision,
                    VisitRevision.replaced_by,
                    VisitRevision.replaced_at,
                    VisitRevision.reason,
                ).where(VisitRevision.visit_id.in_(part))
            )
        }
        for visit_id, version, created_at in visits:
            revision = revisions.get((visit_id, version - 1))
            if version > 1 and revision is not None:
                how = f" ({revision.reason})" if revision.reason else ""
                found[visit_id] = f"changed by {revision.replaced_by} on {_moment(revision.replaced_at)}{how}"
            else:
                found[visit_id] = f"first stored on {_moment(created_at)}"
    return found


# -- what a re-import would change ---------------------------------------------------------------------------

_WORDS = {
    "label": "site name",
    "distance_mm": "distance",
    "latency_ms": "latency",
    "peak_latency_ms": "peak latency",
    "amplitude_mv": "amplitude",
    "amplitude_uv": "amplitude",
    "duration_ms": "duration",
    "area_mvms": "area",
    "temperature_c": "temperature",
    "lff_hz": "low-frequency filter",
    "f_latency_ms": "F-wave latency",
    "f_persistence_pct": "F-wave persistence",
    "recording_site": "recording site",
    "wrist_entrapment": "wrist entrapment",
    "height_cm": "height",
    "diagnosis": "diagnosis",
    "phenotype": "phenotype",
}
_UNITS = {
    "distance_mm": "mm",
    "latency_ms": "ms",
    "peak_latency_ms": "ms",
    "amplitude_mv": "mV",
    "amplitude_uv": "µV",
    "duration_ms": "ms",
    "area_mvms": "mV·ms",
    "temperature_c": "°C",
    "lff_hz": "Hz",
    "f_latency_ms": "ms",
    "f_persistence_pct": "%",
    "height_cm": "cm",
}
_TEST_VALUES = [c for c in NERVE_LEVEL if c != "f_absent"]  # f_absent is shown inside f_latency_ms ("absent")
_SITE_COMPARED = [c for c in SITE_VALUES if c != "site_order"]
_PREFIX = "differs from the stored visit: "


def _value(value: Any) -> Any:
    value = _clean(value)
    return None if value is pd.NA else value


def _same(a: Any, b: Any) -> bool:
    a, b = _value(a), _value(b)
    if a is None or b is None:
        return a is None and b is None
    if isinstance(a, (int, float)) and isinstance(b, (int, float)):
        return float(a) == float(b)
    return a == b


def shown_value(value: Any, column: str = "") -> str:
    """A stored or given value as a person reads it: 7.15 (shortest exact text), 'empty', yes/no, words."""
    value = _value(value)
    if value is None:
        return "empty"
    if isinstance(value, dt.date):
        return value.isoformat()
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, float):
        text = repr(value)  # the shortest text that is exactly this number: 7.15, not 7.1499999
        return text[:-2] if text.endswith(".0") else text
    return str(value).replace("_", " ")


def _change(what: str, old: Any, new: Any, column: str) -> str:
    """``'fibular right site 1 amplitude 0.7 → 0.8 mV'``"""
    unit = f" {_UNITS[column]}" if column in _UNITS else ""
    return f"{_PREFIX}{what} {shown_value(old, column)} → {shown_value(new, column)}{unit}"


def _f_wave(values: dict[str, Any]) -> Any:
    return "absent" if _value(values.get("f_absent")) else values.get("f_latency_ms")


def _test_name(nerve: str, side: str, modality: str) -> str:
    info = catalogue.nerves().get(nerve)
    both = info is None or len(info.modalities) > 1
    return f"{nerve.replace('_', ' ')} {side}" + (f" {modality}" if both else "")


def _stored_content(session: Session, visit_ids: list[int]):
    """Visit-level values, nerve tests and sites of stored visits, keyed by visit id and nerve test."""
    visits: dict[int, dict[str, Any]] = {}
    tests: dict[int, dict[tuple, dict[str, Any]]] = {v: {} for v in visit_ids}
    sites: dict[int, dict[tuple, dict[int, dict[str, Any]]]] = {v: {} for v in visit_ids}
    test_key = [NerveTest.visit_id, NerveTest.nerve, NerveTest.side, NerveTest.modality]
    for part in _chunks(visit_ids):
        for row in session.execute(
            select(Visit.id, *[getattr(Visit, c) for c in VISIT_LEVEL]).where(Visit.id.in_(part))
        ):
            visits[row[0]] = dict(zip(VISIT_LEVEL, row[1:]))
        for row in session.execute(
            select(*test_key, *[getattr(NerveTest, c) for c in NERVE_LEVEL]).where(
                NerveTest.visit_id.in_(part)
            )
        ):
            tests[row[0]][tuple(row[1:4])] = dict(zip(NERVE_LEVEL, row[4:]))
        site_rows = session.execute(
            select(*test_key, *[getattr(StimulationSite, c) for c in SITE_VALUES])
            .join(StimulationSite, StimulationSite.nerve_test_id == NerveTest.id)
            .where(NerveTest.visit_id.in_(part))
        )
        for row in site_rows:
            values = dict(zip(SITE_VALUES, row[4:]))
            sites[row[0]].setdefault(tuple(row[1:4]), {})[int(values["site_order"])] = values
    return visits, tests, sites


def _first_row(rows: pd.DataFrame, column: str) -> int:
    """The first file row of ``rows`` that states ``column`` (else the first row)."""
    stated = rows[rows[column].notna()] if column in rows else rows
    if column == "f_latency_ms":
        stated = rows[rows["f_latency_ms"].notna() | rows["f_absent"].fillna(False).astype(bool)]
    return int((stated if len(stated) else rows)[ROW].min())


def describe_changes(session: Session, changed: pd.DataFrame, batch: MeasurementBatch) -> list[Problem]:
    """Every value a file would change in stored visits, each at the file row and column that holds it.

    ``changed``: one row per stored visit the file changes (``visit_id``, ``patient``, ``visit_date``). A line
    per visit says that it is stored and how to replace it; then a line per value: "fibular right site 1
    amplitude 0.7 → 0.8 mV", a nerve test or site present on one side only, a changed visit-level value.
    """
    if changed.empty:
        return []
    if batch.rows is None:  # a batch assembled without its rows: say that the visit differs, not where
        return [
            Problem(
                int(getattr(v, ROW)),
                "visit_date",
                v.visit_date.isoformat(),
                f"the visit of {v.patient} on this date is already stored with different values; import with "
                "--replace to replace it (the earlier values are kept in its history)",
            )
            for v in changed.itertuples()
        ]
    keys = changed[[*VISIT_KEY, "visit_id"]]
    stored_visits, stored_tests, stored_sites = _stored_content(session, [int(v) for v in keys["visit_id"]])
    rows = batch.rows.merge(keys, on=VISIT_KEY, how="inner")
    rows_by_visit = dict(tuple(rows.groupby("visit_id", sort=False)))
    new_tests = batch.nerve_tests.merge(keys, on=VISIT_KEY, how="inner")
    tests_by_visit = dict(tuple(new_tests.groupby("visit_id", sort=False)))
    new_visits = batch.visits.merge(keys, on=VISIT_KEY, how="inner").set_index("visit_id")
    problems: list[Problem] = []
    for visit in keys.itertuples(index=False):
        visit_id = int(visit.visit_id)
        visit_rows = rows_by_visit[visit_id]
        first = int(visit_rows[ROW].min())
        found: list[Problem] = []

        for column in VISIT_LEVEL:
            old, new = stored_visits[visit_id][column], new_visits.loc[visit_id, column]
            if not _same(old, new):
                found.append(
                    Problem(
                        _first_row(visit_rows, column),
                        column,
                        None,
                        _change(_WORDS[column], old, new, column),
                    )
                )

        file_tests = {
            (t["nerve"], t["side"], t["modality"]): t for t in tests_by_visit[visit_id].to_dict("records")
        }
        for key in sorted(set(stored_tests[visit_id]) | set(file_tests)):
            name = _test_name(*key)
            test_rows = visit_rows[
                (visit_rows["nerve"] == key[0])
                & (visit_rows["side"] == key[1])
                & (visit_rows["modality"] == key[2])
            ]
            if key not in file_tests:
                found.append(
                    Problem(
                        first, "nerve", None, f"{_PREFIX}the {name} nerve test is stored but not in the file"
                    )
                )
                continue
            if key not in stored_tests[visit_id]:
                found.append(
                    Problem(
                        int(test_rows[ROW].min()),
                        "nerve",
                        None,
                        f"{_PREFIX}the {name} nerve test is not in the stored visit",
                    )
                )
                continue
            old_test, new_test = stored_tests[visit_id][key], file_tests[key]
            for column in _TEST_VALUES:
                old, new = old_test[column], new_test[column]
                if column == "f_latency_ms":
                    old, new = _f_wave(old_test), _f_wave(new_test)
                if not _same(old, new):
                    found.append(
                        Problem(
                            _first_row(test_rows, column),
                            column,
                            None,
                            _change(f"{name} {_WORDS[column]}", old, new, column),
                        )
                    )
            old_sites = stored_sites[visit_id].get(key, {})
            new_sites = {int(r["site_order"]): r for r in test_rows.to_dict("records")}
            for order in sorted(set(old_sites) | set(new_sites)):
                if order not in new_sites:
                    found.append(
                        Problem(
                            int(test_rows[ROW].min()),
                            "site_order",
                            None,
                            f"{_PREFIX}{name} site {order} is stored but not in the file",
                        )
                    )
                    continue
                row = int(new_sites[order][ROW])
                if order not in old_sites:
                    found.append(
                        Problem(
                            row,
                            "site_order",
                            None,
                            f"{_PREFIX}{name} site {order} is not in the stored visit",
                        )
                    )
                    continue
                for column in _SITE_COMPARED:
                    old, new = old_sites[order][column], new_sites[order][column]
                    if not _same(old, new):
                        shown_column = "site" if column == "label" else column
                        found.append(
                            Problem(
                                row,
                                shown_column,
                                None,
                                _change(f"{name} site {order} {_WORDS[column]}", old, new, column),
                            )
                        )
        problems.append(
            Problem(
                first,
                "visit_date",
                visit.visit_date.isoformat(),
                f"the visit of {visit.patient} on this date is already stored with different values"
                + (f" ({len(found)} listed)" if found else "")
                + "; import with --replace to replace it (the earlier values are kept in its history)",
            )
        )
        problems += found
    return problems
