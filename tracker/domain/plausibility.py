"""Plausibility ranges and outcome-scale ranges, read from ``tracker/reference/*.csv`` (each row sourced)."""

from __future__ import annotations

from dataclasses import dataclass
from functools import cache

import numpy as np

from tracker.domain.reference_files import read_reference_csv


@dataclass(frozen=True, slots=True)
class Range:
    """An allowed range of one quantity. ``overridable`` ranges may be waived with ``--allow-unusual``."""

    quantity: str
    unit: str
    lower: float
    lower_inclusive: bool
    upper: float
    upper_inclusive: bool
    overridable: bool
    source: str

    def describe(self) -> str:
        low = "≥" if self.lower_inclusive else ">"
        high = "≤" if self.upper_inclusive else "<"
        return f"{low} {self.lower:g} and {high} {self.upper:g} {self.unit}"

    def outside(self, values: np.ndarray) -> np.ndarray:
        """Boolean mask of values outside the range (NaN is never outside: missing is checked elsewhere)."""
        v = np.asarray(values, dtype=float)
        with np.errstate(invalid="ignore"):
            too_low = v < self.lower if self.lower_inclusive else v <= self.lower
            too_high = v > self.upper if self.upper_inclusive else v >= self.upper
        return (too_low | too_high) & ~np.isnan(v)


@dataclass(frozen=True, slots=True)
class Scale:
    name: str
    unit: str
    minimum: float
    maximum: float
    integer: bool
    meaning: str
    source: str


@cache
def ranges() -> dict[str, Range]:
    return {
        row["quantity"]: Range(
            quantity=row["quantity"],
            unit=row["unit"],
            lower=float(row["lower"]),
            lower_inclusive=row["lower_op"] == "ge",
            upper=float(row["upper"]),
            upper_inclusive=row["upper_op"] == "le",
            overridable=row["overridable"] == "yes",
            source=row["source"],
        )
        for row in read_reference_csv("plausibility.csv")
    }


@cache
def scales() -> dict[str, Scale]:
    return {
        row["scale"]: Scale(
            name=row["scale"],
            unit=row["unit"],
            minimum=float(row["minimum"]),
            maximum=float(row["maximum"]),
            integer=row["integer"] == "yes",
            meaning=row["meaning"],
            source=row["source"],
        )
        for row in read_reference_csv("scales.csv")
        # Computed-only scales (e.g. the weaker hand's grip) are never typed into a scores file.
        if row.get("importable", "yes") == "yes"
    }
