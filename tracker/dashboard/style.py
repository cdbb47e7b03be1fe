"""Our look: a calm slate-and-teal scheme, and a colour-blind-safe status palette (Okabe & Ito, 2002,
"Color Universal Design") in which every status also has a word and a shape."""

from __future__ import annotations

from tracker import CAUTION
from tracker.domain.labels import STATUS_LABELS

TITLE = "ncs-tracker"
SUBTITLE = "Nerve conduction follow-up"

INK = "#1f2d3a"
ACCENT = "#0f6e74"  # deep teal: titles, the measured series
PAPER = "#f6f8f7"
GRID = "#dde3e1"

# Okabe–Ito colours; status = (word, shape, colour). Shapes are plain Unicode so they survive copy-paste.
STATUS_COLOURS = {
    "met": "#D55E00",
    "not_met": "#0072B2",
    "not_evaluable": "#6b6b6b",
    "not_applicable": "#8c8c8c",
}
STATUS = {
    key: (*STATUS_LABELS[key], colour) for key, colour in STATUS_COLOURS.items()
}  # words and shapes: labels.py

# Per-visit outcomes of a criteria set, grouped by what they mean for the clinician.
OUTCOME_GROUPS = {
    "positive": (
        (
            "definite",
            "probable",
            "possible",
            "cidp",
            "possible_cidp",
            "met",
            "demyelinating",
            "strongly_supportive",
        ),
        "▲",
        "#D55E00",
    ),
    "other finding": (
        ("axonal", "inexcitable", "equivocal", "weakly_supportive", "abnormal_1_nerve", "abnormal_2_nerves"),
        "◆",
        "#E69F00",
    ),
    "negative": (("not_met", "normal"), "○", "#0072B2"),
    "not evaluable": (("not_evaluable", "not evaluated"), "?", "#6b6b6b"),
    # Items that could make the set met lack data: its own state, never read as negative.
    "undecided": (("undecided",), "◇", "#CC79A7"),
}

# Series colours for segments within one panel (Okabe–Ito, without the status colours first).
SERIES = ["#0f6e74", "#CC79A7", "#56B4E9", "#009E73", "#7a5195", "#000000"]
LIMIT_COLOUR = "#009E73"  # normal limit: bluish green, dashed
THRESHOLD_COLOUR = "#D55E00"  # criteria threshold: vermillion, dotted
TREATMENT_FILL = "rgba(86, 180, 233, 0.16)"
# Consecutive regimens alternate two fills (sky blue, orange); each span is also labelled in words.
REGIMEN_FILLS = ("rgba(86, 180, 233, 0.16)", "rgba(230, 159, 0, 0.13)")
MIC_FILL = "rgba(0, 158, 115, 0.14)"  # the minimal-important-change band around a regimen baseline
SCORE_COLOUR = ACCENT

# Treatment response of a regimen: (shape, colour); the word comes from tracker.domain.labels.
CLASSIFICATION = {
    "improved": ("▲", "#009E73"),
    "stable": ("■", "#0072B2"),
    "worsened": ("▼", "#D55E00"),
    "not_assessable": ("?", "#6b6b6b"),
}
# A nerve value beyond the smallest detectable change since the previous study: (marker symbol, colour).
SDC_MARKERS = {"worsened": ("triangle-down-open", "#D55E00"), "improved": ("triangle-up-open", "#0072B2")}


def outcome_group(outcome: str) -> tuple[str, str, str]:
    """(group, shape, colour) of a criteria outcome value."""
    for group, (values, shape, colour) in OUTCOME_GROUPS.items():
        if outcome in values:
            return group, shape, colour
    return "other finding", "◆", "#E69F00"


def status_css(text: str) -> str:
    """Cell style for a status written as ``▲ met …`` / ``○ not met …`` / ``? not evaluable …``."""
    for word, shape, colour in STATUS.values():
        if isinstance(text, str) and text.startswith(f"{shape} {word}"):
            return f"color: {colour}; font-weight: 600"
    return ""


def status_text(status: str) -> str:
    """``▲ met`` / ``○ not met`` / ``? not evaluable``."""
    word, shape, _ = STATUS.get(status, (status, "", ""))
    return f"{shape} {word}".strip()


CSS = f"""
<style>
  .block-container {{ padding-top: 1.6rem; max-width: 1400px; }}
  h1, h2, h3 {{ color: {INK}; letter-spacing: 0.01em; }}
  .ncs-caution {{
    margin-top: 2.5rem; padding: 0.6rem 0.9rem; border-left: 4px solid {ACCENT};
    background: {PAPER}; color: {INK}; font-size: 0.85rem;
  }}
  .ncs-badge {{ display: inline-block; padding: 0.05rem 0.5rem; border-radius: 0.6rem;
    border: 1px solid {GRID}; margin-right: 0.3rem; font-size: 0.85rem; }}
</style>
"""

CAUTION_HTML = f'<div class="ncs-caution" role="note"><strong>Clinical caution.</strong> {CAUTION}</div>'
