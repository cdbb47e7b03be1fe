"""Research export tables: the cohort at visit, nerve-test, segment or long level as pandas DataFrames,
de-identified by default, built chunk by chunk so that memory stays bounded on large cohorts.

Use :func:`prepare` (checks the options and the acting user's permission, picks the visits, fixes the
columns) and then :meth:`ExportPlan.frames` (one DataFrame per chunk of visits, in a deterministic order).
Values are in the units the column names say: ms, mV (motor), µV (sensory), mV·ms, mm, m/s, %, °C, Hz, cm.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field, fields
from functools import cache

import numpy as np
import pandas as pd
from sqlalchemy import func, select
from sqlalchemy.orm import Session

from tracker.criteria import engine, features, memo
from tracker.criteria import limits as limit_rules
from tracker.criteria.model import SetResult, Settings
from tracker.db.models import NerveTest, OutcomeScore, Patient, PatientIdentity, Treatment, Visit
from tracker.domain.plausibility import scales
from tracker.domain.vocabulary import DIAGNOSES
from tracker.errors import NotFound, TrackerError
from tracker.response.settings import ResponseSettings
from tracker.services import preferences
from tracker.services.access.permissions import Actor
from tracker.services.evaluation import load_frames
from tracker.services.export import deidentify
from tracker.services.export.columns import (
    NERVE_QUANTITIES,
    OUTCOME_VALUES,
    PATH_QUANTITIES,
    SCORE_WINDOW_DAYS,
    SITE_QUANTITIES,
    UNDECIDED,
    Column,
    SetColumns,
    VerdictItem,
    conform,
    criteria_alias,
    key_columns,
    long_columns,
    nerve_columns,
    response_columns,
    segment_columns,
    visit_columns,
)
from tracker.services.export.response import ResponseSpec, response_spec, with_response
from tracker.services.limit_sets import LimitSetInfo, resolve

LEVELS = ("visit", "nerve", "segment", "long")
DATE_MODES = ("shifted", "relative")
# Visits per chunk: each chunk is loaded, evaluated and written before the next is read, so peak memory
# depends on this number, not on the cohort. Every chunk pays a fixed cost (many small pandas steps per
# criteria set), so very small chunks are slow. Measured on invented cohorts (tracker.synthetic), nerve
# level CSV, every criteria set, fresh process on a shared 2-core machine: 3,000 patients (16,632 visits)
# peak RSS 392–399 MB with 2,000, 302–304 MB with 1,000, 253 MB with 500; CPU seconds of three alternating
# pairs 29.9, 34.2, 35.3 (2,000) against 27.8, 43.3, 37.5 (1,000), and 44 s with 500 — 1,000 trades about a
# tenth of the time for a quarter less memory.
CHUNK_VISITS = 1000
NERVE_KEY = ["visit_key", "nerve", "side", "modality"]


@dataclass(frozen=True)
class ExportOptions:
    """What to export. Empty tuples mean "no filter" (``criteria``: every available set); ``settings``
    None means the database's criteria settings."""

    level: str = "visit"
    criteria: tuple[str, ...] = ()
    diagnoses: tuple[str, ...] = ()
    date_from: dt.date | None = None
    date_to: dt.date | None = None
    outcomes: tuple[tuple[str, str], ...] = ()
    patients: tuple[str, ...] = ()
    dates: str = "shifted"
    identified: bool = False
    limits_name: str | None = None
    chunk_visits: int = CHUNK_VISITS
    # None: the database's criteria settings (temperature policy and stored switches) as ``check`` uses
    # them, with ``setting_overrides`` ((Settings field, value) pairs, e.g. from command-line options) first.
    settings: Settings | None = None
    setting_overrides: tuple[tuple[str, object], ...] = ()
    response_settings: ResponseSettings = field(default_factory=ResponseSettings)


def validate(options: ExportOptions) -> None:
    """Refuse options that cannot be honoured, with a message that says what is allowed."""
    if options.level not in LEVELS:
        raise TrackerError(f"Unknown export level {options.level!r}; choose one of {', '.join(LEVELS)}.")
    if options.dates not in DATE_MODES:
        raise TrackerError(f"Unknown date mode {options.dates!r}; choose shifted or relative.")
    known = engine.available()
    for criteria_id in list(options.criteria) + [c for c, _ in options.outcomes]:
        if criteria_id not in known:
            raise TrackerError(f"Unknown criteria set {criteria_id!r}; known: {', '.join(known)}")
    for criteria_id, value in options.outcomes:
        allowed = OUTCOME_VALUES.get(criteria_id)
        if allowed and value not in allowed:
            raise TrackerError(
                f"Unknown outcome {value!r} of {criteria_id}; its outcomes are {', '.join(allowed)}."
            )
    for diagnosis in options.diagnoses:
        if diagnosis not in DIAGNOSES:
            raise TrackerError(f"Unknown diagnosis {diagnosis!r}; choose from {', '.join(DIAGNOSES)}.")
    if options.date_from and options.date_to and options.date_from > options.date_to:
        raise TrackerError("The date range is empty: --from is after --to.")
    if options.chunk_visits < 1:
        raise TrackerError("The chunk size must be at least 1 visit.")
    known_settings = {f.name for f in fields(Settings)}
    for name, value in options.setting_overrides:
        if name not in known_settings:
            raise TrackerError(
                f"Unknown criteria setting {name!r}; known: {', '.join(sorted(known_settings))}."
            )
    try:
        Settings(**dict(options.setting_overrides))
    except ValueError as error:
        raise TrackerError(str(error)) from None


# -- which verdicts exist ------------------------------------------------------------------------------------


def _reference_frames() -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame]:
    """One invented visit with motor and sensory nerves of both limbs, in the shape of ``load_frames``.

    Evaluating it tells, without reading any patient, which per-nerve items each criteria set reports (the
    sets report every item for every nerve test of the right modality, as not evaluable when data are
    missing), so that the export's columns are fixed before the first chunk.
    """
    visits = pd.DataFrame(
        {
            "visit_key": [1],
            "patient": ["reference"],
            "visit_date": [dt.date(2020, 1, 1)],
            "height_cm": [170.0],
            "sex": ["female"],
            "birth_year": [1960],
            "phenotype": ["typical"],
            "diagnosis": ["cidp"],
            "content_sha256": [""],
            "age_years": [60.0],
        }
    )
    # nerve: site labels, distances (mm), latencies (ms), amplitudes (mV) — invented, plausible values
    motor = {
        "median": (("wrist", "elbow", "axilla"), (70, 230, 120), (4.0, 9.0, 11.5), (8.0, 7.0, 6.5)),
        "ulnar": (("wrist", "below_elbow", "above_elbow"), (70, 210, 100), (3.0, 7.5, 9.5), (9.0, 8.5, 8.0)),
        "fibular": (
            ("ankle", "below_fibular_head", "popliteal_fossa"),
            (90, 320, 100),
            (5.0, 12.0, 14.2),
            (5.0, 4.5, 4.3),
        ),
        "tibial": (("ankle", "popliteal_fossa"), (90, 400), (4.5, 13.5), (10.0, 8.0)),
    }
    sensory = {"median": 3.2, "ulnar": 2.8, "radial": 2.4, "sural": 3.5, "superficial_fibular": 3.4}
    tests, sites = [], []
    for key, (nerve, (labels, distances, latencies, amplitudes)) in enumerate(motor.items(), start=1):
        tests.append(
            (key, 1, nerve, "right", "motor", 33.0, 2.0, 30.0, False, False if nerve == "median" else None)
        )
        for order, (label, distance, latency, amplitude) in enumerate(
            zip(labels, distances, latencies, amplitudes), start=1
        ):
            sites.append(
                (
                    key,
                    order,
                    label,
                    float(distance),
                    latency,
                    np.nan,
                    5.5 + order / 10,
                    amplitude * 2.5,
                    amplitude,
                )
            )
    for key, (nerve, latency) in enumerate(sensory.items(), start=len(motor) + 1):
        tests.append(
            (
                key,
                1,
                nerve,
                "right",
                "sensory",
                33.0,
                20.0,
                np.nan,
                False,
                False if nerve == "median" else None,
            )
        )
        sites.append((key, 1, None, 140.0, latency, latency + 0.6, np.nan, np.nan, 20.0))
    tests_frame = pd.DataFrame(
        tests,
        columns=[
            "test_key",
            "visit_key",
            "nerve",
            "side",
            "modality",
            "temperature_c",
            "lff_hz",
            "f_latency_ms",
            "f_absent",
            "wrist_entrapment",
        ],
    )
    sites_frame = pd.DataFrame(
        sites,
        columns=[
            "test_key",
            "site_order",
            "label",
            "distance_mm",
            "latency_ms",
            "peak_latency_ms",
            "duration_ms",
            "area_mvms",
            "amplitude",
        ],
    )
    return visits, tests_frame, sites_frame


def catalogue(criteria_ids: list[str], settings: Settings) -> list[SetColumns]:
    """For each criteria set: version, outcome keys and the per-nerve items it reports, in the set's order.

    A property of the criteria code, not of the data: computed once per process with the shipped limits.
    """
    return list(_catalogue(tuple(criteria_ids), settings))


@cache
def _catalogue(criteria_ids: tuple[str, ...], settings: Settings) -> tuple[SetColumns, ...]:
    if not criteria_ids:  # (the engine reads an empty list as "every set")
        return ()
    visits, tests, sites = _reference_frames()
    results = engine.evaluate(
        visits, tests, sites, limit_rules.default_limits(), list(criteria_ids), settings
    )
    found = []
    for criteria_id in criteria_ids:
        result = results[criteria_id]
        alias = criteria_alias(criteria_id)
        findings = result.findings
        items = []
        for item, rows in findings.groupby("item", sort=False):
            segment = rows["segment"]
            has_segment = bool(segment.map(lambda s: isinstance(s, str) and s != "").any())
            items.append(
                VerdictItem(
                    criteria_id,
                    alias,
                    str(item),
                    str(rows["parameter"].iloc[0]),
                    str(rows["unit"].iloc[0] or ""),
                    has_segment,
                )
            )
        found.append(SetColumns(criteria_id, alias, result.version, tuple(result.extra_keys), tuple(items)))
    aliases = [s.alias for s in found]
    if len(set(aliases)) != len(
        aliases
    ):  # two sets of one author, year and disease: a naming bug to fix here
        raise TrackerError(f"Criteria column prefixes collide: {aliases}")
    return tuple(found)


# -- the plan ------------------------------------------------------------------------------------------------


@dataclass
class ExportCounts:
    """What the export selected and kept, filled as the chunks are built (for the closing summary)."""

    visits_kept: int = 0
    patients_kept: set[int] = field(default_factory=set)
    visits_without_rows: int = 0


@dataclass
class ExportPlan:
    """The visits to export (in export order), the columns, and what the values depend on."""

    options: ExportOptions
    secret: bytes
    limits_info: LimitSetInfo
    limits: pd.DataFrame
    sets: list[SetColumns]  # the sets whose outcomes and verdicts are columns
    evaluated_sets: list[SetColumns]  # those, and the sets only used by an --outcome filter
    columns: list[Column]
    order: pd.DataFrame  # visit_key, patient_id, export_id, shift_days — sorted by export id, date, key
    patients_filter: list[str]
    response: ResponseSpec | None = None  # the response columns' rule sets and settings (visit level only)
    settings: Settings = field(default_factory=Settings)  # the criteria settings applied
    counts: ExportCounts = field(default_factory=ExportCounts)

    @property
    def limits_label(self) -> str:
        return f"{self.limits_info.name} version {self.limits_info.version}"

    @property
    def evaluated(self) -> list[str]:
        return [s.criteria for s in self.evaluated_sets]

    @property
    def visit_count(self) -> int:
        return len(self.order)

    @property
    def patient_count(self) -> int:
        return int(self.order["patient_id"].nunique())

    def frames(
        self, session: Session, progress: Callable[[int, int], None] | None = None
    ) -> Iterator[pd.DataFrame]:
        """One DataFrame per chunk of visits, columns exactly :attr:`columns`, rows in export order."""
        self.counts = ExportCounts()
        total = len(self.order)
        size = self.options.chunk_visits
        for start in range(0, total, size):
            chunk = self.order.iloc[start : start + size]
            yield conform(_build_chunk(self, session, chunk), self.columns)
            if progress is not None:
                progress(min(start + size, total), total)


def prepare(
    session: Session, options: ExportOptions, *, username: str, actor: Actor | None = None
) -> ExportPlan:
    """Check the options and the permission, create the export secret if needed, pick the visits.

    Raises :class:`~tracker.services.access.permissions.NotPermitted` before anything is written when an
    identified export is asked for without an authenticated ``actor`` whose role allows it.
    """
    validate(options)
    if options.identified:
        deidentify.require_identified_permission(session, actor)
    settings = options.settings or preferences.criteria_settings(session, **dict(options.setting_overrides))
    info, limits = resolve(session, options.limits_name)
    # The long level holds no verdicts: criteria sets are evaluated there only for an --outcome filter.
    shown = [] if options.level == "long" else list(options.criteria) or engine.available()
    evaluated = shown + [c for c, _ in options.outcomes if c not in shown]
    sets = catalogue(evaluated, settings)
    limits_label = f"{info.name} version {info.version}"
    chosen_sets = [s for s in sets if s.criteria in shown]
    keys = key_columns(identified=options.identified, dates=options.dates)
    response = response_spec(options.response_settings) if options.level == "visit" else None
    per_level = {
        "visit": lambda: (
            visit_columns(chosen_sets, limits_label, identified=options.identified)
            + response_columns(
                response.rules_info, list(response.scales), identified=options.identified, dates=options.dates
            )
        ),
        "nerve": lambda: nerve_columns(chosen_sets, limits_label),
        "segment": lambda: segment_columns(chosen_sets, limits_label),
        "long": long_columns,
    }
    columns = keys + per_level[options.level]()
    order = _visit_order(session, options)
    secret = deidentify.export_secret(session, username=username)
    codes = sorted(set(order["code"].to_numpy(dtype=object)))  # one HMAC per patient, not per visit
    order["export_id"] = order["code"].map({c: deidentify.export_id(secret, c) for c in codes})
    order["shift_days"] = (
        order["code"].map({c: deidentify.date_shift_days(secret, c) for c in codes}).astype("int64")
    )
    order = order.sort_values(["export_id", "visit_date", "visit_key"], kind="stable").reset_index(drop=True)
    return ExportPlan(
        options,
        secret,
        info,
        limits,
        chosen_sets,
        sets,
        columns,
        order[["visit_key", "patient_id", "export_id", "shift_days"]],
        sorted(set(options.patients)),
        response,
        settings,
    )


def _visit_order(session: Session, options: ExportOptions) -> pd.DataFrame:
    """visit_key, patient_id, code, visit_date of every visit that passes the stored-value filters."""
    diagnosis = func.coalesce(Visit.diagnosis, Patient.diagnosis)
    query = select(Visit.id.label("visit_key"), Visit.patient_id, Patient.code, Visit.visit_date).join(
        Patient, Patient.id == Visit.patient_id
    )
    if options.diagnoses:
        query = query.where(diagnosis.in_(options.diagnoses))
    if options.date_from:
        query = query.where(Visit.visit_date >= options.date_from)
    if options.date_to:
        query = query.where(Visit.visit_date <= options.date_to)
    if options.patients:
        wanted = sorted(set(options.patients))
        known = set(session.scalars(select(Patient.code).where(Patient.code.in_(wanted))))
        unknown = [c for c in wanted if c not in known]
        if unknown:
            raise NotFound(
                f"No patient with code{'s' if len(unknown) > 1 else ''} "
                f"{', '.join(repr(c) for c in unknown)}; nothing was exported."
            )
        query = query.where(Patient.code.in_(wanted))
    rows = session.execute(query).all()
    frame = pd.DataFrame(rows, columns=["visit_key", "patient_id", "code", "visit_date"])
    return frame.astype({"visit_key": "int64", "patient_id": "int64"})


# -- one chunk -----------------------------------------------------------------------------------------------


def _build_chunk(plan: ExportPlan, session: Session, chunk: pd.DataFrame) -> pd.DataFrame:
    options = plan.options
    visit_ids = [int(v) for v in chunk["visit_key"]]
    visits, tests, sites = load_frames(session, visit_ids)
    # Visits without nerve tests get no outcome (the engine needs at least one nerve test to judge).
    tested = visits[visits["visit_key"].isin(tests["visit_key"])]
    nerves = paths = None
    if options.level != "visit":  # built once, for the tables and for the engine
        nerves, paths = features.build(tested, tests, sites, plan.limits)
    evaluate = plan.evaluated and not tests.empty
    results = {}
    if evaluate:
        built = (nerves, paths) if nerves is not None else features.build(tested, tests, sites, plan.limits)
        results = _evaluate(plan, tested, tests, sites, built)
        del built
    keep = _outcome_filter(options, results, visits["visit_key"])
    context = _visit_context(plan, session, chunk, visits)
    context = context[context["visit_key"].isin(keep)]
    plan.counts.visits_kept += len(context)
    plan.counts.patients_kept.update(int(p) for p in context["patient_id"])
    if options.level == "visit":
        frame = _visit_level(plan, session, context, visits, tests, sites, results)
    else:
        nerves = nerves[nerves["visit_key"].isin(keep)]
        paths = paths[paths["visit_key"].isin(keep)]
        sites = sites[sites["test_key"].isin(nerves["test_key"])]
        if options.level == "nerve":
            frame = _nerve_level(plan, session, context, nerves, sites, results)
        elif options.level == "segment":
            frame = _segment_level(plan, context, paths, sites, results)
        else:
            frame = _long_level(plan, session, context, nerves, paths, sites)
    # A visit without a nerve test (segment level: without a motor segment) gives no row.
    plan.counts.visits_without_rows += len(set(context["visit_key"]) - set(frame["visit_key"]))
    return frame


# The findings columns the tables read (:func:`_statuses`); a set's other columns are dropped per chunk.
STATUS_SOURCE = ["visit_key", "nerve", "side", "modality", "segment", "item", "status", "value"]


def _evaluate(
    plan: ExportPlan,
    visits: pd.DataFrame,
    tests: pd.DataFrame,
    sites: pd.DataFrame,
    built: tuple[pd.DataFrame, pd.DataFrame],
) -> dict[str, SetResult]:
    """Every evaluated set over the chunk's visits, one set at a time, each kept only as far as the export
    reads it: its outcomes, and the findings of the items shown as columns (nerve and segment levels, in
    :data:`STATUS_SOURCE` columns only). A set's full findings are dropped before the next set runs, so the
    chunk's peak memory holds the findings of one set rather than of all of them."""
    shown = {s.criteria: s for s in plan.sets}
    results = {}
    with memo.shared():  # the sets still share their derived frames (motor nerve tests, best paths…)
        for criteria_id in plan.evaluated:
            result = engine.evaluate(
                visits, tests, sites, plan.limits, [criteria_id], plan.settings, built=built
            )[criteria_id]
            results[criteria_id] = _reduced(plan.options.level, shown.get(criteria_id), result)
    return results


def _reduced(level: str, found: SetColumns | None, result: SetResult) -> SetResult:
    """``result`` with only the findings rows and columns that the ``level`` table of a shown set needs."""
    findings = result.findings
    if found is not None and level in ("nerve", "segment"):
        _require_known_items(found, findings)
        wanted = [i.item for i in found.items if level == "nerve" or i.has_segment]
        findings = findings.loc[findings["item"].isin(wanted), STATUS_SOURCE]
    else:
        findings = findings.loc[[], STATUS_SOURCE]
    return dataclasses.replace(result, findings=findings.reset_index(drop=True))


def _require_known_items(found: SetColumns, findings: pd.DataFrame) -> None:
    unknown = set(findings["item"]) - {i.item for i in found.items}
    if unknown:
        raise TrackerError(
            f"Criteria set {found.criteria} reported items {sorted(unknown)} that the export does not "
            "know; this is a bug in ncs-tracker, please report it."
        )


def _outcome_filter(options: ExportOptions, results: dict[str, SetResult], visit_keys: pd.Series) -> set[int]:
    """Visit keys that pass every --outcome filter (several values of one set: any of them)."""
    keep = set(int(v) for v in visit_keys)
    wanted: dict[str, set[str]] = {}
    for criteria_id, value in options.outcomes:
        wanted.setdefault(criteria_id, set()).add(value)
    for criteria_id, values in wanted.items():
        if criteria_id not in results:
            return set()
        outcomes = results[criteria_id].outcomes
        keep &= set(int(v) for v in outcomes.loc[outcomes["outcome"].isin(values), "visit_key"])
    return keep


def _visit_context(
    plan: ExportPlan, session: Session, chunk: pd.DataFrame, visits: pd.DataFrame
) -> pd.DataFrame:
    """The key columns of each visit of the chunk (export id, visit number, days, date), in export order."""
    patient_ids = sorted(set(int(p) for p in chunk["patient_id"]))
    # All visit dates of these patients (also outside the filters): first visit and visit number.
    history = pd.DataFrame(
        session.execute(
            select(Visit.patient_id, Visit.visit_date).where(Visit.patient_id.in_(patient_ids))
        ).all(),
        columns=["patient_id", "visit_date"],
    )
    history["visit_date"] = pd.to_datetime(history["visit_date"])
    first = history.groupby("patient_id")["visit_date"].min()
    context = chunk.reset_index(drop=True).copy()
    context["position"] = np.arange(len(context))
    dates = visits.set_index("visit_key")["visit_date"]
    context["visit_date"] = pd.to_datetime(context["visit_key"].map(dates))
    context["first_date"] = context["patient_id"].map(first)
    context["days_since_first_visit"] = (context["visit_date"] - context["first_date"]).dt.days
    counts = history.merge(
        context[["patient_id", "visit_key", "visit_date"]], on="patient_id", suffixes=("", "_this")
    )
    numbers = counts[counts["visit_date"] <= counts["visit_date_this"]].groupby("visit_key").size()
    context["visit_number"] = context["visit_key"].map(numbers)
    shifted = context["visit_date"] + pd.to_timedelta(context["shift_days"], unit="D")
    context["visit_date_shifted"] = [d.date() for d in shifted]
    real = [d.date() for d in context["visit_date"]]
    context["visit_date"] = real
    if plan.options.identified:
        codes = dict(
            session.execute(select(Patient.id, Patient.code).where(Patient.id.in_(patient_ids))).all()
        )
        context["patient_code"] = context["patient_id"].map(codes)
    return context


def _key_frame(plan: ExportPlan, context: pd.DataFrame) -> pd.DataFrame:
    names = [c.name for c in plan.columns if c.name in context.columns]
    return context[["visit_key", "position", *[n for n in names if n not in ("visit_key", "position")]]]


def _statuses(
    results: dict[str, SetResult], sets: list, keep_items: Callable[[object], bool]
) -> pd.DataFrame | None:
    """Findings of the shown sets as rows (visit_key, nerve, side, modality, segment, column, status)."""
    parts = []
    for found in sets:
        if found.criteria not in results:
            continue
        wanted = {i.item: i.column for i in found.items if keep_items(i)}
        _require_known_items(found, results[found.criteria].findings)
        findings = results[found.criteria].findings
        findings = findings[findings["item"].isin(list(wanted))]
        parts.append(
            pd.DataFrame(
                {
                    "visit_key": findings["visit_key"].to_numpy(),
                    "nerve": findings["nerve"].to_numpy(dtype=object),
                    "side": findings["side"].to_numpy(dtype=object),
                    "modality": findings["modality"].to_numpy(dtype=object),
                    "segment": findings["segment"].to_numpy(dtype=object),
                    "column": findings["item"].map(wanted).to_numpy(dtype=object),
                    "status": findings["status"].to_numpy(dtype=object),
                    "value": pd.to_numeric(findings["value"], errors="coerce").to_numpy(dtype=float),
                }
            )
        )
    if not parts:
        return None
    return pd.concat(parts, ignore_index=True)


def _visit_level(
    plan: ExportPlan,
    session: Session,
    context: pd.DataFrame,
    visits: pd.DataFrame,
    tests: pd.DataFrame,
    sites: pd.DataFrame,
    results: dict[str, SetResult],
) -> pd.DataFrame:
    frame = _key_frame(plan, context).copy()
    keys = [int(v) for v in frame["visit_key"]]
    details = pd.DataFrame(
        session.execute(
            select(
                Visit.id.label("visit_key"),
                Visit.status,
                Visit.examiner,
                Visit.laboratory,
                func.coalesce(Visit.diagnosis, Patient.diagnosis).label("diagnosis"),
                func.coalesce(Visit.phenotype, Patient.phenotype).label("phenotype"),
                Patient.onset_date,
            )
            .join(Patient, Patient.id == Visit.patient_id)
            .where(Visit.id.in_(keys))
        ).all(),
        columns=["visit_key", "status", "examiner", "laboratory", "diagnosis", "phenotype", "onset_date"],
    )
    frame = frame.merge(details, on="visit_key", how="left")
    own = visits.set_index("visit_key")
    frame["sex"] = frame["visit_key"].map(own["sex"])
    frame["height_cm"] = frame["visit_key"].map(own["height_cm"])
    identified = plan.options.identified
    ages = [
        deidentify.top_coded_age(a, identified=identified)
        for a in frame["visit_key"].map(own["age_years"]).astype(float)
    ]
    frame["age_at_visit"] = pd.array([a for a, _ in ages], dtype="Int64")
    frame["age_top_coded"] = pd.array([t for _, t in ages], dtype="boolean")
    onset = pd.to_datetime(frame["onset_date"])
    real_dates = pd.to_datetime(frame["visit_key"].map(context.set_index("visit_key")["visit_date"]))
    frame["days_since_onset"] = (real_dates - onset).dt.days
    frame["nerve_tests"] = frame["visit_key"].map(tests.groupby("visit_key").size()).fillna(0)
    # Recorded absences, counted per visit (a finding, not missing data).
    distal = sites.sort_values(["test_key", "site_order"]).drop_duplicates("test_key")
    silent = distal.loc[(distal["amplitude"] == 0) & distal["latency_ms"].isna(), "test_key"]
    no_response = tests[tests["test_key"].isin(silent)].groupby("visit_key").size()
    frame["nerve_tests_no_response"] = frame["visit_key"].map(no_response).fillna(0)
    f_absent = tests[tests["f_absent"].astype(bool)].groupby("visit_key").size()
    frame["nerve_tests_f_absent"] = frame["visit_key"].map(f_absent).fillna(0)
    if identified:
        frame = _with_identity(session, frame, context)
    frame = _with_treatments(session, frame, context)
    frame = _with_scores(session, frame, context)
    frame = with_response(
        session, frame, context, plan.response, shifted=plan.options.dates == "shifted", identified=identified
    )
    for found in plan.sets:
        if found.criteria not in results:
            continue
        outcomes = results[found.criteria].outcomes.set_index("visit_key")
        outcome = frame["visit_key"].map(outcomes["outcome"])
        tested = outcome.notna()
        if UNDECIDED in OUTCOME_VALUES.get(found.criteria, ()):
            # "undecided" is not a level of the ordered outcome: a flag of its own, the level left empty.
            undecided = outcome == UNDECIDED
            frame[f"{found.alias}__undecided"] = undecided.astype("boolean").where(tested)
            outcome = outcome.where(~undecided)
            if "undecided_items" in outcomes:
                items = frame["visit_key"].map(outcomes["undecided_items"])
                counts = [len(i) if isinstance(i, (list, tuple)) else 0 for i in items]
                frame[f"{found.alias}__undecided_items"] = pd.Series(counts, index=frame.index).where(tested)
        frame[f"{found.alias}__outcome"] = outcome
        frame[f"{found.alias}__rule"] = (
            frame["visit_key"].map(outcomes["rule"]) if "rule" in outcomes else None
        )
        for key in found.extra_keys:
            frame[f"{found.alias}__{key}"] = frame["visit_key"].map(outcomes[key])
    return frame.sort_values("position", kind="stable")


def _with_identity(session: Session, frame: pd.DataFrame, context: pd.DataFrame) -> pd.DataFrame:
    patient_ids = sorted(set(int(p) for p in context["patient_id"]))
    identity = pd.DataFrame(
        session.execute(
            select(
                PatientIdentity.patient_id,
                PatientIdentity.record_number,
                PatientIdentity.full_name,
                PatientIdentity.birth_date,
            ).where(PatientIdentity.patient_id.in_(patient_ids))
        ).all(),
        columns=["patient_id", "record_number", "full_name", "birth_date"],
    )
    frame = frame.merge(context[["visit_key", "patient_id"]], on="visit_key", how="left")
    return frame.merge(identity, on="patient_id", how="left").drop(columns=["patient_id"])


def _with_treatments(session: Session, frame: pd.DataFrame, context: pd.DataFrame) -> pd.DataFrame:
    """Treatments ongoing on the visit date (start ≤ visit ≤ end, no end: ongoing); notes never read."""
    patient_ids = sorted(set(int(p) for p in context["patient_id"]))
    treatments = pd.DataFrame(
        session.execute(
            select(
                Treatment.patient_id,
                Treatment.therapy,
                Treatment.start_date,
                Treatment.end_date,
                Treatment.dose,
                Treatment.dose_unit,
                Treatment.interval_days,
            ).where(Treatment.patient_id.in_(patient_ids))
        ).all(),
        columns=["patient_id", "therapy", "start_date", "end_date", "dose", "dose_unit", "interval_days"],
    )
    visits = context[["visit_key", "patient_id", "visit_date"]].copy()
    visits["visit_date"] = pd.to_datetime(visits["visit_date"])
    treatments["start_date"] = pd.to_datetime(treatments["start_date"])
    treatments["end_date"] = pd.to_datetime(treatments["end_date"])
    pairs = visits.merge(treatments, on="patient_id")
    ongoing = pairs[
        (pairs["start_date"] <= pairs["visit_date"])
        & (pairs["end_date"].isna() | (pairs["end_date"] >= pairs["visit_date"]))
    ]
    ongoing = ongoing.sort_values(["visit_key", "therapy", "start_date"], kind="stable")
    names = ongoing.drop_duplicates(["visit_key", "therapy"]).groupby("visit_key")["therapy"].agg("+".join)
    counts = ongoing["visit_key"].map(ongoing.groupby("visit_key").size())
    single = ongoing[counts == 1].set_index("visit_key")
    frame["therapy_at_visit"] = frame["visit_key"].map(names)
    frame["therapy_dose"] = frame["visit_key"].map(single["dose"]) if len(single) else np.nan
    frame["therapy_dose_unit"] = frame["visit_key"].map(single["dose_unit"]) if len(single) else None
    frame["therapy_interval_days"] = (
        frame["visit_key"].map(single["interval_days"]) if len(single) else np.nan
    )
    if len(single):
        since = (single["visit_date"] - single["start_date"]).dt.days
        frame["therapy_days_since_start"] = frame["visit_key"].map(since)
    return frame


def _with_scores(session: Session, frame: pd.DataFrame, context: pd.DataFrame) -> pd.DataFrame:
    """Per scale: the score on the visit date, else the nearest within
    ±SCORE_WINDOW_DAYS (earlier on a tie)."""
    patient_ids = sorted(set(int(p) for p in context["patient_id"]))
    known = list(scales())
    scores = pd.DataFrame(
        session.execute(
            select(
                OutcomeScore.patient_id, OutcomeScore.score_date, OutcomeScore.scale, OutcomeScore.value
            ).where(OutcomeScore.patient_id.in_(patient_ids), OutcomeScore.scale.in_(known))
        ).all(),
        columns=["patient_id", "score_date", "scale", "value"],
    )
    visits = context[["visit_key", "patient_id", "visit_date"]].copy()
    visits["visit_date"] = pd.to_datetime(visits["visit_date"])
    scores["score_date"] = pd.to_datetime(scores["score_date"])
    pairs = visits.merge(scores, on="patient_id")
    pairs["offset"] = (pairs["score_date"] - pairs["visit_date"]).dt.days
    pairs = pairs[pairs["offset"].abs() <= SCORE_WINDOW_DAYS].assign(distance=lambda p: p["offset"].abs())
    best = pairs.sort_values(["visit_key", "scale", "distance", "offset"], kind="stable").drop_duplicates(
        ["visit_key", "scale"]
    )
    for scale in known:
        rows = best[best["scale"] == scale].set_index("visit_key")
        frame[f"score_{scale}"] = frame["visit_key"].map(rows["value"]).astype(float)
        frame[f"score_{scale}_offset_days"] = frame["visit_key"].map(rows["offset"])
    return frame


def _nerve_level(
    plan: ExportPlan,
    session: Session,
    context: pd.DataFrame,
    nerves: pd.DataFrame,
    sites: pd.DataFrame,
    results: dict[str, SetResult],
) -> pd.DataFrame:
    test_keys = [int(t) for t in nerves["test_key"]]
    extra = pd.DataFrame(
        session.execute(
            select(
                NerveTest.id.label("test_key"), NerveTest.recording_site, NerveTest.f_persistence_pct
            ).where(NerveTest.id.in_(test_keys))
        ).all()
        if test_keys
        else [],
        columns=["test_key", "recording_site", "f_persistence_pct"],
    )
    first = sites.sort_values(["test_key", "site_order"]).drop_duplicates("test_key").set_index("test_key")
    frame = nerves.merge(extra, on="test_key", how="left")
    motor = frame["modality"].to_numpy(dtype=object) == "motor"
    frame["distal_amplitude_mv"] = np.where(motor, frame["distal_amplitude"], np.nan)
    frame["distal_amplitude_uv"] = np.where(~motor, frame["distal_amplitude"], np.nan)
    frame["distal_area_mvms"] = frame["test_key"].map(first["area_mvms"]).astype(float)
    frame["distal_site"] = frame["distal_label"]
    frame["cold_limb"] = frame["cold"].astype("boolean").where(frame["temperature_c"].notna())
    frame["sensory_velocity_m_per_s"] = frame["sensory_cv"]
    frame["slowest_standard_velocity_m_per_s"] = frame["cv_standard"]
    frame["slowest_standard_segment"] = frame["cv_standard_segment"]
    silent = sites[(sites["amplitude"] == 0) & sites["latency_ms"].isna()].groupby("test_key").size()
    frame["sites_no_response"] = frame["test_key"].map(silent).fillna(0)
    frame = _key_frame(plan, context).merge(frame, on="visit_key", how="inner")
    # One set at a time (each set has columns of its own): the long status rows of one set are in memory at
    # once, not those of every set.
    for found in plan.sets:
        statuses = _statuses(results, [found], lambda item: True)
        if statuses is None or statuses.empty:
            continue
        wide = statuses.pivot_table(
            index=NERVE_KEY, columns="column", values="status", aggfunc="first"
        ).reset_index()
        wide.columns.name = None
        frame = frame.merge(wide, on=NERVE_KEY, how="left")
        frame = _with_item_values(frame, statuses, [found])
        del statuses, wide
    return frame.sort_values(["position", "nerve", "side", "modality"], kind="stable")


def _with_item_values(frame: pd.DataFrame, statuses: pd.DataFrame, sets: list[SetColumns]) -> pd.DataFrame:
    """``frame`` (nerve level) with the value and segment behind each segment-judged verdict (block and
    dispersion %, velocity…), so that they need no join with the segment level."""
    targets = {i.column: (i.value_column, i.segment_column) for s in sets for i in s.items if i.has_segment}
    rows = statuses[statuses["column"].isin(list(targets))]
    if rows.empty:
        return frame
    rows = rows.drop_duplicates([*NERVE_KEY, "column"])
    index = pd.MultiIndex.from_frame(frame[NERVE_KEY])
    for column, (value_column, segment_column) in targets.items():
        these = rows[rows["column"] == column].set_index(NERVE_KEY)
        if these.empty:
            continue
        frame[value_column] = these["value"].reindex(index).to_numpy(dtype=float)
        segments = these["segment"].reindex(index).to_numpy(dtype=object)
        frame[segment_column] = [s if isinstance(s, str) and s else None for s in segments]
    return frame


def _segment_level(
    plan: ExportPlan,
    context: pd.DataFrame,
    paths: pd.DataFrame,
    sites: pd.DataFrame,
    results: dict[str, SetResult],
) -> pd.DataFrame:
    at_site = sites[["test_key", "site_order", "latency_ms", "amplitude", "duration_ms", "area_mvms"]]
    frame = paths.merge(at_site, on=["test_key", "site_order"], how="left")
    frame = frame.rename(
        columns={"amplitude": "amplitude_mv", "segment_velocity": "segment_velocity_m_per_s"}
    )
    frame["response_absent"] = (frame["amplitude_mv"] == 0) & frame["latency_ms"].isna()
    frame["modality"] = "motor"
    frame = _key_frame(plan, context).merge(frame, on="visit_key", how="inner")
    for found in plan.sets:  # one set at a time, as at the nerve level
        statuses = _statuses(results, [found], lambda item: item.has_segment)
        if statuses is None or statuses.empty:
            continue
        statuses = statuses[statuses["segment"].map(lambda s: isinstance(s, str) and s != "")]
        # A finding names either the segment (site below → site) or the path from the distal site.
        rows = frame[["visit_key", "nerve", "side", "modality", "site_order", "segment", "path"]]
        by_segment = rows.merge(statuses, on=[*NERVE_KEY, "segment"])
        by_path = (
            rows.drop(columns=["segment"])
            .rename(columns={"path": "segment"})
            .merge(statuses, on=[*NERVE_KEY, "segment"])
        )
        matched = pd.concat([by_segment, by_path], ignore_index=True).drop_duplicates(
            [*NERVE_KEY, "site_order", "column"]
        )
        if not matched.empty:
            wide = matched.pivot_table(
                index=[*NERVE_KEY, "site_order"], columns="column", values="status", aggfunc="first"
            ).reset_index()
            wide.columns.name = None
            frame = frame.merge(wide, on=[*NERVE_KEY, "site_order"], how="left")
    return frame.sort_values(["position", "nerve", "side", "site_order"], kind="stable")


QUANTITY_ORDER = {
    name: rank for rank, (name, *_rest) in enumerate(NERVE_QUANTITIES + SITE_QUANTITIES + PATH_QUANTITIES)
}


def _long_level(
    plan: ExportPlan,
    session: Session,
    context: pd.DataFrame,
    nerves: pd.DataFrame,
    paths: pd.DataFrame,
    sites: pd.DataFrame,
) -> pd.DataFrame:
    test_keys = [int(t) for t in nerves["test_key"]]
    persistence = (
        dict(
            session.execute(
                select(NerveTest.id, NerveTest.f_persistence_pct).where(NerveTest.id.in_(test_keys))
            ).all()
        )
        if test_keys
        else {}
    )
    tests = nerves[
        [
            "test_key",
            "visit_key",
            "nerve",
            "side",
            "modality",
            "temperature_c",
            "lff_hz",
            "f_latency_ms",
            "sensory_cv",
            "f_absent",
            "no_response",
        ]
    ].copy()
    tests["f_persistence_pct"] = tests["test_key"].map(persistence).astype(float)
    ident = ["test_key", "visit_key", "nerve", "side", "modality"]
    parts = []

    def melt(frame: pd.DataFrame, spec: list[tuple], site_order, segment, absent: dict | None = None) -> None:
        """One row per non-empty value of each quantity of ``spec``. ``absent``: quantity → (mask of recorded
        absences, whether an absence makes a row of its own when the value is empty)."""
        for quantity, source, unit, origin in spec:
            values = frame[source].astype(float)
            present = values.notna().to_numpy()
            flagged, own_row = (absent or {}).get(quantity, (np.zeros(len(frame), dtype=bool), False))
            rows = present | flagged if own_row else present
            if not rows.any():
                continue
            part = frame.loc[rows, ident].copy()
            part["site_order"] = site_order(frame)[rows] if site_order is not None else np.nan
            part["segment"] = segment(frame, origin)[rows] if segment is not None else None
            part["quantity"] = quantity
            part["value"] = values[rows].to_numpy()
            if unit is None:  # amplitude: mV for motor, µV for sensory
                part["unit"] = np.where(part["modality"].to_numpy(dtype=object) == "motor", "mV", "µV")
            else:
                part["unit"] = unit
            part["origin"] = "derived" if origin in ("derived", "segment", "path") else "measured"
            part["response_absent"] = flagged[rows]
            parts.append(part)

    # Recorded absences are findings: they get rows of their own, flagged, never look like "not measured".
    f_absent = tests["f_absent"].fillna(False).to_numpy(dtype=bool)
    silent_sensory = (tests["no_response"].fillna(False).to_numpy(dtype=bool)) & (
        tests["modality"].to_numpy(dtype=object) == "sensory"
    )
    melt(
        tests,
        NERVE_QUANTITIES,
        None,
        None,
        {
            "f_latency": (f_absent, True),
            "f_persistence": (f_absent, False),
            "sensory_velocity": (silent_sensory, True),
        },
    )
    site_rows = sites.merge(tests[ident], on="test_key", how="inner")
    silent = ((site_rows["amplitude"] == 0) & site_rows["latency_ms"].isna()).to_numpy(dtype=bool)
    melt(
        site_rows,
        SITE_QUANTITIES,
        lambda f: f["site_order"].to_numpy(),
        None,
        {"onset_latency": (silent, True), "amplitude": (silent, False)},
    )
    path_rows = paths.assign(modality="motor")
    melt(
        path_rows,
        PATH_QUANTITIES,
        lambda f: f["site_order"].to_numpy(),
        lambda f, origin: f["segment" if origin == "segment" else "path"].to_numpy(dtype=object),
    )
    if parts:
        frame = pd.concat(parts, ignore_index=True)
    else:
        frame = pd.DataFrame(
            columns=[
                *ident,
                "site_order",
                "segment",
                "quantity",
                "value",
                "unit",
                "origin",
                "response_absent",
            ]
        )
    frame["rank"] = frame["quantity"].map(QUANTITY_ORDER)
    frame = _key_frame(plan, context).merge(frame, on="visit_key", how="inner")
    frame["site_rank"] = frame["site_order"].fillna(0)
    return frame.sort_values(["position", "nerve", "side", "modality", "site_rank", "rank"], kind="stable")
