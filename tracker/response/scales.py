"""Outcome scales as reference data (``tracker/reference/scales.csv``) and the scales computed from others.

Computed, never typed over:
- ``incat`` = arm grade + leg grade, when both grades are recorded on the day and no total was typed;
- ``adjusted_incat`` = leg grade + max(arm grade − 1, 0), 0–9: an arm change between 0 and 1 is not
  counted, an arm change from 1 to 2 counts one point (ICE, Hughes RAC et al. Lancet Neurol 2008); when the
  grades are recorded this replaces a typed adjusted INCAT of the same day;
- ``grip_kpa_weaker`` = the lower of the two hands' Vigorimeter grip on the day (kPa).
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cache

import numpy as np
import pandas as pd

from tracker.domain.reference_files import read_reference_csv

SCORE_COLUMNS = ["patient", "date", "scale", "value", "computed"]


@dataclass(frozen=True)
class ScaleInfo:
    """One outcome scale. ``mic``: minimal important change (in ``unit``, or % of the
    earlier value when ``mic_kind`` is ``percent``), met when ``|change| mic_comparator
    mic``; ``None`` when none is published."""

    name: str
    label: str
    unit: str
    minimum: float
    maximum: float
    integer: bool
    higher_is_better: bool
    importable: bool
    computed_from: str
    mic: float | None
    mic_comparator: str | None
    mic_kind: str
    mic_source: str
    mic_status: str
    source: str
    status: str

    @property
    def direction_words(self) -> str:
        return "higher is better" if self.higher_is_better else "higher is worse"

    def label_with_unit(self) -> str:
        """``grip strength, left hand (kPa)``."""
        return f"{self.label} ({self.unit})"

    def mic_words(self) -> str:
        """``≥ 1 point`` — the minimal important change as the source states it."""
        if self.mic is None:
            return "no published minimal important change"
        unit = (
            "%"
            if self.mic_kind == "percent"
            else f" {'point' if self.unit == 'points' and self.mic == 1 else self.unit}"
        )
        return f"{_SYMBOL[self.mic_comparator or '>=']} {self.mic:g}{unit}"


_SYMBOL = {">=": "≥", ">": ">"}


@cache
def scale_table() -> dict[str, ScaleInfo]:
    """Every scale of ``scales.csv`` by name (computed ones included)."""
    out = {}
    for row in read_reference_csv("scales.csv"):
        out[row["scale"]] = ScaleInfo(
            name=row["scale"],
            label=row["label"],
            unit=row["unit"],
            minimum=float(row["minimum"]),
            maximum=float(row["maximum"]),
            integer=row["integer"] == "yes",
            higher_is_better=row["direction"] == "higher_better",
            importable=row["importable"] == "yes",
            computed_from=row["computed_from"],
            mic=float(row["mic"]) if row["mic"] else None,
            mic_comparator=row["mic_comparator"] or None,
            mic_kind=row["mic_kind"] or "absolute",
            mic_source=row["mic_source"],
            mic_status=row["mic_status"],
            source=row["source"],
            status=row["status"],
        )
    return out


def with_computed(scores: pd.DataFrame) -> tuple[pd.DataFrame, list[str]]:
    """Recorded scores plus the computed ones (``computed`` True), sorted by patient, scale, date; and notes
    in words where a typed value disagrees with the grades it should equal.

    ``scores``: columns ``patient``, ``date``, ``scale``, ``value`` (any number of patients).
    """
    base = scores[["patient", "date", "scale", "value"]].copy()
    base["value"] = base["value"].astype(float)
    base["computed"] = False
    notes: list[str] = []
    if base.empty:
        return base.reindex(columns=SCORE_COLUMNS), notes
    wide = base.pivot_table(index=["patient", "date"], columns="scale", values="value", aggfunc="first")
    for name in ("incat", "incat_arm", "incat_leg", "adjusted_incat", "grip_kpa_left", "grip_kpa_right"):
        if name not in wide.columns:
            wide[name] = np.nan
    arm, leg = wide["incat_arm"], wide["incat_leg"]
    graded = arm.notna() & leg.notna()
    made: list[pd.DataFrame] = []

    total = arm + leg
    disagree = graded & wide["incat"].notna() & (wide["incat"] != total)
    for (patient, date), typed, computed in zip(
        wide.index[disagree], wide["incat"][disagree], total[disagree]
    ):
        notes.append(
            f"{patient} {date}: typed INCAT {typed:g} differs from arm + leg grades {computed:g}; the typed "
            "total is kept"
        )
    made.append(_rows(total[graded & wide["incat"].isna()], "incat"))

    adjusted = leg + np.maximum(arm - 1, 0)
    typed_adjusted = graded & wide["adjusted_incat"].notna()
    for (patient, date), typed, computed in zip(
        wide.index[typed_adjusted], wide["adjusted_incat"][typed_adjusted], adjusted[typed_adjusted]
    ):
        if typed != computed:
            notes.append(
                f"{patient} {date}: typed adjusted INCAT {typed:g} replaced by {computed:g} computed from "
                "the grades"
            )
    made.append(_rows(adjusted[graded], "adjusted_incat"))

    weaker = np.fmin(wide["grip_kpa_left"], wide["grip_kpa_right"])
    both = wide["grip_kpa_left"].notna() & wide["grip_kpa_right"].notna()
    made.append(_rows(weaker[both], "grip_kpa_weaker"))

    # A computed adjusted INCAT replaces a typed one of the same day (the grades are the primary record).
    drop = set(
        zip(wide.index[typed_adjusted].get_level_values(0), wide.index[typed_adjusted].get_level_values(1))
    )
    if drop:
        keys = list(zip(base["patient"], base["date"]))
        keep = [not (scale == "adjusted_incat" and key in drop) for scale, key in zip(base["scale"], keys)]
        base = base[keep]
    out = pd.concat([base, *[m for m in made if not m.empty]], ignore_index=True)
    out = out.sort_values(["patient", "scale", "date"], kind="stable").reset_index(drop=True)
    return out[SCORE_COLUMNS], notes


def _rows(series: pd.Series, scale: str) -> pd.DataFrame:
    if series.empty:
        return pd.DataFrame(columns=SCORE_COLUMNS)
    frame = series.rename("value").reset_index()
    frame["scale"] = scale
    frame["computed"] = True
    return frame[SCORE_COLUMNS]
