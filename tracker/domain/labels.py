"""Words for people: labels (with units) for the identifiers of the response analysis.

Screens, text output and reports use these; JSON, exports and code keep the identifiers.
"""

from __future__ import annotations

import re

CLASSIFICATION_LABELS = {
    "improved": "improved",
    "stable": "stable",
    "worsened": "worsened (relapse or deterioration)",
    "not_assessable": "not assessable",
}
# A shape beside every word, so that no state is told by colour alone.
CLASSIFICATION_SHAPES = {"improved": "▲", "stable": "■", "worsened": "▼", "not_assessable": "?"}
COURSE_LABELS = {
    "improved": "▲ improving",
    "stable": "■ stable",
    "worsened": "▼ worsening",
    "not_assessable": "? not assessable",
}
CHANGE_VERDICT_LABELS = {
    "improved": "better, beyond the threshold",
    "worsened": "worse, beyond the threshold",
    "within_noise": "within the threshold",
    "within_threshold": "within the threshold",
    "no_threshold": "no published threshold",
    "not_comparable": "not comparable",
}
CHANGE_VERDICT_SHAPES = {
    "improved": "▲",
    "worsened": "▼",
    "within_noise": "·",
    "within_threshold": "·",
    "no_threshold": "–",
    "not_comparable": "–",
}
REFERENCE_LABELS = {
    "regimen_baseline": "since the regimen baseline",
    "previous": "since the previous visit",
    "previous = regimen_baseline": "since the previous visit (the regimen baseline)",
    "best": "since the best earlier score",
}
NERVE_PARAMETER_LABELS = {
    "distal_cmap_amplitude": ("distal CMAP amplitude", "mV"),
    "proximal_cmap_amplitude": ("proximal CMAP amplitude", "mV"),
    "distal_latency": ("distal motor latency", "ms"),
    "segment_velocity": ("motor conduction velocity", "m/s"),
    "f_latency": ("minimal F-wave latency", "ms"),
    "block_pct": ("conduction block (amplitude reduction from the distal site)", "%"),
    "snap_amplitude": ("SNAP amplitude", "µV"),
    "sensory_velocity": ("sensory conduction velocity", "m/s"),
}
SUMMARY_LABELS = {
    "mean_change_pct_proximal_cmap_amplitude": "mean change of proximally evoked CMAP amplitude (%)",
    "mean_change_pct_distal_cmap_amplitude": "mean change of distally evoked CMAP amplitude (%)",
    "changes_beyond_sdc_worse": "changes worse beyond the smallest detectable change",
    "changes_beyond_sdc_better": "changes better beyond the smallest detectable change",
}


def nerve_parameter_label(parameter: str) -> str:
    """``motor conduction velocity (m/s)``."""
    label, unit = NERVE_PARAMETER_LABELS.get(parameter, (parameter.replace("_", " "), ""))
    return f"{label} ({unit})" if unit else label


def words(identifier: str) -> str:
    """A site or segment identifier in words: ``below_fibular_head`` → ``below fibular head``."""
    return identifier.replace("_", " ")


# Short forms with units for narrow tables (terminal, report tables).
NERVE_PARAMETER_SHORT = {
    "distal_cmap_amplitude": "distal CMAP, mV",
    "proximal_cmap_amplitude": "proximal CMAP, mV",
    "distal_latency": "distal latency, ms",
    "segment_velocity": "motor CV, m/s",
    "f_latency": "F-wave latency, ms",
    "block_pct": "block, %",
    "snap_amplitude": "SNAP, µV",
    "sensory_velocity": "sensory CV, m/s",
}

# A nerve value whose change since the previous study is beyond the smallest detectable change (SDC).
SDC_STEP_LABELS = {"improved": "▲ better beyond SDC", "worsened": "▼ worse beyond SDC"}

# Short verdicts for tables whose title already says "beyond the threshold" (printable report).
CHANGE_VERDICT_SHORT = {
    "improved": "better",
    "worsened": "worse",
    "within_noise": "within",
    "within_threshold": "within",
    "no_threshold": "no threshold",
    "not_comparable": "not comparable",
}
DIAGNOSIS_LABELS = {
    "cidp": "CIDP (chronic inflammatory demyelinating polyradiculoneuropathy)",
    "mmn": "MMN (multifocal motor neuropathy)",
    "gbs": "GBS (Guillain–Barré syndrome)",
    "other": "other",
}

# Criteria sets by title (screens, text output); the ids stay in JSON and exports.
# Names of the sets as the publications call them, for sentences (check text, reports).
CRITERIA_NAMES = {
    "efns-pns-2010-cidp": "EFNS/PNS 2010 CIDP",
    "ean-pns-2021-cidp": "EAN/PNS 2021 CIDP",
    "aan-1991-cidp": "AAN 1991 CIDP research criteria",
    "efns-pns-2010-mmn": "EFNS/PNS 2010 MMN conduction block",
    "hadden-1998-gbs": "Hadden 1998 GBS classification",
    "rajabally-2015-gbs": "Rajabally 2015 GBS classification",
}
# Titles for pickers and tables, the disease first.
CRITERIA_TITLES = {
    "efns-pns-2010-cidp": "CIDP — EFNS/PNS 2010",
    "ean-pns-2021-cidp": "CIDP — EAN/PNS 2021",
    "aan-1991-cidp": "CIDP — AAN 1991",
    "efns-pns-2010-mmn": "MMN — EFNS/PNS 2010 (conduction block)",
    "hadden-1998-gbs": "GBS — Hadden 1998",
    "rajabally-2015-gbs": "GBS — Rajabally 2015",
}


def criteria_title(criteria_id: str) -> str:
    """``CIDP — EFNS/PNS 2010``; an unknown set keeps its id in words."""
    return CRITERIA_TITLES.get(criteria_id, words(str(criteria_id)))


# What a block or dispersion plot shows, by the feature actually plotted (the one the set's threshold names).
PLOTTED_FEATURE_LABELS = {
    "amplitude_reduction_pct": "Conduction block: CMAP amplitude reduction from the distal site",
    "area_reduction_pct": "Conduction block: CMAP area reduction from the distal site",
    "segment_amplitude_reduction_pct": "Conduction block: CMAP amplitude reduction over the segment",
    "segment_area_reduction_pct": "Conduction block: CMAP area reduction over the segment",
    "duration_increase_pct": "Temporal dispersion: CMAP duration increase from the distal site",
    "segment_duration_increase_pct": "Temporal dispersion: CMAP duration increase over the segment",
}
COMPARATOR_SIGNS = {"ge": "≥", "gt": ">", "le": "≤", "lt": "<"}
# A threshold line in words, by the quantity it cuts: (name of the line, what the percentage is).
THRESHOLD_KINDS = {
    "block": ("block threshold", "reduction"),
    "dispersion": ("dispersion threshold", "duration increase"),
}


def threshold_label(parameter: str, comparator: str, value: float, reference: str, unit: str = "") -> str:
    """A criteria threshold line in words: ``block threshold: ≥ 50 % reduction``, ``≤ 70 % of LLN``.

    ``reference`` as in the threshold tables: ``uln``/``lln`` (``value`` is a factor of that limit),
    ``percent`` or ``absolute`` (``value`` is the threshold itself)."""
    sign = COMPARATOR_SIGNS.get(comparator, "")
    if reference in ("uln", "lln"):
        return f"threshold: {sign} {value * 100:g} % of {reference.upper()}"
    name, quantity = THRESHOLD_KINDS.get(parameter, ("threshold", ""))
    if reference == "percent":
        return f"{name}: {sign} {value:g} % {quantity}".rstrip()
    return f"{name}: {sign} {value:g} {unit}".rstrip()


# Outcome values of the criteria sets, in words (DESIGN.md §5 lists the
# ids). An unknown value is shown in words.
OUTCOME_LABELS = {
    "definite": "definite",
    "probable": "probable",
    "possible": "possible",
    "met": "met",
    "not_met": "not met",
    "cidp": "CIDP",
    "possible_cidp": "possible CIDP",
    "strongly_supportive": "strongly supportive",
    "weakly_supportive": "weakly supportive",
    "abnormal_2_nerves": "abnormal in ≥ 2 nerves",
    "abnormal_1_nerve": "abnormal in 1 nerve",
    "normal": "normal",
    "demyelinating": "demyelinating",
    "axonal": "axonal",
    "inexcitable": "inexcitable",
    "equivocal": "equivocal",
    "not_evaluable": "not evaluable",
    "not evaluated": "not evaluated",
    "undecided": "undecided (missing data)",
}
# Item statuses of a criteria trace: (word, shape). Never a state by colour alone.
STATUS_LABELS = {
    "met": ("met", "▲"),
    "not_met": ("not met", "○"),
    "not_evaluable": ("not evaluable", "?"),
    "not_applicable": ("not applicable", "–"),
    "undecided": ("undecided (missing data)", "◇"),
}


def outcome_label(outcome: object) -> str:
    """``possible_cidp`` → ``possible CIDP``; a value this module does not know yet is shown in words."""
    text = str(outcome)
    return OUTCOME_LABELS.get(text, words(text))


def status_label(status: object) -> str:
    """``▲ met`` / ``– not applicable``; an unknown status in words with no shape."""
    word, shape = STATUS_LABELS.get(str(status), (words(str(status)), ""))
    return f"{shape} {word}".strip()


def segment_words(segment: object) -> str:
    """``wrist → below_elbow`` → ``wrist → below elbow`` (any site or segment identifier)."""
    return words(str(segment)) if isinstance(segment, str) else ""


def nerve_words(nerve: str, side: str | None = None, modality: str | None = None) -> str:
    """``superficial fibular left (sensory)``."""
    text = words(nerve) + (f" {side}" if side else "")
    return text + (f" ({modality})" if modality else "")


# Criteria items (the sets' own codes) in words, for trace tables; unknown items fall back to words().
ITEM_LABELS = {
    "dml": "distal motor latency",
    "dml_low_cmap": "distal motor latency (low CMAP)",
    "dml_switch": "low-CMAP switch (latency)",
    "cv": "motor conduction velocity",
    "cv_low_cmap": "motor conduction velocity (low CMAP)",
    "cv_switch": "low-CMAP switch (velocity)",
    "f_latency": "F-wave latency",
    "f_latency_low_cmap": "F-wave latency (low CMAP)",
    "f_switch": "low-CMAP switch (F-wave)",
    "f_absent": "F-waves absent",
    "cb": "conduction block",
    "cb_erb": "conduction block to Erb's point",
    "cb_precondition": "block precondition (distal CMAP)",
    "cb_td": "block or abnormal dispersion",
    "td": "temporal dispersion",
    "td_duration": "temporal dispersion (duration)",
    "dcmap_duration": "distal CMAP duration",
    "definite_cb": "definite conduction block",
    "probable_cb": "probable conduction block",
    "probable_cb_long": "probable block (long segment)",
    "probable_cb_dispersed": "probable block (dispersed)",
    "axonal_low_cmap": "low distal CMAP (axonal)",
    "very_low_cmap": "very low distal CMAP",
    "cmap_switch": "low-CMAP switch",
    "sensory_cv": "sensory conduction velocity",
    "sensory_cv_low_snap": "sensory conduction velocity (low SNAP)",
    "sensory_switch": "low-SNAP switch",
    "sensory_peak_latency": "sensory peak latency",
    "snap_amplitude": "SNAP amplitude",
    "snap_normal": "SNAP normal (exclusion check)",
    "snap_reduced": "SNAP reduced",
    "sural_sparing": "sural sparing",
    "sural_normal": "sural SNAP normal",
    "sensory_cidp_cv": "sensory CIDP: velocity",
    "sensory_cidp_cv_low_snap": "sensory CIDP: velocity (low SNAP)",
    "sensory_cidp_switch": "sensory CIDP: low-SNAP switch",
    "normal_cv": "velocity normal",
    "normal_dml": "distal latency normal",
    "normal_f": "F-wave normal",
    "normal_dcmap": "distal CMAP normal",
    "normal_pcmap": "proximal CMAP normal",
    "normal_ratio": "proximal/distal ratio normal",
    "one_nerve_floor": "one-nerve floor",
    "amplitude_lln": "amplitude ≥ LLN",
    "amplitude_mv": "CMAP amplitude",
    "duration_dispersed": "duration (dispersion)",
    "duration_max": "duration limit",
}


def item_label(item: object) -> str:
    return ITEM_LABELS.get(str(item), words(str(item)))


# Table headers with units, by the identifier a table column has in code.
COLUMN_LABELS = {
    "visit_date": "visit date",
    "patient": "patient",
    "diagnosis": "diagnosis",
    "phenotype": "phenotype",
    "nerve": "nerve",
    "side": "side",
    "modality": "modality",
    "site_order": "site (1 = distal)",
    "site": "site",
    "segment": "segment",
    "series": "segment or site",
    "panel": "nerve",
    "unit": "unit",
    "value": "value",
    "note": "note",
    "distance_mm": "distance (mm)",
    "latency_ms": "onset latency (ms)",
    "peak_latency_ms": "peak latency (ms)",
    "amplitude_mv": "amplitude (mV, motor)",
    "amplitude_uv": "amplitude (µV, sensory)",
    "amplitude": "amplitude",
    "duration_ms": "duration (ms)",
    "area_mvms": "area (mV·ms)",
    "temperature_c": "temperature (°C)",
    "lff_hz": "low-frequency filter (Hz)",
    "f_latency_ms": "F-wave latency (ms)",
    "f_persistence_pct": "F-wave persistence (%)",
    "recording_site": "recording site",
    "velocity_m_s": "velocity (m/s)",
    "amplitude_reduction_pct": "amplitude reduction (%)",
    "area_reduction_pct": "area reduction (%)",
    "duration_increase_pct": "duration increase (%)",
    "height_cm": "height (cm)",
    "cold": "limb cold",
    "first_visit": "first visit",
    "last_visit": "last visit",
    "current_treatment": "current treatment",
    "latest_outcome": "latest outcome",
    "latest_criteria": "judged by",
    "visits": "visits",
    "patients": "patients",
}


def column_label(column: str) -> str:
    return COLUMN_LABELS.get(column, words(column))


# Clinical precision of numbers on screens and in text output (decimals), by quantity.
PRECISION = {"m/s": 1, "ms": 2, "mV": 1, "µV": 1, "%": 1, "mm": 0, "°C": 1, "mV·ms": 1}


def clinical_number(value: float | None, unit: str, missing: str = "—") -> str:
    """``31.9`` (m/s), ``7.05`` (ms): one decimal for velocities and amplitudes, two for latencies."""
    if value is None or value != value:
        return missing
    return f"{float(value):.{PRECISION.get(unit, 2)}f}"


THERAPY_LABELS = {
    "ivig": "IVIg",
    "scig": "SCIg",
    "corticosteroid": "corticosteroid",
    "plasma_exchange": "plasma exchange",
    "rituximab": "rituximab",
    "efgartigimod": "efgartigimod",
    "other": "other",
}


def therapy_label(therapy: str) -> str:
    return THERAPY_LABELS.get(therapy, words(therapy))


DIAGNOSIS_SHORT = {"cidp": "CIDP", "mmn": "MMN", "gbs": "GBS", "other": "other"}


def treatment_words(
    therapy: str, dose: float | None, dose_unit: str | None, interval_days: float | None
) -> str:
    """``ivig 2 g/kg every 21 days``, ``corticosteroid 40 mg daily`` — the words a clinician would write (a
    missing dose, unit or interval is left out)."""
    text = therapy.replace("_", " ")
    if dose is not None and dose == dose:
        text += f" {dose:g}" + (f" {dose_unit}" if isinstance(dose_unit, str) and dose_unit else "")
    if interval_days is not None and interval_days == interval_days:
        text += " daily" if int(interval_days) == 1 else f" every {int(interval_days)} days"
    return text


# Settings of the criteria engine (tracker/criteria/model.py Settings) and their values, in words for the
# check text; JSON keeps the identifiers.
SETTING_LABELS = {
    "cold_limbs": "cold limbs",
    "sides_are_separate_nerves": "left and right count as separate nerves",
    "cv_segments": "velocity segments",
    "block_path": "block measured",
    "aan_wrist_exclusion": "AAN wrist exclusion",
    "duration_filter_strict": "2010 duration cut-offs only at their own filter",
}
SETTING_VALUE_LABELS = {
    "warn": "values kept, with a warning",
    "exclude": "the nerve excluded",
    "standard": "the standard segment",
    "all_outside_entrapment": "every segment outside entrapment sites",
    "outside_entrapment": "over every path outside entrapment sites",
}
# Extra keys of a criteria outcome (DESIGN.md §5), e.g. the EAN/PNS 2021 motor and sensory parts.
OUTCOME_KEY_LABELS = {
    "motor": "motor",
    "sensory": "sensory",
    "sensory_supportive": "sensory supportive",
    "items_met": "items met",
}


def setting_words(name: str, value: object) -> str:
    """``AAN wrist exclusion: off`` — a criteria setting and its value in words."""
    shown = (
        ("on" if value else "off")
        if isinstance(value, bool)
        else SETTING_VALUE_LABELS.get(str(value), words(str(value)))
    )
    return f"{SETTING_LABELS.get(name, words(name))}: {shown}"


def settings_in_words(settings: object) -> str:
    """``cold limbs: values kept, with a warning; …`` — every field of a criteria settings dataclass."""
    import dataclasses

    return "; ".join(setting_words(f.name, getattr(settings, f.name)) for f in dataclasses.fields(settings))


def identifiers_in_words(text: object) -> str:
    """Free text that may hold identifiers (a site, an item, an outcome, a setting), each put in words:
    ``wrist → below_elbow`` → ``wrist → below elbow``; ``not_met`` → ``not met``."""

    def one(match: re.Match) -> str:
        token = match.group(0)
        for table in (OUTCOME_LABELS, ITEM_LABELS, SETTING_LABELS, OUTCOME_KEY_LABELS):
            if token in table:
                return table[token]
        return words(token)

    return re.sub(r"\b[A-Za-z0-9]+(?:_[A-Za-z0-9]+)+\b", one, str(text))


# The audit trail in words (``ncs-tracker audit``, the Audit trail page).
AUDIT_ACTION_LABELS = {
    "import_measurements": "imported a measurements file",
    "import_treatments": "imported a treatments file",
    "import_scores": "imported a scores file",
    "replace_visit": "replaced a visit's values",
    "replace_treatment": "replaced a treatment period",
    "replace_score": "replaced a score",
    "update_patient": "changed a patient's details",
    "set_clinician_inputs": "changed a visit's clinician inputs",
    "save_evaluations": "saved criteria evaluations",
    "save_response": "saved a treatment-response classification",
    "import_limits": "imported a normal-limit set",
    "choose_default_limits": "chose the default normal limits",
    "set": "changed a setting",
    "export": "wrote a de-identified export",
    "export_identified": "wrote an IDENTIFIED export",
    "init_first_admin": "created the first administrator",
    "add": "added an account",
    "change": "changed an account",
    "deactivate": "deactivated an account",
    "set_password": "set a password",
    "sign_in": "signed in",
    "sign_in_refused": "was refused sign-in",
    "backup": "made a backup",
    "restore": "restored a backup",
}


def audit_change_words(before: dict | None, after: dict | None) -> str:
    """``role: viewer → admin; active: yes`` — what an audit event changed, field by field."""

    def shown(value: object) -> str:
        if isinstance(value, bool):
            return "yes" if value else "no"
        if value is None:
            return "(none)"
        if isinstance(value, list):
            return ", ".join(shown(v) for v in value) or "(none)"
        if isinstance(value, dict):
            return "; ".join(f"{words(str(k))} {shown(v)}" for k, v in value.items())
        return identifiers_in_words(value)

    before, after = before or {}, after or {}
    parts = []
    for key in list(dict.fromkeys([*before, *after])):
        label = words(key)
        if key in before and key in after:
            if before[key] == after[key]:
                parts.append(f"{label}: {shown(after[key])} (unchanged)")
                continue
            parts.append(f"{label}: {shown(before[key])} → {shown(after[key])}")
        elif key in after:
            parts.append(f"{label}: {shown(after[key])}")
        else:
            parts.append(f"{label}: {shown(before[key])} → (removed)")
    return "; ".join(parts)


# Switches of the Settings page for project rules that change a publication's literal result
# (tracker/criteria/README.md): Settings field → (switch label, one-line explanation). Off = the publication.
CRITERIA_SWITCH_LABELS = {
    "aan_wrist_exclusion": (
        "AAN 1991: leave out a median distal latency marked as wrist entrapment",
        "Off, the publication's reading: the AAN 1991 text has no such exclusion, so the latency counts.",
    ),
    "duration_filter_strict": (
        "EFNS/PNS 2010: distal CMAP duration not evaluable with another low-frequency filter",
        "Off, the publication's reading: judged with a warning (cut-offs derived at 20 Hz, from memory, not "
        "verified).",
    ),
}
