"""Smallest detectable change of each nerve conduction parameter (``tracker/reference/reproducibility.csv``),
replaceable by a laboratory's own reproducibility figures (same columns; ``sdc_pct`` or ``cov_pct``).

SDC (95 %, one person) = 1.96 × √2 × SEM ≈ 2.77 × between-session CoV when the CoV is read as the
within-subject SD relative to the mean (normatives.md §3.1, derived).
"""

from __future__ import annotations

import csv
import io
from dataclasses import dataclass
from functools import cache
from pathlib import Path

from tracker.domain.reference_files import read_reference_csv
from tracker.errors import InputRejected, Problem

SDC_FACTOR = (
    2.77  # 1.96 × √2 rounded as normatives.md §3.1 states it; the shipped sdc_pct column uses the same factor
)
PARAMETERS = (
    "distal_cmap_amplitude",
    "proximal_cmap_amplitude",
    "distal_latency",
    "segment_velocity",
    "f_latency",
    "sensory_velocity",
    "snap_amplitude",
    "block_pct",
)


@dataclass(frozen=True)
class Detectable:
    """The smallest detectable change of one parameter: ``sdc`` in % of the earlier value
    (``change_kind`` ``percent``) or in the parameter's own unit (``points``, e.g. percentage
    points of block); None = no figure."""

    parameter: str
    label: str
    unit: str
    higher_is_better: bool
    cov_pct: float | None
    sdc: float | None
    change_kind: str
    source: str
    status: str


@cache
def shipped() -> dict[str, Detectable]:
    return _parse(read_reference_csv("reproducibility.csv"), "reproducibility.csv")


def from_file(path: Path) -> dict[str, Detectable]:
    """A laboratory's own figures over the shipped ones (parameters it does not list keep the shipped row)."""
    try:
        text = path.read_text(encoding="utf-8-sig")
    except UnicodeDecodeError:
        raise InputRejected(f"{path.name} is not UTF-8 text", []) from None
    rows = list(csv.DictReader(io.StringIO(text)))
    table = dict(shipped())
    table.update(_parse(rows, path.name, base=table))
    return table


def _parse(
    rows: list[dict[str, str]], name: str, base: dict[str, Detectable] | None = None
) -> dict[str, Detectable]:
    problems: list[Problem] = []
    out: dict[str, Detectable] = {}
    for number, row in enumerate(rows, start=2):
        row = {(k or "").strip().lower(): (v or "").strip() for k, v in row.items()}
        parameter = row.get("parameter", "")
        if parameter not in PARAMETERS:
            problems.append(
                Problem(number, "parameter", parameter, f"expected one of {', '.join(PARAMETERS)}")
            )
            continue
        known = (base or {}).get(parameter)
        cov = _number(row.get("cov_pct", ""), number, "cov_pct", problems)
        sdc = _number(row.get("sdc_pct", ""), number, "sdc_pct", problems)
        if sdc is None and cov is not None:
            sdc = round(SDC_FACTOR * cov, 1)
        if base is not None and sdc is None:
            problems.append(
                Problem(
                    number,
                    "sdc_pct",
                    "",
                    "give sdc_pct or cov_pct (a row without a figure would remove the shipped one)",
                )
            )
        better = row.get("better", "").lower()
        if better and better not in ("higher", "lower"):
            problems.append(Problem(number, "better", row.get("better"), "expected higher or lower"))
        if known is not None and better and (better == "higher") != known.higher_is_better:
            problems.append(
                Problem(
                    number,
                    "better",
                    row.get("better"),
                    f"the direction of {parameter} is fixed "
                    f"({'higher' if known.higher_is_better else 'lower'} is better)",
                )
            )
        kind = row.get("change_kind", "").lower()
        if kind and kind not in ("percent", "points"):
            problems.append(
                Problem(number, "change_kind", row.get("change_kind"), "expected percent or points")
            )
        source = row.get("source", "")
        if base is not None and not source:
            problems.append(
                Problem(
                    number,
                    "source",
                    "",
                    "every laboratory figure needs its source (a study, or 'our laboratory, <date>')",
                )
            )
        out[parameter] = Detectable(
            parameter=parameter,
            label=row.get("label") or (known.label if known else parameter),
            unit=row.get("unit") or (known.unit if known else ""),
            higher_is_better=(better or ("higher" if known is None or known.higher_is_better else "lower"))
            == "higher",
            cov_pct=cov,
            sdc=sdc,
            change_kind=kind or (known.change_kind if known else "percent"),
            source=source,
            status=row.get("status") or "laboratory",
        )
    if problems:
        raise InputRejected(f"The reproducibility file {name} was refused", problems)
    return out


def _number(text: str, row: int, column: str, problems: list[Problem]) -> float | None:
    if not text:
        return None
    try:
        value = float(text)
    except ValueError:
        problems.append(Problem(row, column, text, "expected a number"))
        return None
    if not (0 < value < 1000):
        problems.append(Problem(row, column, text, "expected a positive percentage"))
        return None
    return value
