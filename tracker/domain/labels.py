"""Words for people: labels (with units) for the identifiers of the response analysis.

Screens, text output and reports use these; JSON, exports and code keep the identifiers.
"""

from __future__ import annotations

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
CHANGE_VERDICT_SHAPES = {"improved": "▲", "worsened": "▼", "within_noise": "·", "within_threshold": "·", "no_threshold": "–", "not_comparable": "–"}
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
REFERENCE_SHORT = {"regimen_baseline": "regimen baseline", "previous": "previous visit",
                   "previous = regimen_baseline": "previous visit (= baseline)", "best": "best earlier"}

# A nerve value whose change since the previous study is beyond the smallest detectable change (SDC).
SDC_STEP_LABELS = {"improved": "▲ better beyond SDC", "worsened": "▼ worse beyond SDC"}

# Short verdicts for tables whose title already says "beyond the threshold" (printable report).
CHANGE_VERDICT_SHORT = {"improved": "better", "worsened": "worse", "within_noise": "within", "within_threshold": "within",
                        "no_threshold": "no threshold", "not_comparable": "not comparable"}
DIAGNOSIS_LABELS = {
    "cidp": "CIDP (chronic inflammatory demyelinating polyradiculoneuropathy)",
    "mmn": "MMN (multifocal motor neuropathy)",
    "gbs": "GBS (Guillain–Barré syndrome)",
    "other": "other",
}

# Criteria sets by title (screens, text output); the ids stay in JSON and exports.
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
THRESHOLD_KINDS = {"block": ("block threshold", "reduction"), "dispersion": ("dispersion threshold", "duration increase")}


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
