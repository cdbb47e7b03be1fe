"""The columns of each research-export level: name, type, unit, meaning, derivation, and what they depend on.

One list of :class:`Column` per export drives everything downstream: the order and types of the
DataFrames, the Parquet schema, and the data dictionary written beside every export. Columns are fixed
before the first row is read, so that every chunk of a large export has the same shape.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass

import pandas as pd
import pyarrow as pa

from tracker.domain.plausibility import scales
from tracker.response.scales import ScaleInfo

# Kind of a column → pandas dtype and Parquet type. Dates are plain ``datetime.date`` objects in pandas.
# Whole numbers (counts, days, ages) are nullable integers in every format: pandas Int64, Parquet int32 (the
# Parquet file carries pandas' own schema note, so that pandas reads them back as Int64, not as float64).
# "category" columns are pandas Categoricals and Parquet dictionaries of strings, ordered where the column's
# values form a scale (see :class:`Column`).
PANDAS_DTYPES: dict[str, object] = {
    "text": "str",
    "float": "float64",
    "int": "Int64",
    "bool": "boolean",
    "date": object,
}
ARROW_TYPES = {
    "text": pa.string(),
    "float": pa.float64(),
    "int": pa.int32(),
    "bool": pa.bool_(),
    "date": pa.date32(),
}
TYPE_WORDS = {
    "text": "text",
    "float": "decimal number",
    "int": "whole number",
    "bool": "true/false",
    "date": "date (YYYY-MM-DD)",
    "category": "category",
}

# Scores are looked for on the visit date, else the nearest date within this many days (earlier on a tie).
SCORE_WINDOW_DAYS = 30
# The response columns read a score on the visit date, else the latest within this many days before it and
# after the patient's previous visit (never after the visit: a judgement on the visit day cannot see later
# scores; never one score at two visits, so that changes from the previous visit are not counted twice).
RESPONSE_SCORE_DAYS = SCORE_WINDOW_DAYS


@dataclass(frozen=True)
class Column:
    """One exported column; ``unit`` is empty for words and counts, ``depends_on`` for plain data.

    A ``category`` column holds one of ``categories``; with ``ordered`` they are a scale, lowest first.
    """

    name: str
    kind: str
    unit: str
    meaning: str
    derivation: str
    depends_on: str = ""
    categories: tuple[str, ...] = ()
    ordered: bool = False

    @property
    def pandas_dtype(self) -> object:
        """The pandas dtype of this column in :func:`export_frame` and when read back from Parquet."""
        if self.kind == "category":
            return pd.CategoricalDtype(list(self.categories), ordered=self.ordered)
        return PANDAS_DTYPES[self.kind]

    @property
    def arrow_type(self) -> pa.DataType:
        """The Parquet (Arrow) type of this column."""
        if self.kind == "category":
            return pa.dictionary(pa.int8(), pa.string(), ordered=self.ordered)
        return ARROW_TYPES[self.kind]

    @property
    def values_words(self) -> str:
        """The allowed values of a category column, in order for an ordered one."""
        if self.kind != "category":
            return ""
        if self.ordered:
            return " < ".join(self.categories) + " (ordered, lowest first)"
        return ", ".join(self.categories) + " (unordered)"


# Outcome values of each criteria set (DESIGN.md §5): the data dictionary lists them, and the export refuses a
# misspelt --outcome filter. "undecided": findings not evaluable for want of data could make the set met.
OUTCOME_VALUES = {
    "efns-pns-2010-cidp": ("definite", "probable", "possible", "not_met", "undecided"),
    "ean-pns-2021-cidp": ("cidp", "possible_cidp", "not_met", "undecided"),
    "aan-1991-cidp": ("met", "not_met", "undecided"),
    "efns-pns-2010-mmn": ("definite", "probable", "not_met", "undecided"),
    "hadden-1998-gbs": ("demyelinating", "axonal", "inexcitable", "equivocal", "normal"),
    "rajabally-2015-gbs": ("demyelinating", "axonal", "inexcitable", "equivocal", "normal"),
}
UNDECIDED = "undecided"
# The outcome column's categories, lowest first, and whether they form a scale. The CIDP and MMN levels are
# ordered as the publications rank them (DESIGN.md §5: "definite", "probable", "possible" are levels of
# certainty). "undecided" is not a level (no level was reached, and missing data could still make the set
# met): it is kept out of the scale and shown by the flag column ``…__undecided``. The GBS classifications
# name subtypes (demyelinating, axonal, inexcitable, equivocal, normal), not degrees: an unordered category.
OUTCOME_CATEGORIES: dict[str, tuple[tuple[str, ...], bool]] = {
    "efns-pns-2010-cidp": (("not_met", "possible", "probable", "definite"), True),
    "ean-pns-2021-cidp": (("not_met", "possible_cidp", "cidp"), True),
    "aan-1991-cidp": (("not_met", "met"), True),
    "efns-pns-2010-mmn": (("not_met", "probable", "definite"), True),
    "hadden-1998-gbs": (("normal", "equivocal", "demyelinating", "axonal", "inexcitable"), False),
    "rajabally-2015-gbs": (("normal", "equivocal", "demyelinating", "axonal", "inexcitable"), False),
}
# Extra outcome keys whose values form a scale (lowest first); the other keys stay text.
EXTRA_KEY_CATEGORIES: dict[tuple[str, str], tuple[str, ...]] = {
    ("ean-pns-2021-cidp", "motor"): ("not_met", "weakly_supportive", "strongly_supportive"),
}


@dataclass(frozen=True)
class VerdictItem:
    """One item of a criteria set whose per-nerve verdict is exported (found by
    :func:`tracker.services.export.tables.catalogue`)."""

    criteria: str
    alias: str
    item: str
    parameter: str
    unit: str
    has_segment: bool

    @property
    def column(self) -> str:
        return f"{self.alias}__{self.item}"

    @property
    def value_column(self) -> str:
        """Nerve level: the value this item compared (items judged on a segment or path only)."""
        return f"{self.column}__value"

    @property
    def segment_column(self) -> str:
        """Nerve level: the segment or path that value came from."""
        return f"{self.column}__segment"


@dataclass(frozen=True)
class SetColumns:
    """What one criteria set contributes: its version, outcome keys and per-nerve items."""

    criteria: str
    alias: str
    version: str
    extra_keys: tuple[str, ...]
    items: tuple[VerdictItem, ...]


def criteria_alias(criteria_id: str) -> str:
    """A short column prefix: ``efns-pns-2010-cidp`` → ``efns2010_cidp`` (first word, year, last word)."""
    parts = criteria_id.split("-")
    year = next((p for p in parts if p.isdigit()), "")
    return f"{parts[0]}{year}_{parts[-1]}"


def _depends(criteria: SetColumns, limits_label: str) -> str:
    return (
        f"criteria {criteria.criteria} version {criteria.version}; normal limits {limits_label} (thresholds "
        "and limits: the criteria and limits tables of this export)"
    )


# What a response column's flag against the minimal important change depends on.
MIC_DEPENDS = "the scale's minimal important change and its source (manifest: response → scales)"


def key_columns(*, identified: bool, dates: str) -> list[Column]:
    """The columns that name the patient and the visit, first on every level."""
    columns = [
        Column(
            "export_id",
            "text",
            "",
            "pseudonymous patient id, the same on every row and level of this patient",
            "HMAC-SHA256 of the clinic's patient code keyed by this database's secret export key; first 16 "
            "hex digits. Stable across exports of one database, unlinkable across databases",
        ),
    ]
    if identified:
        columns.append(
            Column(
                "patient_code",
                "text",
                "",
                "the clinic's patient code (identified export only)",
                "stored value",
            )
        )
    columns += [
        Column(
            "visit_number",
            "int",
            "",
            "1 for the patient's first visit in the database, then 2, 3 …",
            "rank of the visit date among all the patient's visits (also those outside the filters)",
        ),
        Column(
            "days_since_first_visit",
            "int",
            "days",
            "days from the patient's first visit to this visit",
            "visit date − date of the patient's first visit in the database",
        ),
    ]
    if identified:
        columns.append(
            Column(
                "visit_date",
                "date",
                "",
                "date of the study (real date; identified export only)",
                "stored value",
            )
        )
    elif dates == "shifted":
        columns.append(
            Column(
                "visit_date_shifted",
                "date",
                "",
                "date of the study moved by the patient's secret shift",
                "visit date + a per-patient offset of 1 to 365 days earlier or later, derived from the "
                "secret export key and never written; every date of one patient moves by the same offset, so "
                "intervals between the patient's visits are kept",
            )
        )
    return columns


def visit_columns(sets: list[SetColumns], limits_label: str, *, identified: bool) -> list[Column]:
    """Columns of the ``visit`` level after the key columns."""
    columns: list[Column] = []
    if identified:
        columns += [
            Column(
                "record_number", "text", "", "hospital record number (identified export only)", "stored value"
            ),
            Column("full_name", "text", "", "patient's name (identified export only)", "stored value"),
            Column("birth_date", "date", "", "date of birth (identified export only)", "stored value"),
            Column(
                "examiner", "text", "", "who performed the study (identified export only)", "stored free text"
            ),
            Column(
                "laboratory",
                "text",
                "",
                "where the study was performed (identified export only)",
                "stored free text",
            ),
        ]
    columns += [
        Column("status", "text", "", "draft or final", "stored value"),
        Column(
            "diagnosis",
            "text",
            "",
            "working diagnosis at this visit: cidp, mmn, gbs, other",
            "the visit's diagnosis; if empty, the patient's current diagnosis",
        ),
        Column(
            "phenotype",
            "text",
            "",
            "CIDP phenotype at this visit (typical, distal, multifocal, focal, motor, sensory)",
            "the visit's phenotype; if empty, the patient's current phenotype",
        ),
        Column("sex", "text", "", "female, male or unspecified", "stored value"),
        Column(
            "age_at_visit",
            "int",
            "years",
            "age in whole years at the visit, a number; top-coded at 90 unless the export is identified: 90 "
            "means 90 or older (see age_top_coded). Until this version the column was text and showed '90+'",
            "year of the visit − year of birth (may exceed the exact age by one year); ages over 89 are "
            "aggregated into one category of 90 or older (HIPAA Safe Harbor, 45 CFR 164.514(b)(2)(i)(C))",
        ),
        Column(
            "age_top_coded",
            "bool",
            "",
            "true when age_at_visit was top-coded: the age is 90 or older and shown as 90 (never true in an "
            "identified export, which gives the age itself); empty when the age is unknown",
            "age at the visit ≥ 90 in a de-identified export",
        ),
        Column("height_cm", "float", "cm", "height at the visit", "stored value"),
        Column(
            "days_since_onset",
            "int",
            "days",
            "days from symptom onset to this visit",
            "visit date − onset date",
        ),
        Column(
            "nerve_tests", "int", "", "number of nerve tests (nerve × side × modality) at the visit", "count"
        ),
        Column(
            "nerve_tests_no_response",
            "int",
            "",
            "number of nerve tests with no recordable response at the distal site (a finding, not missing "
            "data)",
            "count of nerve tests whose site 1 has amplitude 0 and no latency",
        ),
        Column(
            "nerve_tests_f_absent",
            "int",
            "",
            "number of motor nerve tests whose F-waves were sought and none found (a finding, not missing "
            "data)",
            "count of nerve tests recorded with F-waves absent",
        ),
        Column(
            "therapy_at_visit",
            "text",
            "",
            "treatments ongoing on the visit date, '+'-joined in alphabetical order",
            "treatment periods with start date ≤ visit date ≤ end date (no end date: ongoing); notes are "
            "never exported",
        ),
        Column(
            "therapy_dose",
            "float",
            "",
            "dose per administration, when exactly one treatment is ongoing (unit in therapy_dose_unit)",
            "stored value of that treatment",
        ),
        Column(
            "therapy_dose_unit",
            "text",
            "",
            "unit of therapy_dose (e.g. g/kg)",
            "stored value of that treatment",
        ),
        Column(
            "therapy_interval_days",
            "int",
            "days",
            "days between administrations, when exactly one treatment is ongoing",
            "stored value of that treatment",
        ),
        Column(
            "therapy_days_since_start",
            "int",
            "days",
            "days from the start of the ongoing treatment to the visit (exactly one treatment ongoing)",
            "visit date − treatment start date",
        ),
    ]
    for scale in scales().values():
        columns += [
            Column(
                f"score_{scale.name}",
                "float",
                scale.unit,
                f"{scale.meaning}: the score at the visit",
                "the score of this scale dated on the visit date; otherwise the nearest one within "
                f"±{SCORE_WINDOW_DAYS} days (the earlier on a tie); empty when none",
            ),
            Column(
                f"score_{scale.name}_offset_days",
                "int",
                "days",
                f"score date − visit date of score_{scale.name}",
                "0 when scored on the visit date; negative when scored before the visit",
            ),
        ]
    for found in sets:
        columns += outcome_columns(found, limits_label)
    return columns


def outcome_columns(found: SetColumns, limits_label: str) -> list[Column]:
    """The visit-level columns of one criteria set: outcome, undecided flag and count, extra keys, rule."""
    depends = _depends(found, limits_label)
    categories, ordered = OUTCOME_CATEGORIES[found.criteria]
    levels = " < ".join(categories) if ordered else ", ".join(categories)
    has_undecided = UNDECIDED in OUTCOME_VALUES.get(found.criteria, ())
    undecided_words = (
        "; empty also when the outcome is undecided (see the __undecided column)" if has_undecided else ""
    )
    columns = [
        Column(
            f"{found.alias}__outcome",
            "category",
            "",
            f"electrodiagnostic outcome of criteria set {found.criteria}: "
            + (f"an ordered category, {levels}" if ordered else f"a category (not a scale), one of {levels}")
            + undecided_words,
            "the criteria engine over all nerve tests of the visit; empty for a visit without nerve tests. "
            + (
                "Until this version the column was text and held 'undecided' too"
                if has_undecided
                else "Until this version the column was text"
            ),
            depends,
            categories,
            ordered,
        )
    ]
    if has_undecided:
        columns += [
            Column(
                f"{found.alias}__undecided",
                "bool",
                "",
                f"{found.criteria}: true when no level was reached but findings not evaluable for want of "
                "data (a measurement not recorded) could make the set met — the outcome 'undecided', kept "
                "apart from the ordered levels; the outcome column is then empty",
                "the criteria engine; empty for a visit without nerve tests",
                depends,
            ),
            Column(
                f"{found.alias}__undecided_items",
                "int",
                "",
                f"{found.criteria}: number of findings not evaluable for want of data that could make the "
                "set met or raise the level reached (0 when the outcome is settled); they are named in the "
                "rule column",
                "the criteria engine; empty for a visit without nerve tests",
                depends,
            ),
        ]
    for key in found.extra_keys:
        scale = EXTRA_KEY_CATEGORIES.get((found.criteria, key))
        if scale:
            columns.append(
                Column(
                    f"{found.alias}__{key}",
                    "category",
                    "",
                    f"{found.criteria}: {key.replace('_', ' ')}, an ordered category: {' < '.join(scale)}",
                    "the criteria engine (extra key of the outcome). Until this version the column was text",
                    depends,
                    scale,
                    True,
                )
            )
            continue
        kind = "int" if key == "items_met" else "text"
        columns.append(
            Column(
                f"{found.alias}__{key}",
                kind,
                "",
                f"{found.criteria}: {key.replace('_', ' ')}",
                "the criteria engine (extra key of the outcome)",
                depends,
            )
        )
    columns.append(
        Column(
            f"{found.alias}__rule",
            "text",
            "",
            f"{found.criteria}: which combination rule decided the outcome",
            "the criteria engine",
            depends,
        )
    )
    return columns


# How the scales with change columns are made (as tracker.response.scales computes them).
_COMPUTED_WORDS = {
    "adjusted_incat": (
        "leg grade + max(arm grade − 1, 0) from the INCAT grades of the same day when both are recorded (an "
        "arm change between 0 and 1 is not counted: ICE, Hughes RAC et al. Lancet Neurol 2008), else the "
        "typed adjusted INCAT"
    ),
    "grip_kpa_weaker": (
        "the lower of the left and right hands' Vigorimeter grip of the same day (both needed)"
    ),
}


def response_column(rule_set_id: str) -> str:
    """``trial-aincat`` → ``response_trial_aincat``."""
    return "response_" + rule_set_id.replace("-", "_")


def response_columns(
    rules: list[tuple[str, str, str]], change_scales: list[ScaleInfo], *, identified: bool, dates: str
) -> list[Column]:
    """Visit-level columns of treatment response: the regimen running on the visit day, its
    classification by each rule set in ``rules`` ((id, version, title)), and the value and changes
    of each scale in ``change_scales``."""
    settings = "response settings as listed in the manifest (response → settings)"
    running = "the regimen running on the visit day (regimen start ≤ visit ≤ regimen end)"
    columns = [
        Column(
            "regimen_therapy",
            "text",
            "",
            f"therapy of {running}; when several run, the latest started",
            "treatment periods → regimens: one therapy at one dose and interval; a change of dose or "
            "interval starts a new regimen; a single course followed within the induction window by the same "
            "therapy is that regimen's induction (induction window: manifest, response → settings); empty "
            "when none runs",
            settings,
        ),
        Column(
            "regimen_dose",
            "float",
            "",
            "dose per administration of that regimen (unit in regimen_dose_unit)",
            "stored value of the regimen's first treatment period (the maintenance dose when it had an "
            "induction)",
        ),
        Column("regimen_dose_unit", "text", "", "unit of regimen_dose (e.g. g/kg)", "stored value"),
        Column(
            "regimen_interval_days",
            "int",
            "days",
            "days between administrations of that regimen",
            "stored value",
        ),
        Column(
            "regimen_induction",
            "bool",
            "",
            "the regimen began with a single induction course (its start is the induction's start)",
            "see regimen_therapy",
            settings,
        ),
        Column(
            "regimens_running",
            "int",
            "",
            "number of regimens running on the visit day (0 when none)",
            "count of regimens with start ≤ visit ≤ end",
            settings,
        ),
        Column(
            "regimen_start_days_since_first_visit",
            "int",
            "days",
            "start of that regimen (of its induction when it had one), in days since the patient's first "
            "visit; negative when it started before the first visit",
            "regimen start − date of the patient's first visit in the database",
            settings,
        ),
    ]
    if identified:
        columns.append(
            Column(
                "regimen_start_date",
                "date",
                "",
                "start of that regimen (real date; identified export only)",
                "see regimen_start_days_since_first_visit",
                settings,
            )
        )
    elif dates == "shifted":
        columns.append(
            Column(
                "regimen_start_date_shifted",
                "date",
                "",
                "start of that regimen moved by the patient's secret shift",
                "regimen start + the same per-patient offset as visit_date_shifted, so that "
                "visit_date_shifted − regimen_start_date_shifted = regimen_days_since_start",
                settings,
            )
        )
    columns.append(
        Column(
            "regimen_days_since_start",
            "int",
            "days",
            "days from the start of that regimen to the visit",
            "visit date − regimen start",
            settings,
        )
    )
    for rule_set_id, version, title in rules:
        columns.append(
            Column(
                response_column(rule_set_id),
                "text",
                "",
                "response of the regimen running on the visit day as judged on that day by rule set "
                f"{rule_set_id} ({title}): improved, stable, worsened or not_assessable",
                "the rule set's rules (manifest: response → rule_sets) applied at the visit date (scores "
                "after the visit are not seen). "
                "Empty when no regimen runs, or when no score of the rule set's scales is at the visit (as "
                "for the *_at_visit columns): a visit without scores is never judged stable. "
                "not_assessable: no baseline score for the regimen, or no score after it",
                f"response rule set {rule_set_id} version {version}; {settings}",
            )
        )
    for scale in change_scales:
        name, unit = scale.name, scale.unit
        mic = scale.mic_words()
        at_visit = (
            f"the score on the visit date, else the latest within {RESPONSE_SCORE_DAYS} days before it and "
            "after the patient's previous visit (one score never stands at two visits); "
            f"{_COMPUTED_WORDS.get(name, 'stored value')}; empty when none"
        )
        meets = (
            f"|change| {mic} (minimal important change: {scale.mic_source}; also in the manifest, response → "
            "scales); "
            "the sign of the change gives its direction; empty when the change is empty"
        )
        columns += [
            Column(
                f"{name}_at_visit",
                "float",
                unit,
                f"{scale.label} at the visit ({scale.direction_words})",
                at_visit,
                MIC_DEPENDS,
            ),
            Column(
                f"{name}_offset_days",
                "int",
                "days",
                f"score date − visit date of {name}_at_visit (0 or negative)",
                "see that column",
            ),
            Column(
                f"{name}_change_from_baseline",
                "float",
                unit,
                f"{name}_at_visit − the score at the baseline of the regimen running on the visit day",
                "baseline: the latest score from the regimen-start look-back up to the regimen start, else "
                "the first score within the grace days after it (look-back and grace days: manifest, "
                "response → settings); empty "
                "when no regimen runs, without a baseline, or when the baseline is the score at the visit",
                settings,
            ),
            Column(
                f"{name}_baseline_offset_days",
                "int",
                "days",
                f"regimen baseline score date − visit date of {name}",
                "see the change column",
                settings,
            ),
            Column(
                f"{name}_change_from_baseline_meets_mic",
                "bool",
                "",
                f"{name}_change_from_baseline meets the minimal important change",
                meets,
                MIC_DEPENDS,
            ),
            Column(
                f"{name}_change_from_previous",
                "float",
                unit,
                f"{name}_at_visit − the same at the patient's previous visit with such a score",
                "previous: the latest earlier visit of the patient (also outside the filters) with a score "
                "at it; empty at the first scored visit",
            ),
            Column(
                f"{name}_previous_offset_days",
                "int",
                "days",
                f"previous visit's score date − visit date of {name}",
                "see the change column",
            ),
            Column(
                f"{name}_change_from_previous_meets_mic",
                "bool",
                "",
                f"{name}_change_from_previous meets the minimal important change",
                meets,
                MIC_DEPENDS,
            ),
        ]
    return columns


def _verdict_columns(sets: list[SetColumns], limits_label: str, *, segment_only: bool) -> list[Column]:
    columns = []
    for found in sets:
        depends = _depends(found, limits_label)
        for item in found.items:
            if segment_only and not item.has_segment:
                continue
            where = (
                "on the segment or path from the distal site that the set judged for this nerve; empty on "
                "other rows"
                if segment_only
                else "for this nerve test; empty when the item does not apply to it"
            )
            columns.append(
                Column(
                    item.column,
                    "text",
                    "",
                    f"verdict of {found.criteria} item {item.item} ({item.parameter}, "
                    f"{item.unit or 'no unit'}): met, not_met, not_evaluable (want of data) or "
                    "not_applicable (exclusion, precondition, not part of the pattern)",
                    f"the criteria engine, {where}",
                    depends,
                )
            )
            if segment_only or not item.has_segment:
                continue
            # The value behind the verdict, so that a block or dispersion % needs no join with the segments.
            columns += [
                Column(
                    item.value_column,
                    "float",
                    item.unit,
                    f"the {item.parameter} that {found.criteria} item {item.item} compared for this nerve "
                    f"test ({item.unit or 'no unit'}), from the segment or path in {item.segment_column}",
                    "the criteria engine: the segment or path the item chose under the criteria settings of "
                    "the manifest (e.g. the largest reduction over the eligible paths); empty when none was "
                    "usable",
                    depends,
                ),
                Column(
                    item.segment_column,
                    "text",
                    "",
                    f"the segment (site below → site) or path from the distal site (site 1 → site) of "
                    f"{item.value_column}",
                    "site labels (site n when unlabelled)",
                    depends,
                ),
            ]
    return columns


def nerve_columns(sets: list[SetColumns], limits_label: str) -> list[Column]:
    """Columns of the ``nerve`` level after the key columns."""
    return [
        Column(
            "nerve", "text", "", "nerve (canonical name, e.g. median, ulnar, fibular, sural)", "stored value"
        ),
        Column("side", "text", "", "left or right", "stored value"),
        Column("modality", "text", "", "motor or sensory", "stored value"),
        Column("recording_site", "text", "", "muscle or skin site recorded", "stored value"),
        Column("temperature_c", "float", "°C", "limb surface temperature", "stored value"),
        Column(
            "cold_limb",
            "bool",
            "",
            "limb colder than the guideline minimum for that limb (no correction applied)",
            "temperature_c < the limb's minimum (rows 'limb-temperature' of the criteria table of this "
            "export: upper limb 33 °C at the palm, lower limb 30 °C at the external malleolus)",
            "the limb-temperature rows of the criteria table of this export",
        ),
        Column("lff_hz", "float", "Hz", "low-frequency (high-pass) filter setting", "stored value"),
        Column("distal_site", "text", "", "label of stimulation site 1 (most distal)", "stored value"),
        Column("distal_latency_ms", "float", "ms", "onset latency at site 1", "stored value of site 1"),
        Column(
            "peak_latency_ms",
            "float",
            "ms",
            "peak latency at site 1 (mostly sensory)",
            "stored value of site 1",
        ),
        Column(
            "distal_amplitude_mv",
            "float",
            "mV",
            "negative-peak CMAP amplitude at site 1 (motor tests only)",
            "stored value of site 1",
        ),
        Column(
            "distal_amplitude_uv",
            "float",
            "µV",
            "negative-peak SNAP amplitude (sensory tests only)",
            "stored value of site 1",
        ),
        Column(
            "distal_duration_ms", "float", "ms", "negative-peak duration at site 1", "stored value of site 1"
        ),
        Column(
            "distal_area_mvms", "float", "mV·ms", "negative-peak area at site 1", "stored value of site 1"
        ),
        Column(
            "no_response",
            "bool",
            "",
            "no recordable response at site 1: a finding (the response was sought and is absent), not "
            "missing data; the distal amplitude is then 0 and the distal latency empty",
            "amplitude 0 and no latency",
        ),
        Column(
            "sites_no_response",
            "int",
            "",
            "number of stimulation sites of this nerve test with no recordable response (site 1 included)",
            "count of sites with amplitude 0 and no latency",
        ),
        Column(
            "sensory_velocity_m_per_s",
            "float",
            "m/s",
            "sensory conduction velocity (sensory tests only)",
            "distance_mm / onset latency_ms of site 1, rounded to 6 decimal places",
        ),
        Column(
            "slowest_standard_velocity_m_per_s",
            "float",
            "m/s",
            "slowest motor conduction velocity over the standard forearm/leg segment(s)",
            "minimum of segment velocities of kind 'standard' (see segment_kind at the segment level)",
        ),
        Column(
            "slowest_standard_segment",
            "text",
            "",
            "the segment giving slowest_standard_velocity_m_per_s",
            "see that column",
        ),
        Column("f_latency_ms", "float", "ms", "minimal F-wave latency", "stored value"),
        Column(
            "f_absent",
            "bool",
            "",
            "F-waves sought and none found: a finding, not missing data (f_latency_ms is then empty); false "
            "with an empty f_latency_ms means F-waves not recorded",
            "stored value",
        ),
        Column("f_persistence_pct", "float", "%", "share of stimuli followed by an F-wave", "stored value"),
        Column(
            "wrist_entrapment",
            "bool",
            "",
            "median only: clinician judged the distal latency explained by neuropathy at the wrist",
            "stored value",
        ),
        *_verdict_columns(sets, limits_label, segment_only=False),
    ]


def segment_columns(sets: list[SetColumns], limits_label: str) -> list[Column]:
    """Columns of the ``segment`` level (motor nerve tests: one row per
    proximal site) after the key columns."""
    velocity = (
        "distance_mm / (latency at this site − latency at the site below), rounded to 6 decimal places; "
        "empty unless the difference is > 0"
    )
    return [
        Column("nerve", "text", "", "nerve", "stored value"),
        Column("side", "text", "", "left or right", "stored value"),
        Column("modality", "text", "", "motor (segments are derived for motor tests)", "stored value"),
        Column(
            "site_order",
            "int",
            "",
            "number of the proximal site of the segment (2 = first segment above the distal site)",
            "stored value",
        ),
        Column(
            "segment",
            "text",
            "",
            "the segment: site below → this site",
            "site labels (site n when unlabelled)",
        ),
        Column(
            "segment_kind",
            "text",
            "",
            "standard (the forearm or leg segment: median wrist → elbow, ulnar wrist → below elbow, radial "
            "forearm → elbow, fibular ankle → below fibular head, tibial ankle → popliteal fossa), proximal "
            "(upper arm, plexus), entrapment (ulnar across the elbow, radial across the spiral groove, "
            "fibular across the fibular head) or unknown (a pair of sites the tool does not classify)",
            "the tool's segment classification by nerve and site labels; an unlabelled first segment counts "
            "as standard",
            "the segment classification (fixed by the tool version in the manifest)",
        ),
        Column(
            "long_segment",
            "bool",
            "",
            "segment counted as long for block criteria (the forearm and leg segments and the upper arm)",
            "the segment classification, as segment_kind",
            "the segment classification (fixed by the tool version in the manifest)",
        ),
        Column("path", "text", "", "the path from the distal site (site 1) to this site", "site labels"),
        Column("distance_mm", "float", "mm", "distance from the site below to this site", "stored value"),
        Column("latency_ms", "float", "ms", "onset latency at this site", "stored value"),
        Column("amplitude_mv", "float", "mV", "negative-peak CMAP amplitude at this site", "stored value"),
        Column(
            "response_absent",
            "bool",
            "",
            "no recordable response at this site: a finding (amplitude 0, latency empty), not missing data; "
            "velocity and changes over the segment are then empty or a 100 % fall",
            "amplitude 0 and no latency at this site",
        ),
        Column("duration_ms", "float", "ms", "negative-peak duration at this site", "stored value"),
        Column("area_mvms", "float", "mV·ms", "negative-peak area at this site", "stored value"),
        Column("segment_velocity_m_per_s", "float", "m/s", "conduction velocity over the segment", velocity),
        Column(
            "segment_amplitude_reduction_pct",
            "float",
            "%",
            "amplitude fall over the segment",
            "(amplitude below − amplitude here) / amplitude below × 100",
        ),
        Column(
            "segment_area_reduction_pct",
            "float",
            "%",
            "area fall over the segment",
            "(area below − area here) / area below × 100",
        ),
        Column(
            "segment_duration_increase_pct",
            "float",
            "%",
            "duration rise over the segment",
            "(duration here − duration below) / duration below × 100",
        ),
        Column(
            "amplitude_reduction_pct",
            "float",
            "%",
            "amplitude fall from the distal site to this site",
            "(amplitude at site 1 − amplitude here) / amplitude at site 1 × 100",
        ),
        Column(
            "area_reduction_pct",
            "float",
            "%",
            "area fall from the distal site to this site",
            "(area at site 1 − area here) / area at site 1 × 100",
        ),
        Column(
            "duration_increase_pct",
            "float",
            "%",
            "duration rise from the distal site to this site",
            "(duration here − duration at site 1) / duration at site 1 × 100",
        ),
        *_verdict_columns(sets, limits_label, segment_only=True),
    ]


# Long level: (quantity, source column, unit, origin); amplitude's unit depends on the modality.
SITE_QUANTITIES = [
    ("distance", "distance_mm", "mm", "measured"),
    ("onset_latency", "latency_ms", "ms", "measured"),
    ("peak_latency", "peak_latency_ms", "ms", "measured"),
    ("amplitude", "amplitude", None, "measured"),
    ("duration", "duration_ms", "ms", "measured"),
    ("area", "area_mvms", "mV·ms", "measured"),
]
NERVE_QUANTITIES = [
    ("temperature", "temperature_c", "°C", "measured"),
    ("low_frequency_filter", "lff_hz", "Hz", "measured"),
    ("f_latency", "f_latency_ms", "ms", "measured"),
    ("f_persistence", "f_persistence_pct", "%", "measured"),
    ("sensory_velocity", "sensory_cv", "m/s", "derived"),
]
PATH_QUANTITIES = [
    ("segment_velocity", "segment_velocity", "m/s", "segment"),
    ("segment_amplitude_reduction", "segment_amplitude_reduction_pct", "%", "segment"),
    ("segment_area_reduction", "segment_area_reduction_pct", "%", "segment"),
    ("segment_duration_increase", "segment_duration_increase_pct", "%", "segment"),
    ("amplitude_reduction_from_distal", "amplitude_reduction_pct", "%", "path"),
    ("area_reduction_from_distal", "area_reduction_pct", "%", "path"),
    ("duration_increase_from_distal", "duration_increase_pct", "%", "path"),
]


def long_columns() -> list[Column]:
    """Columns of the ``long`` level (one row per measured or derived quantity) after the key columns."""

    def names(spec: list[tuple]) -> str:
        return ", ".join(q[0] for q in spec)

    return [
        Column("nerve", "text", "", "nerve", "stored value"),
        Column("side", "text", "", "left or right", "stored value"),
        Column("modality", "text", "", "motor or sensory", "stored value"),
        Column(
            "site_order",
            "int",
            "",
            "stimulation site (1 = most distal); empty for nerve-level quantities",
            "stored value",
        ),
        Column(
            "segment",
            "text",
            "",
            "segment (site below → this site) of segment quantities; path from site 1 for the "
            "'from distal' ones",
            "site labels",
        ),
        Column(
            "quantity",
            "text",
            "",
            f"what the value is. Per nerve test: {names(NERVE_QUANTITIES)}; per stimulation site: "
            f"{names(SITE_QUANTITIES)}; per motor segment (site below → site): "
            f"{names(PATH_QUANTITIES[:4])}; per path from the distal site: {names(PATH_QUANTITIES[4:])}",
            "one row per non-empty value, and one per recorded absence (see response_absent)",
        ),
        Column(
            "value",
            "float",
            "",
            "the value, in the unit of the unit column; empty only on a row of a recorded absence",
            "stored value, or derived as the nerve and segment levels say",
        ),
        Column(
            "unit",
            "text",
            "",
            "unit of value (ms, mV, µV, mV·ms, mm, m/s, %, °C, Hz)",
            "by quantity and modality",
        ),
        Column("origin", "text", "", "measured (stored) or derived (computed from stored values)", ""),
        Column(
            "response_absent",
            "bool",
            "",
            "true on the rows of a recorded absence — a finding, not missing data: F-waves sought and none "
            "found (an f_latency row with an empty value, and the f_persistence row if stored), or no "
            "recordable response at a site (an onset_latency row with an empty value and the amplitude row "
            "with 0; for a sensory test also an empty sensory_velocity row). A quantity never measured has "
            "no row at all; whether a criteria item could be judged (not_evaluable) is in the nerve level",
            "stored F-waves-absent mark; amplitude 0 with no latency at the site",
        ),
    ]


def empty_frame(columns: list[Column]) -> pd.DataFrame:
    """A frame with the columns and dtypes of ``columns`` and no rows."""
    return pd.DataFrame({c.name: pd.Series([], dtype=c.pandas_dtype) for c in columns})


def conform(frame: pd.DataFrame, columns: list[Column]) -> pd.DataFrame:
    """Exactly ``columns``, in order, with their dtypes (absent columns become empty).

    A value of a category column outside its categories is a bug (it would silently become empty): refused.
    """
    data = {}
    for column in columns:
        dtype = column.pandas_dtype
        if column.name not in frame:
            data[column.name] = pd.Series([None] * len(frame), index=frame.index, dtype=dtype)
            continue
        values = frame[column.name]
        if column.kind == "date":
            values = pd.Series(
                [v if isinstance(v, dt.date) else None for v in values], index=frame.index, dtype=object
            )
        elif column.kind == "int":
            values = pd.to_numeric(values).round().astype("Int64")
        elif column.kind == "bool":
            values = values.astype("boolean")
        elif column.kind == "text":
            values = values.astype(object).where(values.notna(), None).astype("str")
        elif column.kind == "category":
            present = values.dropna()
            unknown = sorted(set(present.astype(str)) - set(column.categories))
            if unknown:
                raise ValueError(f"column {column.name}: values {unknown} are not among its categories")
            values = values.astype(object).where(values.notna(), None).astype(dtype)
        else:
            values = values.astype(dtype)
        data[column.name] = values
    return pd.DataFrame(data, index=frame.index).reset_index(drop=True)


def arrow_schema(columns: list[Column]) -> pa.Schema:
    """The Parquet schema of an export: float64 for measurements, int32 for counts, days and ages, bool for
    flags, date32 for dates, string dictionaries (ordered where the values form a scale) for categories.

    The schema carries pandas' own note of each column's dtype (the ``pandas`` metadata key, written by
    pyarrow), so that ``pandas.read_parquet`` gives nullable Int64 and boolean columns and ordered
    categoricals, exactly as :func:`export_frame`; Arrow's own schema note keeps the dictionaries' order for
    R's arrow package (ordered factors) and pyarrow.
    """
    schema = pa.schema([pa.field(c.name, c.arrow_type) for c in columns])
    typed = pa.Table.from_pandas(empty_frame(columns), schema=schema, preserve_index=False)
    return schema.with_metadata({b"pandas": typed.schema.metadata[b"pandas"]})


DICTIONARY_COLUMNS = [
    "column",
    "meaning",
    "unit",
    "type",
    "derivation",
    "depends_on",
    "pandas_dtype",
    "parquet_type",
    "values",
]
# Notes of the dictionary below its column rows (name in parentheses, then the text).
MISSING_NOTE = (
    "(absent, not measured, not evaluable)",
    "Absent is a finding: the response was sought and none was recorded — F-waves absent (f_absent, "
    "nerve_tests_f_absent) or no recordable response at a stimulation site (no_response, sites_no_response, "
    "nerve_tests_no_response, response_absent; the amplitude is 0 and the latency empty). Not measured: the "
    "value was not recorded — an empty cell with no absence flag, and no row at the long level. Not "
    "evaluable is a verdict of a criteria item: the item could not be judged for want of data (a value or "
    "a normal limit missing, or a limb too cold under the cold-limbs setting); not_applicable: the item does "
    "not apply to this nerve (a published exclusion or precondition). An empty verdict: the set has no such "
    "item for this nerve test.",
)


def dictionary_frame(
    columns: list[Column], *, caution: str, notes: list[tuple[str, str]] | None = None
) -> pd.DataFrame:
    """The data dictionary: one row per column, then the ``notes`` (name, text) and the missing-data note,
    then one row holding the clinical caution. ``pandas_dtype`` and ``parquet_type`` are the types that
    pandas and pyarrow read back from the Parquet file; ``values`` lists a category column's values."""
    rows = [
        {
            "column": c.name,
            "meaning": c.meaning,
            "unit": c.unit,
            "type": TYPE_WORDS[c.kind],
            "derivation": c.derivation,
            "depends_on": c.depends_on,
            "pandas_dtype": _pandas_words(c),
            "parquet_type": str(c.arrow_type),
            "values": c.values_words,
        }
        for c in columns
    ]
    blank = dict.fromkeys(DICTIONARY_COLUMNS, "")
    for name, text in [*(notes or []), MISSING_NOTE, ("(caution)", caution)]:
        rows.append({**blank, "column": name, "meaning": text})
    return pd.DataFrame(rows, columns=DICTIONARY_COLUMNS).astype("str")


def _pandas_words(column: Column) -> str:
    if column.kind == "category":
        return "category (ordered)" if column.ordered else "category"
    if column.kind == "date":
        return "object (datetime.date)"
    return str(column.pandas_dtype)
