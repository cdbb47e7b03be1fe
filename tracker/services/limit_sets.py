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
from tracker.domain.plausibility import Range, ranges
from tracker.domain.vocabulary import LIMIT_BOUNDS, LIMIT_PARAMETERS, MODALITIES, SEXES
from tracker.errors import InputRejected, NotFound, Problem
from tracker.services import checks
from tracker.services.access import audit
from tracker.services.checks import Collector
from tracker.services.input_limits import excerpt, from_environment, guarded
from tracker.services.tables import ROW, InputTable, read_table

REQUIRED = ["nerve", "modality", "parameter", "bound", "value"]
OPTIONAL = [
    "age_min",
    "age_max",
    "height_min_cm",
    "height_max_cm",
    "sex",
    "source",
    "status",
    "recording_site",
]
# A laboratory's set has tens to a few hundred rows; the overlap check compares the strata of one nerve,
# modality, parameter and bound pairwise, so a set and each of its groups are kept well below the general
# row limit of an import file (100 strata: e.g. 10 age bands × 5 height bands × 2 sexes).
MAX_ROWS = 2_000
MAX_STRATA = 100
NAME_CHARS: int = LimitSet.__table__.c.name.type.length
# A normal limit is a value of the quantity it bounds: it must lie within that quantity's plausibility range
# (tracker/reference/plausibility.csv, where each range has its source). (parameter, modality) → quantity;
# modality None: either.
PLAUSIBLE_QUANTITY = {
    ("distal_latency_ms", None): "latency_ms",
    ("peak_latency_ms", None): "peak_latency_ms",
    ("f_latency_ms", None): "f_latency_ms",
    ("distal_duration_ms", None): "duration_ms",
    ("cv_ms", "motor"): "motor_velocity_m_per_s",
    ("cv_ms", "sensory"): "sensory_velocity_m_per_s",
    ("amplitude", "motor"): "amplitude_mv",
    ("amplitude", "sensory"): "amplitude_uv",
}
AGE_BAND = Range(
    "age",
    "years",
    0,
    True,
    120,
    True,
    False,
    "no documented human life reaches 123 years; common practice, no source",
)


def _band_range(column: str) -> Range:
    """Plausible bounds of an age or height band: from 0 up to the quantity's plausible maximum."""
    if column.startswith("age"):
        return AGE_BAND
    height = ranges()["height_cm"]
    return Range(
        "height band", height.unit, 0, True, height.upper, height.upper_inclusive, False, height.source
    )


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
    if len(cells) > MAX_ROWS:
        collect.add_one(
            None, None, None, f"a normal-limit set has at most {MAX_ROWS:,} rows; the file has {len(cells):,}"
        )
        raise InputRejected("The limits file was refused", guarded(collect.sorted_problems()))
    if checks.missing_columns(collect, REQUIRED) or len(cells) == 0:
        if len(cells) == 0:
            collect.add_one(None, None, None, "the file has a header but no data rows")
        raise InputRejected("The limits file was refused", guarded(collect.sorted_problems()))
    nerve_words = {w: catalogue.canonical_nerve(w) for w in catalogue.known_nerve_words()}
    nerve = checks.vocabulary(
        collect, "nerve", nerve_words, required=True, shown_choices=sorted(catalogue.nerves())
    )
    modality = checks.vocabulary(collect, "modality", {m: m for m in MODALITIES}, required=True)
    parameter = checks.vocabulary(collect, "parameter", {p: p for p in LIMIT_PARAMETERS}, required=True)
    bound = checks.vocabulary(collect, "bound", {b: b for b in LIMIT_BOUNDS}, required=True)
    value, _ = checks.number(collect, "value", required=True)
    with np.errstate(invalid="ignore"):
        collect.add(value <= 0, "value", "a normal limit must be above 0")
    _plausible_values(collect, parameter, modality, value)
    bands = {}
    for low, high, unit in (("age_min", "age_max", "years"), ("height_min_cm", "height_max_cm", "cm")):
        lo, _ = checks.number(collect, low, unit=unit)
        hi, _ = checks.number(collect, high, unit=unit)
        with np.errstate(invalid="ignore"):
            collect.add(lo >= hi, high, f"the band is empty: {high} must be above {low}")
            collect.add((lo < 0) | (hi < 0), low, "must not be negative")
        for column, values in ((low, lo), (high, hi)):
            rule = _band_range(column)
            outside = rule.outside(values) & ~(values < 0)  # a negative bound has its own message
            collect.add(
                outside,
                column,
                f"outside the plausible range of an age or height band; expected {rule.describe()}",
            )
        bands[low], bands[high] = lo, hi
    sex = checks.vocabulary(collect, "sex", {s: s for s in SEXES})
    status = checks.vocabulary(
        collect, "status", {"verified": "verified", "memory": "memory", "local": "local"}
    )
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
    group = frame.groupby(["nerve", "modality", "parameter", "bound"], sort=False).cumcount().to_numpy()
    crowded = np.flatnonzero(group == MAX_STRATA)  # the first row beyond the limit, in each crowded group
    for index in crowded:
        collect.add_one(
            int(frame[ROW].iloc[index]),
            "parameter",
            None,
            f"more than {MAX_STRATA} rows give the {frame['bound'].iloc[index]} "
            f"{frame['parameter'].iloc[index]} of the {frame['modality'].iloc[index]} "
            f"{frame['nerve'].iloc[index]} nerve; at most {MAX_STRATA} strata are accepted",
        )
    for pair in [] if len(crowded) else limit_rules.overlapping_strata(frame):
        a, b = (int(frame.loc[i, ROW]) for i in pair)
        collect.add_one(
            b, None, None, f"rows {a} and {b} give the same limit for overlapping strata; narrow one of them"
        )
    if collect.problems:
        raise InputRejected("The limits file was refused", guarded(collect.sorted_problems()))
    return frame


def _plausible_values(
    collect: Collector, parameter: pd.Series, modality: pd.Series, value: np.ndarray
) -> None:
    """Each limit's value within the plausibility range of the quantity it bounds (its unit named)."""
    for (name, wanted_modality), quantity in PLAUSIBLE_QUANTITY.items():
        rule = ranges()[quantity]
        rows = (parameter == name).to_numpy(dtype=bool)
        if wanted_modality is not None:
            rows = rows & (modality == wanted_modality).to_numpy(dtype=bool)
        with np.errstate(invalid="ignore"):
            outside = rows & rule.outside(value) & (value > 0)  # 0 and below have their own message
        which = f"{wanted_modality} {name}" if wanted_modality else name
        message = f"a {which} limit is outside the plausible range; expected {rule.describe()}"
        collect.add(outside, "value", message)


def import_limit_set(
    session: Session, path: Path, *, name: str, username: str, description: str | None = None
) -> LimitSetInfo:
    """Store a laboratory's limits as a new set, or as the next version of the set with that name."""
    return import_limit_table(
        session,
        read_table(path, allowed_kinds=("limits",)),
        name=name,
        username=username,
        description=description,
    )


def import_limit_table(
    session: Session, table: InputTable, *, name: str, username: str, description: str | None = None
) -> LimitSetInfo:
    """As :func:`import_limit_set`, from a parsed table (an upload:
    ``parse_table(raw, suffix, ("limits",))``)."""
    if not name.strip():
        raise InputRejected(
            "The limit set needs a name",
            [Problem(None, "name", name, "give the set a short name, e.g. your laboratory's")],
        )
    if len(name) > NAME_CHARS:
        raise InputRejected(
            "The limit set's name is too long",
            [
                Problem(
                    None,
                    "--name",
                    excerpt("--name", name),
                    f"a set's name has at most {NAME_CHARS} characters; it has {len(name):,}",
                )
            ],
        )
    cell_chars = from_environment().cell_chars
    if description is not None and len(description) > cell_chars:
        raise InputRejected(
            "The limit set's description is too long",
            [
                Problem(
                    None,
                    "--description",
                    excerpt("--description", description),
                    f"a description has at most {cell_chars:,} characters; it has {len(description):,}",
                )
            ],
        )
    frame = validate_limits(table.cells)
    version = (session.scalar(select(func.max(LimitSet.version)).where(LimitSet.name == name)) or 0) + 1
    set_id = session.scalar(
        insert(LimitSet).returning(LimitSet.id),
        [
            {
                "name": name,
                "version": version,
                "description": description or f"imported from a file (sha256 {table.sha256[:12]})",
                "is_default": False,
                "created_at": utc_now(),
            }
        ],
    )
    _insert_rows(session, set_id, frame)
    audit.record(
        session,
        username=username,
        action="import_limits",
        entity="limit_sets",
        entity_key=f"{name} v{version}",
        after={"rows": len(frame), "file_sha256": table.sha256},
    )
    return LimitSetInfo(set_id, name, version, len(frame), False, description)


def _insert_rows(session: Session, set_id: int, frame: pd.DataFrame) -> None:
    columns = [
        "nerve",
        "modality",
        "parameter",
        "bound",
        "value",
        "age_min",
        "age_max",
        "height_min_cm",
        "height_max_cm",
        "sex",
        "source",
    ]
    data = frame[columns].astype(object).where(frame[columns].notna(), None)
    session.execute(insert(LimitRow), [{"limit_set_id": set_id, **row} for row in data.to_dict("records")])


def ensure_default(session: Session) -> LimitSetInfo:
    """The shipped default set, stored once per shipped version so that evaluations can refer to it."""
    found = session.scalar(
        select(LimitSet).where(
            LimitSet.name == limit_rules.DEFAULT_NAME, LimitSet.version == limit_rules.DEFAULT_VERSION
        )
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
            [
                {
                    "name": limit_rules.DEFAULT_NAME,
                    "version": limit_rules.DEFAULT_VERSION,
                    "description": limit_rules.DEFAULT_DESCRIPTION,
                    "is_default": take_mark,
                    "created_at": utc_now(),
                }
            ],
        )
        rows = limit_rules.default_limits()
        frame = rows.assign(source=[f"{s} [{st}]" for s, st in zip(rows["source"], rows["status"])])
        _insert_rows(session, set_id, frame)
        found = session.get(LimitSet, set_id)
    return _info(session, found)


def _info(session: Session, limit_set: LimitSet) -> LimitSetInfo:
    count = session.scalar(
        select(func.count()).select_from(LimitRow).where(LimitRow.limit_set_id == limit_set.id)
    )
    return LimitSetInfo(
        limit_set.id, limit_set.name, limit_set.version, count, limit_set.is_default, limit_set.description
    )


def list_limit_sets(session: Session) -> list[LimitSetInfo]:
    ensure_default(session)
    sets = session.scalars(select(LimitSet).order_by(LimitSet.name, LimitSet.version)).all()
    return [_info(session, s) for s in sets]


def set_default(session: Session, name: str, *, username: str) -> LimitSetInfo:
    chosen = _latest(session, name)
    previous = session.scalar(select(LimitSet).where(LimitSet.is_default.is_(True)))
    session.execute(update(LimitSet).values(is_default=False))
    session.execute(update(LimitSet).where(LimitSet.id == chosen.id).values(is_default=True))
    audit.record(
        session,
        username=username,
        action="choose_default_limits",
        entity="limit_sets",
        entity_key=f"{chosen.name} v{chosen.version}",
        before={"default": None if previous is None else f"{previous.name} v{previous.version}"},
        after={"default": f"{chosen.name} v{chosen.version}"},
    )
    return _info(session, chosen)


def _latest(session: Session, name: str) -> LimitSet:
    chosen = session.scalar(
        select(LimitSet).where(LimitSet.name == name).order_by(LimitSet.version.desc()).limit(1)
    )
    if chosen is None:
        names = sorted(set(session.scalars(select(LimitSet.name))))
        hint = catalogue.suggest(name, names)
        raise NotFound(
            f"No normal-limit set named {name!r}"
            + (f"; did you mean {hint!r}?" if hint else f"; known: {', '.join(names)}")
        )
    return chosen


def resolve(session: Session, name: str | None) -> tuple[LimitSetInfo, pd.DataFrame]:
    """The set to evaluate with (named, else the one marked default, else
    the shipped default) and its rows."""
    default = ensure_default(session)
    if name:
        chosen = _info(session, _latest(session, name))
    else:
        marked = session.scalar(
            select(LimitSet).where(LimitSet.is_default).order_by(LimitSet.version.desc()).limit(1)
        )
        chosen = _info(session, marked) if marked is not None else default
    rows = session.execute(
        select(
            LimitRow.nerve,
            LimitRow.modality,
            LimitRow.parameter,
            LimitRow.bound,
            LimitRow.value,
            LimitRow.age_min,
            LimitRow.age_max,
            LimitRow.height_min_cm,
            LimitRow.height_max_cm,
            LimitRow.sex,
            LimitRow.source,
        ).where(LimitRow.limit_set_id == chosen.id)
    ).all()
    frame = pd.DataFrame(
        rows,
        columns=[
            "nerve",
            "modality",
            "parameter",
            "bound",
            "value",
            "age_min",
            "age_max",
            "height_min_cm",
            "height_max_cm",
            "sex",
            "source",
        ],
    )
    frame["status"] = [
        "memory"
        if isinstance(s, str) and "[memory]" in s
        else ("verified" if isinstance(s, str) and "[verified]" in s else "local")
        for s in frame["source"]
    ]
    return chosen, limit_rules.normalise(frame)


def unknown_problem(name: str) -> Problem:
    return Problem(None, "--limits", name, "unknown normal-limit set")
