"""The reference tables written beside every research export, so that the export folder explains itself:

- the **limits table**: every row of the normal-limit set the export was computed with (name, version,
  nerve, modality, parameter, bound, value and unit, the strata, and each row's source);
- the **criteria table**: for every criteria set the export evaluated, its version and publication, and every
  threshold row (item, nerve, comparator, factor or value, unit, excluded nerves, source); then the limb
  temperature minimums behind the ``cold_limb`` column.

Citations are the full texts of the tool's publication list, as the ``check`` traces show them. Rows are
sorted, so the same database and options give byte-identical tables.
"""

from __future__ import annotations

import pandas as pd

from tracker.criteria import thresholds
from tracker.criteria.citations import citations
from tracker.criteria.features import temperature_minimums

# Criteria-table rows of the limb temperature minimums (a name of our own, not a criteria set).
TEMPERATURE_ROWS = "limb-temperature"
# Measuring site of each limb's minimum (as the guidelines state it).
TEMPERATURE_SITES = {"upper": "palm", "lower": "external malleolus"}

LIMIT_TABLE_COLUMNS = [
    "limit_set",
    "limit_set_version",
    "nerve",
    "modality",
    "parameter",
    "bound",
    "value",
    "unit",
    "age_min",
    "age_max",
    "height_min_cm",
    "height_max_cm",
    "sex",
    "status",
    "source",
]
CRITERIA_TABLE_COLUMNS = [
    "criteria",
    "criteria_version",
    "column_prefix",
    "criteria_citation",
    "item",
    "parameter",
    "nerve",
    "lff_hz",
    "derived_lff_hz",
    "comparator",
    "reference",
    "value",
    "unit",
    "excluded_nerves",
    "description",
    "status",
    "source",
]
# The unit of each limit parameter (amplitude: mV for motor, µV for sensory nerve tests).
LIMIT_UNITS = {
    "distal_latency_ms": "ms",
    "cv_ms": "m/s",
    "f_latency_ms": "ms",
    "peak_latency_ms": "ms",
    "distal_duration_ms": "ms",
}
# What the criteria table's comparator and reference codes mean (written into the export's dictionary).
CRITERIA_TABLE_WORDS = (
    "comparator: ge ≥, gt >, le ≤, lt < (the measured value against the threshold); reference: uln or "
    "lln — value is a factor of that normal limit of the limits table (e.g. 1.5 × ULN), percent or "
    "absolute — value is the threshold itself; lff_hz: the row applies only to that low-frequency filter "
    "setting (Hz); derived_lff_hz: the filter setting a fixed cut-off was derived at; nerve '*': every nerve "
    "not named in another row of the item"
)


def limits_table(name: str, version: int, limits: pd.DataFrame) -> pd.DataFrame:
    """Every row of the normal-limit set ``name`` version ``version`` (the frame the criteria used)."""
    frame = limits.copy()
    frame["limit_set"] = name
    frame["limit_set_version"] = version
    amplitude_unit = frame["modality"].map({"motor": "mV", "sensory": "µV"})
    amplitude_unit = amplitude_unit.where(frame["parameter"] == "amplitude")
    frame["unit"] = frame["parameter"].map(LIMIT_UNITS).fillna(amplitude_unit)
    strata = ["age_min", "age_max", "height_min_cm", "height_max_cm", "sex"]
    frame = frame.sort_values(
        ["nerve", "modality", "parameter", "bound", *strata], kind="stable", na_position="first"
    )
    return _text_table(frame[LIMIT_TABLE_COLUMNS])


def criteria_table(sets: list[tuple[str, str, str | None]]) -> pd.DataFrame:
    """Every threshold of each criteria set in ``sets`` ((id, version, column prefix or None)), then the limb
    temperature minimums."""
    known = citations()
    rows = []
    for criteria_id, version, prefix in sets:
        key = (
            criteria_id if criteria_id in known else next((k for k in known if criteria_id.startswith(k)), "")
        )
        citation = known[key].text() if key else ""
        for row in thresholds.load(criteria_id).rows:
            rows.append(
                {
                    "criteria": criteria_id,
                    "criteria_version": version,
                    "column_prefix": prefix or "",
                    "criteria_citation": citation,
                    "item": row.item,
                    "parameter": row.parameter,
                    "nerve": row.nerve,
                    "lff_hz": row.lff_hz,
                    "derived_lff_hz": row.derived_lff_hz,
                    "comparator": row.comparator,
                    "reference": row.reference,
                    "value": row.value,
                    "unit": row.unit,
                    "excluded_nerves": "|".join(row.excluded_nerves),
                    "description": row.description,
                    "status": row.status,
                    "source": row.source,
                }
            )
    for limb, (minimum, status, source) in sorted(temperature_minimums().items()):
        site = TEMPERATURE_SITES.get(limb, "")
        rows.append(
            {
                "criteria": TEMPERATURE_ROWS,
                "item": f"{limb}_limb_minimum",
                "parameter": "temperature_c",
                "nerve": f"* ({limb} limb)",
                "comparator": "lt",
                "reference": "absolute",
                "value": minimum,
                "unit": "°C",
                "description": (
                    f"{limb} limb colder than {minimum:g} °C{f' at the {site}' if site else ''}: cold_limb "
                    "is true; with the cold-limbs setting 'exclude' the nerve's findings are not evaluable, "
                    "with 'warn' they are judged and warned about (no correction is applied)"
                ),
                "status": status,
                "source": source,
            }
        )
    frame = pd.DataFrame(rows, columns=CRITERIA_TABLE_COLUMNS)
    return _text_table(frame)


def _text_table(frame: pd.DataFrame) -> pd.DataFrame:
    """Every cell as text (numbers as the shortest exact decimal, missing values empty): the same bytes on
    every backend and platform."""
    out = {}
    for column in frame.columns:
        out[column] = [_cell(v) for v in frame[column]]
    return pd.DataFrame(out, columns=list(frame.columns), dtype=object)


def _cell(value: object) -> str:
    if value is None or (isinstance(value, float) and value != value) or value is pd.NA:
        return ""
    if isinstance(value, float):
        return f"{value:g}" if float(f"{value:g}") == value else repr(value)
    return str(value)
