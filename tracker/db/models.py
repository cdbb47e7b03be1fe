"""The relational schema (SQLAlchemy 2 typed models).

Units are in column names and comments: ms, mV (motor amplitude), µV (sensory amplitude), mV·ms, mm, m/s,
°C, Hz, cm. Physical ranges are CHECK constraints in the database; stricter plausibility checks (which a
user may override) live in :mod:`tracker.services.measurement_rules`.

Foreign-key columns are not indexed on their own where a UNIQUE constraint already starts with them
(the constraint's index serves the lookups; a second index would only slow bulk imports).

Cascades: deleting a patient deletes their identity, visits, treatments and scores; deleting a visit deletes
its nerve tests, their sites, its revisions and evaluations. Audit events have no foreign keys: the trail
outlives the rows it describes.
"""

from __future__ import annotations

import datetime as dt
from typing import Annotated, Any

from sqlalchemy import (
    JSON,
    Boolean,
    CheckConstraint,
    Date,
    DateTime,
    Float,
    ForeignKey,
    Index,
    Integer,
    MetaData,
    String,
    Text,
    UniqueConstraint,
)
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column, relationship

from tracker.db.types import CompressedJSON
from tracker.domain.vocabulary import (
    LIMIT_BOUNDS,
    LIMIT_PARAMETERS,
    MODALITIES,
    SEXES,
    SIDES,
    USER_ROLES,
    VISIT_STATUSES,
)

NAMING_CONVENTION = {
    "ix": "ix_%(column_0_label)s",
    "uq": "uq_%(table_name)s_%(column_0_N_name)s",
    "ck": "ck_%(table_name)s_%(constraint_name)s",
    "fk": "fk_%(table_name)s_%(column_0_name)s_%(referred_table_name)s",
    "pk": "pk_%(table_name)s",
}


def utc_now() -> dt.datetime:
    return dt.datetime.now(dt.UTC)


def _in(column: str, values: tuple[str, ...]) -> str:
    quoted = ", ".join(f"'{v}'" for v in values)
    return f"{column} IN ({quoted})"


class Base(DeclarativeBase):
    metadata = MetaData(naming_convention=NAMING_CONVENTION)
    type_annotation_map = {dict[str, Any]: JSON, list[Any]: JSON}


IntPk = Annotated[int, mapped_column(Integer, primary_key=True)]
CreatedAt = Annotated[dt.datetime, mapped_column(DateTime(timezone=True), default=utc_now)]


class User(Base):
    """An account: the name is the operating-system login (SQLite) or the database login (PostgreSQL) of
    command-line use, and the sign-in name of the dashboard. The audit trail names users by ``username``."""

    __tablename__ = "users"
    __table_args__ = (
        CheckConstraint(_in("role", USER_ROLES), name="role"),
        CheckConstraint("failed_sign_ins >= 0", name="failed_sign_ins_not_negative"),
    )

    id: Mapped[IntPk]
    username: Mapped[str] = mapped_column(String(64), unique=True)
    display_name: Mapped[str | None] = mapped_column(String(200))
    role: Mapped[str] = mapped_column(String(16), server_default="viewer")
    active: Mapped[bool] = mapped_column(Boolean, server_default="1")
    created_at: Mapped[CreatedAt]
    password_hash: Mapped[str | None] = mapped_column(
        String(255), comment="argon2id, PHC string; never logged"
    )
    password_changed_at: Mapped[dt.datetime | None] = mapped_column(DateTime(timezone=True))
    failed_sign_ins: Mapped[int] = mapped_column(Integer, server_default="0", comment="consecutive failures")
    locked_until: Mapped[dt.datetime | None] = mapped_column(DateTime(timezone=True))


class Patient(Base):
    """A followed person, known by a pseudonymous code chosen by the clinic.

    Identifying fields are kept apart in :class:`PatientIdentity`.
    """

    __tablename__ = "patients"
    __table_args__ = (
        CheckConstraint(_in("sex", SEXES), name="sex"),
        CheckConstraint("birth_year BETWEEN 1900 AND 2100", name="birth_year_range"),
        CheckConstraint("length(code) BETWEEN 1 AND 40", name="code_length"),
    )

    id: Mapped[IntPk]
    code: Mapped[str] = mapped_column(String(40), unique=True, comment="pseudonymous patient code")
    sex: Mapped[str | None] = mapped_column(String(16), comment="female / male / unspecified")
    birth_year: Mapped[int | None] = mapped_column(Integer, comment="year of birth (no full date here)")
    diagnosis: Mapped[str | None] = mapped_column(
        String(16), comment="current diagnosis: cidp, mmn, gbs, other"
    )
    phenotype: Mapped[str | None] = mapped_column(String(16), comment="current CIDP phenotype")
    onset_date: Mapped[dt.date | None] = mapped_column(Date, comment="symptom onset date")
    created_at: Mapped[CreatedAt]

    identity: Mapped[PatientIdentity | None] = relationship(
        back_populates="patient", cascade="all, delete-orphan", passive_deletes=True
    )
    visits: Mapped[list[Visit]] = relationship(
        back_populates="patient",
        cascade="all, delete-orphan",
        passive_deletes=True,
        order_by="Visit.visit_date",
    )


class PatientIdentity(Base):
    """Identifying fields, stored apart from the clinical record and never exported by default."""

    __tablename__ = "patient_identities"

    patient_id: Mapped[int] = mapped_column(ForeignKey("patients.id", ondelete="CASCADE"), primary_key=True)
    record_number: Mapped[str | None] = mapped_column(String(64), comment="hospital record number")
    full_name: Mapped[str | None] = mapped_column(String(200))
    birth_date: Mapped[dt.date | None] = mapped_column(Date)

    patient: Mapped[Patient] = relationship(back_populates="identity")


class Visit(Base):
    """One study day of one patient. ``version`` guards concurrent edits (optimistic locking)."""

    __tablename__ = "visits"
    __table_args__ = (
        UniqueConstraint("patient_id", "visit_date"),
        CheckConstraint(_in("status", VISIT_STATUSES), name="status"),
        CheckConstraint("height_cm > 40 AND height_cm < 260", name="height_range"),
        CheckConstraint("version >= 1", name="version_positive"),
        CheckConstraint("length(content_sha256) IN (0, 64)", name="content_sha256_length"),
    )

    id: Mapped[IntPk]
    patient_id: Mapped[int] = mapped_column(ForeignKey("patients.id", ondelete="CASCADE"))
    visit_date: Mapped[dt.date] = mapped_column(Date, comment="date of the study (ISO)")
    height_cm: Mapped[float | None] = mapped_column(Float, comment="height in cm at the visit")
    examiner: Mapped[str | None] = mapped_column(String(100))
    laboratory: Mapped[str | None] = mapped_column(String(100))
    diagnosis: Mapped[str | None] = mapped_column(String(16), comment="working diagnosis at this visit")
    phenotype: Mapped[str | None] = mapped_column(String(16), comment="CIDP phenotype at this visit")
    status: Mapped[str] = mapped_column(String(8), server_default="draft", comment="draft / final")
    version: Mapped[int] = mapped_column(Integer, server_default="1")
    content_sha256: Mapped[str] = mapped_column(
        String(64), server_default="", comment="fingerprint of the measured content, for idempotent import"
    )
    created_at: Mapped[CreatedAt]
    updated_at: Mapped[dt.datetime | None] = mapped_column(DateTime(timezone=True), onupdate=utc_now)

    __mapper_args__ = {"version_id_col": version}

    patient: Mapped[Patient] = relationship(back_populates="visits")
    nerve_tests: Mapped[list[NerveTest]] = relationship(
        back_populates="visit", cascade="all, delete-orphan", passive_deletes=True
    )
    revisions: Mapped[list[VisitRevision]] = relationship(
        back_populates="visit", cascade="all, delete-orphan", passive_deletes=True
    )


class VisitRevision(Base):
    """Earlier content of a visit, kept when it was amended or replaced (history, not overwrite)."""

    __tablename__ = "visit_revisions"
    __table_args__ = (UniqueConstraint("visit_id", "revision"),)

    id: Mapped[IntPk]
    visit_id: Mapped[int] = mapped_column(ForeignKey("visits.id", ondelete="CASCADE"))
    revision: Mapped[int] = mapped_column(Integer, comment="the visit version these values belonged to")
    status: Mapped[str] = mapped_column(String(8), comment="draft / final at the time")
    content_sha256: Mapped[str] = mapped_column(String(64))
    snapshot: Mapped[dict[str, Any]] = mapped_column(
        comment="the visit, its nerve tests and sites as they were"
    )
    replaced_at: Mapped[CreatedAt]
    replaced_by: Mapped[str] = mapped_column(String(64))
    reason: Mapped[str | None] = mapped_column(String(200))

    visit: Mapped[Visit] = relationship(back_populates="revisions")


class NerveTest(Base):
    """One nerve, side and modality studied at a visit, with its nerve-level values."""

    __tablename__ = "nerve_tests"
    __table_args__ = (
        UniqueConstraint("visit_id", "nerve", "side", "modality"),
        CheckConstraint(_in("side", SIDES), name="side"),
        CheckConstraint(_in("modality", MODALITIES), name="modality"),
        CheckConstraint("temperature_c BETWEEN 10 AND 45", name="temperature_range"),
        CheckConstraint("lff_hz > 0 AND lff_hz <= 1000", name="lff_range"),
        CheckConstraint("f_latency_ms > 0 AND f_latency_ms < 200", name="f_latency_range"),
        CheckConstraint("f_persistence_pct BETWEEN 0 AND 100", name="f_persistence_range"),
        CheckConstraint("NOT (f_absent AND f_latency_ms IS NOT NULL)", name="f_absent_has_no_latency"),
        CheckConstraint(
            "modality = 'motor' OR (f_latency_ms IS NULL AND NOT f_absent)", name="f_wave_motor_only"
        ),
    )

    id: Mapped[IntPk]
    visit_id: Mapped[int] = mapped_column(ForeignKey("visits.id", ondelete="CASCADE"))
    nerve: Mapped[str] = mapped_column(String(40), comment="canonical nerve name (see reference/nerves.csv)")
    side: Mapped[str] = mapped_column(String(5), comment="left / right")
    modality: Mapped[str] = mapped_column(String(7), comment="motor / sensory")
    recording_site: Mapped[str | None] = mapped_column(String(60), comment="muscle or skin site recorded")
    temperature_c: Mapped[float | None] = mapped_column(Float, comment="limb surface temperature, °C")
    lff_hz: Mapped[float | None] = mapped_column(Float, comment="low-frequency (high-pass) filter, Hz")
    f_latency_ms: Mapped[float | None] = mapped_column(Float, comment="minimal F-wave latency, ms")
    f_absent: Mapped[bool] = mapped_column(Boolean, server_default="0", comment="F-waves sought, none found")
    f_persistence_pct: Mapped[float | None] = mapped_column(Float, comment="F-wave persistence, %")
    wrist_entrapment: Mapped[bool | None] = mapped_column(
        Boolean,
        comment="median only: clinician judges the distal latency explained by neuropathy at the wrist",
    )

    visit: Mapped[Visit] = relationship(back_populates="nerve_tests")
    sites: Mapped[list[StimulationSite]] = relationship(
        back_populates="nerve_test",
        cascade="all, delete-orphan",
        passive_deletes=True,
        order_by="StimulationSite.site_order",
    )


class StimulationSite(Base):
    """One stimulation site of a nerve test; segments are derived between consecutive sites.

    ``amplitude_mv`` holds motor (CMAP) amplitudes, ``amplitude_uv`` sensory (SNAP) amplitudes.
    Amplitude 0 with no latency is a recorded "no response", not missing data.
    """

    __tablename__ = "stimulation_sites"
    __table_args__ = (
        UniqueConstraint("nerve_test_id", "site_order"),
        CheckConstraint("site_order >= 1 AND site_order <= 20", name="site_order_range"),
        CheckConstraint("distance_mm > 0 AND distance_mm <= 2000", name="distance_range"),
        CheckConstraint("latency_ms > 0 AND latency_ms < 200", name="latency_range"),
        CheckConstraint("peak_latency_ms > 0 AND peak_latency_ms < 200", name="peak_latency_range"),
        CheckConstraint("amplitude_mv >= 0 AND amplitude_mv <= 100", name="amplitude_mv_range"),
        CheckConstraint("amplitude_uv >= 0 AND amplitude_uv <= 1000", name="amplitude_uv_range"),
        CheckConstraint("duration_ms > 0 AND duration_ms < 200", name="duration_range"),
        CheckConstraint("area_mvms >= 0 AND area_mvms <= 1000", name="area_range"),
        CheckConstraint("amplitude_mv IS NULL OR amplitude_uv IS NULL", name="one_amplitude_unit"),
        CheckConstraint(
            "latency_ms IS NOT NULL OR COALESCE(amplitude_mv, amplitude_uv, -1) = 0",
            name="latency_or_no_response",
        ),
    )

    id: Mapped[IntPk]
    nerve_test_id: Mapped[int] = mapped_column(ForeignKey("nerve_tests.id", ondelete="CASCADE"))
    site_order: Mapped[int] = mapped_column(Integer, comment="1 = most distal, then proximally")
    label: Mapped[str | None] = mapped_column(String(40), comment="site label (see reference/sites.csv)")
    distance_mm: Mapped[float] = mapped_column(
        Float, comment="site 1: stimulation to active recording electrode; site n>1: from site n-1; mm"
    )
    latency_ms: Mapped[float | None] = mapped_column(Float, comment="onset latency, ms")
    peak_latency_ms: Mapped[float | None] = mapped_column(Float, comment="peak latency, ms")
    amplitude_mv: Mapped[float | None] = mapped_column(Float, comment="motor negative-peak amplitude, mV")
    amplitude_uv: Mapped[float | None] = mapped_column(Float, comment="sensory negative-peak amplitude, µV")
    duration_ms: Mapped[float | None] = mapped_column(Float, comment="negative-peak duration, ms")
    area_mvms: Mapped[float | None] = mapped_column(Float, comment="negative-peak area, mV·ms")

    nerve_test: Mapped[NerveTest] = relationship(back_populates="sites")


class Treatment(Base):
    """A treatment period (therapy, dose, interval) on the patient's time axis."""

    __tablename__ = "treatments"
    __table_args__ = (
        UniqueConstraint("patient_id", "therapy", "start_date"),
        CheckConstraint("end_date IS NULL OR end_date >= start_date", name="end_after_start"),
        CheckConstraint("dose > 0", name="dose_positive"),
        CheckConstraint("interval_days > 0 AND interval_days <= 3660", name="interval_range"),
        CheckConstraint("length(therapy) > 0", name="therapy_not_empty"),
    )

    id: Mapped[IntPk]
    patient_id: Mapped[int] = mapped_column(ForeignKey("patients.id", ondelete="CASCADE"))
    therapy: Mapped[str] = mapped_column(String(40), comment="ivig, scig, corticosteroid, plasma_exchange…")
    start_date: Mapped[dt.date] = mapped_column(Date)
    end_date: Mapped[dt.date | None] = mapped_column(Date, comment="empty while ongoing")
    dose: Mapped[float | None] = mapped_column(Float, comment="dose per administration, in dose_unit")
    dose_unit: Mapped[str | None] = mapped_column(String(20), comment="e.g. g/kg, mg")
    interval_days: Mapped[int | None] = mapped_column(Integer, comment="days between administrations")
    note: Mapped[str | None] = mapped_column(Text, comment="free text; never exported by default")


class OutcomeScore(Base):
    """A clinical outcome score on a date (INCAT, I-RODS, MRC sum, grip…); ranges per scale are in
    ``reference/scales.csv`` and checked on input."""

    __tablename__ = "outcome_scores"
    __table_args__ = (
        UniqueConstraint("patient_id", "score_date", "scale"),
        CheckConstraint("value >= 0 AND value <= 1000", name="value_range"),
    )

    id: Mapped[IntPk]
    patient_id: Mapped[int] = mapped_column(ForeignKey("patients.id", ondelete="CASCADE"))
    score_date: Mapped[dt.date] = mapped_column(Date)
    scale: Mapped[str] = mapped_column(String(40))
    value: Mapped[float] = mapped_column(Float, comment="in the scale's own unit")


class LimitSet(Base):
    """A named set of normal limits (a laboratory's own, or the shipped default), versioned."""

    __tablename__ = "limit_sets"
    __table_args__ = (UniqueConstraint("name", "version"),)

    id: Mapped[IntPk]
    name: Mapped[str] = mapped_column(String(80))
    version: Mapped[int] = mapped_column(Integer, server_default="1")
    description: Mapped[str | None] = mapped_column(Text)
    is_default: Mapped[bool] = mapped_column(Boolean, server_default="0")
    created_at: Mapped[CreatedAt]

    rows: Mapped[list[LimitRow]] = relationship(
        back_populates="limit_set", cascade="all, delete-orphan", passive_deletes=True
    )


class LimitRow(Base):
    """One normal limit (ULN or LLN) of one parameter, optionally for an age/height/sex stratum."""

    __tablename__ = "limit_rows"
    __table_args__ = (
        CheckConstraint(_in("modality", MODALITIES), name="modality"),
        CheckConstraint(_in("parameter", LIMIT_PARAMETERS), name="parameter"),
        CheckConstraint(_in("bound", LIMIT_BOUNDS), name="bound"),
        CheckConstraint("value > 0", name="value_positive"),
        CheckConstraint("sex IS NULL OR " + _in("sex", SEXES), name="sex"),
    )

    id: Mapped[IntPk]
    limit_set_id: Mapped[int] = mapped_column(ForeignKey("limit_sets.id", ondelete="CASCADE"), index=True)
    nerve: Mapped[str] = mapped_column(String(40))
    modality: Mapped[str] = mapped_column(String(7))
    parameter: Mapped[str] = mapped_column(String(24), comment="distal_latency_ms, cv_ms (m/s), amplitude…")
    bound: Mapped[str] = mapped_column(String(3), comment="uln / lln")
    value: Mapped[float] = mapped_column(Float, comment="the limit, in the parameter's unit")
    age_min: Mapped[float | None] = mapped_column(Float, comment="years, inclusive")
    age_max: Mapped[float | None] = mapped_column(Float, comment="years, exclusive")
    height_min_cm: Mapped[float | None] = mapped_column(Float)
    height_max_cm: Mapped[float | None] = mapped_column(Float)
    sex: Mapped[str | None] = mapped_column(String(16))
    source: Mapped[str | None] = mapped_column(Text, comment="citation, and whether verified")

    limit_set: Mapped[LimitSet] = relationship(back_populates="rows")


# Revision 0007 creates it under this name; the patient list names it in its SQLite hint (INDEXED BY).
EVALUATION_OUTCOME_INDEX = "ix_evaluations_visit_id_criteria_id_limit_set_id_outcome"


class Evaluation(Base):
    """A saved criteria evaluation of one visit, with the versions that produced it."""

    __tablename__ = "evaluations"
    __table_args__ = (
        UniqueConstraint("visit_id", "criteria_id", "limit_set_id"),
        # The unique key plus ``outcome``: the patient list reads each latest visit's outcome from this index
        # alone (a row is about 1 kB with its compressed trace; reading ``outcome`` from it was the cost).
        Index(EVALUATION_OUTCOME_INDEX, "visit_id", "criteria_id", "limit_set_id", "outcome"),
    )

    id: Mapped[IntPk]
    visit_id: Mapped[int] = mapped_column(ForeignKey("visits.id", ondelete="CASCADE"))
    criteria_id: Mapped[str] = mapped_column(String(40))
    criteria_version: Mapped[str] = mapped_column(String(20))
    limit_set_id: Mapped[int | None] = mapped_column(
        ForeignKey("limit_sets.id", ondelete="SET NULL"), index=True
    )
    limit_set_version: Mapped[int | None] = mapped_column(Integer)
    input_sha256: Mapped[str] = mapped_column(String(64), comment="fingerprint of the inputs evaluated")
    outcome: Mapped[str] = mapped_column(String(32))
    result: Mapped[dict[str, Any]] = mapped_column(
        CompressedJSON, comment="the full trace, compressed JSON (tracker.db.types)"
    )
    computed_at: Mapped[CreatedAt]


class AuditEvent(Base):
    """One write: who, when, what, and the values before and after. Rows are append-only: triggers refuse
    UPDATE and DELETE once a row is sealed (its ``row_hash`` set), and the hash chain shows any change made
    around them."""

    __tablename__ = "audit_events"

    id: Mapped[IntPk]
    occurred_at: Mapped[dt.datetime] = mapped_column(DateTime(timezone=True), default=utc_now, index=True)
    username: Mapped[str] = mapped_column(String(64))
    action: Mapped[str] = mapped_column(String(40), comment="e.g. import, replace_visit, add_treatment")
    entity: Mapped[str] = mapped_column(String(40), comment="table or kind of thing written")
    entity_key: Mapped[str | None] = mapped_column(
        String(200), comment="pseudonymous key, never an identifier"
    )
    before: Mapped[dict[str, Any] | None] = mapped_column()
    after: Mapped[dict[str, Any] | None] = mapped_column()
    detail: Mapped[str | None] = mapped_column(Text)
    # The hash chain (tracker.services.access.audit): SHA-256 hex of the previous row and of this row.
    prev_hash: Mapped[str | None] = mapped_column(String(64))
    row_hash: Mapped[str | None] = mapped_column(String(64))


class AppSetting(Base):
    """One setting of this database (key → text): the default criteria set, the temperature policy, the
    secret that keys pseudonymous export ids. Kept in the database so that every user of it shares them."""

    __tablename__ = "app_settings"

    key: Mapped[str] = mapped_column(String(64), primary_key=True)
    value: Mapped[str] = mapped_column(Text)
    updated_at: Mapped[dt.datetime] = mapped_column(
        DateTime(timezone=True), default=utc_now, onupdate=utc_now
    )


RESPONSE_CLASSIFICATIONS = ("improved", "stable", "worsened", "not_assessable")


class ResponseAssessment(Base):
    """A saved treatment-response classification of one regimen, as judged on one day by
    one rule set: what was shown, with the rule set's version, the visits compared and the
    evidence (issue: treatment response)."""

    __tablename__ = "response_assessments"
    __table_args__ = (
        UniqueConstraint(
            "patient_id",
            "therapy",
            "regimen_start",
            "rule_set",
            "rule_set_version",
            "judged_on",
            name="uq_response_assessments_one_per_day",
        ),
        CheckConstraint(_in("classification", RESPONSE_CLASSIFICATIONS), name="classification_known"),
    )

    id: Mapped[IntPk]
    patient_id: Mapped[int] = mapped_column(ForeignKey("patients.id", ondelete="CASCADE"), index=True)
    therapy: Mapped[str] = mapped_column(String(40))
    regimen_start: Mapped[dt.date] = mapped_column(
        Date, comment="first day of the regimen (of its induction when there is one)"
    )
    regimen: Mapped[str] = mapped_column(String(200), comment="the regimen in words: therapy, dose, interval")
    rule_set: Mapped[str] = mapped_column(String(64))
    rule_set_version: Mapped[str] = mapped_column(String(20))
    judged_on: Mapped[dt.date] = mapped_column(
        Date, comment="the day the classification describes (scores after it unseen)"
    )
    classification: Mapped[str] = mapped_column(String(20))
    visits_compared: Mapped[list[Any]] = mapped_column(comment="ISO dates of the scores compared")
    evidence: Mapped[dict[str, Any]] = mapped_column(comment="evidence, missing data, notes and settings")
    computed_at: Mapped[CreatedAt]
