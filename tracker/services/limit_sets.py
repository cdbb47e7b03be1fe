"""Normal-limit sets: the shipped default and laboratory sets imported from CSV (DESIGN.md §4.3).

Importing a set under an existing name creates its next version; saved evaluations name the set and the
version that produced them.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
from sqlalchemy import func, insert, select, update
from sqlalchemy.orm import Session

from tracker.criteria import limits as limit_rules
from tracker.db.models import LimitRow, LimitSet, utc_now
from tracker.domain import catalogue
from tracker.domain.vocabulary import LIMIT_BOUNDS, LIMIT_PARAMETERS, MODALITIES, SEXES
from tracker.errors import InputRejected, NotFound, Problem
from tracker.services import audit, checks
from tracker.services.checks import Collector
from tracker.services.tables import ROW, InputTable, read_table

REQUIRED = ["nerve", "modality", "parameter", "bound", "value"]
OPTIONAL = ["age_min", "age_max", "height_min_cm", "height_max_cm", "sex", "source", "status", "recording_site"]


@dataclass(frozen=True)
class LimitSetInfo:
    id: int
    name: str
    version: int
    rows: int
    is_default: bool
    description: str | None


def validate_limits(cells: pd.DataFrame) -> pd.DataFrame:
    """Typed limit rows, or :class:`InputRejected` listing every problem."""
    collect = Collector(cells)
    checks.unknown_columns(collect, REQUIRED + OPTIONAL)
    if checks.missing_columns(collect, REQUIRED) or len(cells) == 0:
        if len(cells) == 0:
            collect.add_one(None, None, None, "the file has a header but no data rows")
        raise InputRejected("The limits file was refused", collect.sorted_problems())
    nerve_words = {w: catalogue.canonical_nerve(w) for w in catalogue.known_nerve_words()}
    nerve = checks.vocabulary(collect, "nerve", nerve_words, required=True, shown_choices=sorted(catalogue.nerves()))
    modality = checks.vocabulary(collect, "modality", {m: m for m in MODALITIES}, required=True)
    parameter = checks.vocabulary(collect, "parameter", {p: p for p in LIMIT_PARAMETERS}, required=True)
    bound = checks.vocabulary(collect, "bound", {b: b for b in LIMIT_BOUNDS}, required=True)
    value, _ = checks.number(collect, "value", required=True)
    with np.errstate(invalid="ignore"):
        collect.add(value <= 0, "value", "a normal limit must be above 0")
    bands = {}
    for low, high, unit in (("age_min", "age_max", "years"), ("height_min_cm", "height_max_cm", "cm")):
        lo, _ = checks.number(collect, low, unit=unit)
        hi, _ = checks.number(collect, high, unit=unit)
        with np.errstate(invalid="ignore"):
            collect.add(lo >= hi, high, f"the band is empty: {high} must be above {low}")
            collect.add((lo < 0) | (hi < 0), low, "must not be negative")
        bands[low], bands[high] = lo, hi
    sex = checks.vocabulary(collect, "sex", {s: s for s in SEXES})
    status = checks.vocabulary(collect, "status", {"verified": "verified", "memory": "memory", "local": "local"})
    frame = pd.DataFrame(
        {
            ROW: cells[ROW].to_numpy(),
            "nerve": nerve.to_numpy(),
            "modality": modality.to_numpy(),
            "parameter": parameter.to_numpy(),
            "bound": bound.to_numpy(),
            "value": value,
            **bands,
            "sex": sex.to_numpy(),
            "source": checks.text(cells, "source").replace("", None).to_numpy(),
            "status": status.fillna("local").to_numpy(),
        }
    )
    for pair in limit_rules.overlapping_strata(frame):
        a, b = (int(frame.loc[i, ROW]) for i in pair)
        collect.add_one(b, None, None, f"rows {a} and {b} give the same limit for overlapping strata; narrow one of them")
    if collect.problems:
        raise InputRejected("The limits file was refused", collect.sorted_problems())
    return frame


def import_limit_set(session: Session, path: Path, *, name: str, username: str, description: str | None = None) -> LimitSetInfo:
    """Store a laboratory's limits as a new set, or as the next version of the set with that name."""
    return import_limit_table(session, read_table(path, allowed_kinds=("limits",)), name=name, username=username, description=description)


def import_limit_table(session: Session, table: InputTable, *, name: str, username: str, description: str | None = None) -> LimitSetInfo:
    """As :func:`import_limit_set`, from a parsed table (an upload: ``parse_table(raw, suffix, ("limits",))``)."""
    if not name.strip():
        raise InputRejected("The limit set needs a name", [Problem(None, "name", name, "give the set a short name, e.g. your laboratory's")])
    frame = validate_limits(table.cells)
    version = (session.scalar(select(func.max(LimitSet.version)).where(LimitSet.name == name)) or 0) + 1
    set_id = session.scalar(
        insert(LimitSet).returning(LimitSet.id),
        [{"name": name, "version": version, "description": description or f"imported from a file (sha256 {table.sha256[:12]})", "is_default": False, "created_at": utc_now()}],
    )
    _insert_rows(session, set_id, frame)
    audit.record(session, username=username, action="import_limits", entity="limit_sets", entity_key=f"{name} v{version}", after={"rows": len(frame), "file_sha256": table.sha256})
    return LimitSetInfo(set_id, name, version, len(frame), False, description)


def _insert_rows(session: Session, set_id: int, frame: pd.DataFrame) -> None:
    columns = ["nerve", "modality", "parameter", "bound", "value", "age_min", "age_max", "height_min_cm", "height_max_cm", "sex", "source"]
    data = frame[columns].astype(object).where(frame[columns].notna(), None)
    session.execute(insert(LimitRow), [{"limit_set_id": set_id, **row} for row in data.to_dict("records")])


def ensure_default(session: Session) -> LimitSetInfo:
    """The shipped default set, stored once per shipped version so that evaluations can refer to it."""
    found = session.scalar(
        select(LimitSet).where(LimitSet.name == limit_rules.DEFAULT_NAME, LimitSet.version == limit_rules.DEFAULT_VERSION)
    )
    if found is None:
        marked = session.scalars(select(LimitSet.name).where(LimitSet.is_default)).all()
        # A database that used an older shipped version moves to this one (saved evaluations name the set and
        # version, so they are recomputed); a laboratory's own default set stays the default.
        take_mark = not marked or all(name == limit_rules.DEFAULT_NAME for name in marked)
        if take_mark and marked:
            session.execute(update(LimitSet).where(LimitSet.is_default).values(is_default=False))
        set_id = session.scalar(
            insert(LimitSet).returning(LimitSet.id),
            [{"name": limit_rules.DEFAULT_NAME, "version": limit_rules.DEFAULT_VERSION, "description": limit_rules.DEFAULT_DESCRIPTION, "is_default": take_mark, "created_at": utc_now()}],
        )
        rows = limit_rules.default_limits()
        frame = rows.assign(source=[f"{s} [{st}]" for s, st in zip(rows["source"], rows["status"])])
        _insert_rows(session, set_id, frame)
        found = session.get(LimitSet, set_id)
    return _info(session, found)


def _info(session: Session, limit_set: LimitSet) -> LimitSetInfo:
    count = session.scalar(select(func.count()).select_from(LimitRow).where(LimitRow.limit_set_id == limit_set.id))
    return LimitSetInfo(limit_set.id, limit_set.name, limit_set.version, count, limit_set.is_default, limit_set.description)


def list_limit_sets(session: Session) -> list[LimitSetInfo]:
    ensure_default(session)
    sets = session.scalars(select(LimitSet).order_by(LimitSet.name, LimitSet.version)).all()
    return [_info(session, s) for s in sets]


def set_default(session: Session, name: str, *, username: str) -> LimitSetInfo:
    chosen = _latest(session, name)
    session.execute(update(LimitSet).values(is_default=False))
    session.execute(update(LimitSet).where(LimitSet.id == chosen.id).values(is_default=True))
    audit.record(session, username=username, action="choose_default_limits", entity="limit_sets", entity_key=f"{chosen.name} v{chosen.version}")
    return _info(session, chosen)


def _latest(session: Session, name: str) -> LimitSet:
    chosen = session.scalar(select(LimitSet).where(LimitSet.name == name).order_by(LimitSet.version.desc()).limit(1))
    if chosen is None:
        names = sorted(set(session.scalars(select(LimitSet.name))))
        hint = catalogue.suggest(name, names)
        raise NotFound(f"No normal-limit set named {name!r}" + (f"; did you mean {hint!r}?" if hint else f"; known: {', '.join(names)}"))
    return chosen


def resolve(session: Session, name: str | None) -> tuple[LimitSetInfo, pd.DataFrame]:
    """The set to evaluate with (named, else the one marked default, else the shipped default) and its rows."""
    default = ensure_default(session)
    if name:
        chosen = _info(session, _latest(session, name))
    else:
        marked = session.scalar(select(LimitSet).where(LimitSet.is_default).order_by(LimitSet.version.desc()).limit(1))
        chosen = _info(session, marked) if marked is not None else default
    rows = session.execute(
        select(LimitRow.nerve, LimitRow.modality, LimitRow.parameter, LimitRow.bound, LimitRow.value, LimitRow.age_min, LimitRow.age_max,
               LimitRow.height_min_cm, LimitRow.height_max_cm, LimitRow.sex, LimitRow.source).where(LimitRow.limit_set_id == chosen.id)
    ).all()
    frame = pd.DataFrame(rows, columns=["nerve", "modality", "parameter", "bound", "value", "age_min", "age_max", "height_min_cm", "height_max_cm", "sex", "source"])
    frame["status"] = ["memory" if isinstance(s, str) and "[memory]" in s else ("verified" if isinstance(s, str) and "[verified]" in s else "local") for s in frame["source"]]
    return chosen, limit_rules.normalise(frame)


def unknown_problem(name: str) -> Problem:
    return Problem(None, "--limits", name, "unknown normal-limit set")
