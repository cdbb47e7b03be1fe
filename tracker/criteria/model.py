"""Statuses, settings and the shape of a criteria result."""

from __future__ import annotations

from dataclasses import dataclass, field

import pandas as pd

MET, NOT_MET, NOT_EVALUABLE = "met", "not_met", "not_evaluable"
# The item does not apply to this nerve (published exclusion or precondition, entrapment segment, not part
# of the pattern, no recordable response): not want of data, so it never leaves an outcome undecided.
NOT_APPLICABLE = "not_applicable"
STATUSES = (MET, NOT_MET, NOT_EVALUABLE, NOT_APPLICABLE)
# Outcome of a CIDP or MMN set when findings not evaluable for want of data could make it met.
UNDECIDED = "undecided"

# Columns of a findings table (one row per nerve × parameter × criteria item).
FINDING_COLUMNS = [
    "visit_key",
    "criteria",
    "nerve",
    "side",
    "modality",
    "item",
    "parameter",
    "segment",
    "value",
    "unit",
    "limit",
    "limit_name",
    "threshold",
    "comparator",
    "status",
    "reason",
    "source",
    "source_status",
    "limit_source",
    "limit_status",
    "margin",
]


@dataclass(frozen=True)
class Settings:
    """Choices where clinicians differ (see ``tracker/criteria/README.md``).

    ``cold_limbs``: ``"warn"`` keeps values from limbs colder than the guideline minimum and warns;
    ``"exclude"`` makes that nerve's findings not evaluable.
    ``sides_are_separate_nerves``: left and right of one nerve count as two nerves.
    ``cv_segments``: ``"standard"`` uses the forearm/leg segment only for conduction velocity;
    ``"all_outside_entrapment"`` also uses proximal segments (with the same lower limit).
    ``block_path``: ``"outside_entrapment"`` measures block from the distal site to every proximal site
    whose path avoids entrapment segments; ``"standard"`` uses the forearm/leg segment only.
    ``aan_wrist_exclusion``: the clinician's wrist-entrapment mark removes the median distal latency from AAN
    1991 item 3 (a project rule: the AAN 1991 text has no such exclusion, so the default is off — the
    publication's literal reading; the trace says which applied).
    ``duration_filter_strict``: a fixed distal CMAP duration cut-off derived at one low-frequency filter
    setting (EFNS/PNS 2010, and Rajabally 2015 which adopts it) is not evaluable when the nerve test was
    recorded with another filter or without a recorded filter (a project rule; the publication gives one set
    of cut-offs, so the default is off: the item is judged and the trace warns).
    """

    cold_limbs: str = "warn"
    sides_are_separate_nerves: bool = True
    cv_segments: str = "standard"
    block_path: str = "outside_entrapment"
    aan_wrist_exclusion: bool = False
    duration_filter_strict: bool = False

    def __post_init__(self) -> None:
        checks = {
            "cold_limbs": ("warn", "exclude"),
            "cv_segments": ("standard", "all_outside_entrapment"),
            "block_path": ("outside_entrapment", "standard"),
        }
        for name, allowed in checks.items():
            if getattr(self, name) not in allowed:
                raise ValueError(
                    f"Invalid value for '{name}'. Allowed values are {allowed}, but got "
                    f"{getattr(self, name)!r}."
                )


@dataclass
class SetResult:
    """The result of one criteria set over many visits.

    ``findings``: per-nerve findings (``FINDING_COLUMNS``). ``outcomes``: one row per visit with column
    ``outcome`` and any extra keys of that set (e.g. ``motor``, ``sensory``, ``items_met``) and ``rule``
    (which combination rule decided the outcome); the CIDP and MMN sets add ``undecided_items``: per visit a
    tuple of the findings not evaluable for want of data that could make the set met or raise its level
    (plain dicts: nerve, side, modality, item, parameter, segment, reason), empty when the outcome is settled.
    """

    criteria: str
    version: str
    findings: pd.DataFrame
    outcomes: pd.DataFrame
    extra_keys: tuple[str, ...] = field(default_factory=tuple)
    # Items that can change the outcome (the closest miss looks at these only); empty = every item.
    outcome_items: tuple[str, ...] = field(default_factory=tuple)
