"""Response rule sets (data with sources) and the classification of a regimen.

A rule set lists scales with a threshold: a change from the regimen baseline that meets a scale's threshold
in the better direction is an improvement, in the worse direction a worsening (relapse or deterioration);
``confirm_visits`` 2 asks for the same finding at two consecutive scored visits (ADVANCE-CIDP 1). Shipped
sets: ``tracker/reference/response_rules.csv``; a clinic adds its own as a CSV file of the same columns.

Classification of a regimen at a day: ``improved``, ``stable``, ``worsened`` or ``not_assessable`` — never
``stable`` for want of data: a required scale without a baseline or a follow-up makes it not assessable,
and the missing data are named.
"""

from __future__ import annotations

import csv
import datetime as dt
import io
import re
from dataclasses import dataclass, field
from functools import cache
from pathlib import Path

import pandas as pd

from tracker.domain.reference_files import read_reference_csv
from tracker.errors import InputRejected, Problem
from tracker.response.change import IMPROVED, NOT_COMPARABLE, WITHIN, WORSENED, baseline, judge
from tracker.response.regimens import Regimen
from tracker.response.scales import ScaleInfo, scale_table
from tracker.response.settings import ResponseSettings

CLASSIFICATIONS = ("improved", "stable", "worsened", "not_assessable")
DEFAULT_RULES = "trial-aincat"
AFFECTED_GRIP = "grip_kpa_affected"  # the hand weaker at the regimen baseline (ADVANCE-CIDP 1 wording)
RULE_COLUMNS = (
    "rule_set",
    "version",
    "title",
    "scale",
    "threshold",
    "comparator",
    "change_kind",
    "confirm_visits",
    "required",
    "source",
    "status",
)
_ID = re.compile(r"^[a-z0-9][a-z0-9-]{1,60}$")


@dataclass(frozen=True)
class Rule:
    scale: str
    threshold: float
    comparator: str
    change_kind: str
    confirm_visits: int
    required: bool
    source: str
    status: str

    def threshold_words(self, unit: str) -> str:
        symbol = "≥" if self.comparator == ">=" else ">"
        unit = "point" if unit == "points" and self.threshold == 1 else unit
        return f"{symbol} {self.threshold:g}{'%' if self.change_kind == 'percent' else ' ' + unit}"


@dataclass(frozen=True)
class RuleSet:
    id: str
    version: str
    title: str
    rules: tuple[Rule, ...]
    origin: str = "shipped"


@dataclass
class Classification:
    """One regimen's classification with its evidence (plain data for text, JSON, pages and reports)."""

    regimen: Regimen
    rule_set: str
    rule_set_version: str
    rule_set_title: str
    at: dt.date
    classification: str
    evidence: list[dict] = field(default_factory=list)
    missing: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    compared: list[dt.date] = field(default_factory=list)


@cache
def shipped_rule_sets() -> dict[str, RuleSet]:
    return _parse(read_reference_csv("response_rules.csv"), "response_rules.csv", origin="shipped")


def rule_sets(extra_files: tuple[Path, ...] = ()) -> dict[str, RuleSet]:
    """Shipped rule sets plus a clinic's own files (an id may not replace a shipped one)."""
    table = dict(shipped_rule_sets())
    for path in extra_files:
        try:
            text = Path(path).read_text(encoding="utf-8-sig")
        except UnicodeDecodeError:
            raise InputRejected(f"The rule-set file {Path(path).name} is not UTF-8 text", []) from None
        for rule_set in _parse(
            list(csv.DictReader(io.StringIO(text))), Path(path).name, origin=Path(path).name
        ).values():
            if rule_set.id in table:
                raise InputRejected(
                    f"The rule-set file {Path(path).name} was refused",
                    [Problem(None, "rule_set", rule_set.id, "this id is already taken; choose another id")],
                )
            table[rule_set.id] = rule_set
    return table


def _parse(rows: list[dict[str, str]], name: str, *, origin: str) -> dict[str, RuleSet]:
    problems: list[Problem] = []
    scales = scale_table()
    grouped: dict[str, list[tuple[int, dict[str, str]]]] = {}
    if rows:
        missing = [c for c in RULE_COLUMNS if c not in {(k or "").strip().lower() for k in rows[0]}]
        if missing:
            raise InputRejected(
                f"The rule-set file {name} was refused",
                [Problem(1, c, None, "required column missing") for c in missing],
            )
    for number, raw in enumerate(rows, start=2):
        row = {(k or "").strip().lower(): (v or "").strip() for k, v in raw.items()}
        if not _ID.match(row["rule_set"]):
            problems.append(
                Problem(
                    number, "rule_set", row["rule_set"], "expected lower-case letters, digits and hyphens"
                )
            )
        if row["scale"] != AFFECTED_GRIP and row["scale"] not in scales:
            problems.append(
                Problem(
                    number,
                    "scale",
                    row["scale"],
                    f"unknown scale; expected one of {', '.join([*scales, AFFECTED_GRIP])}",
                )
            )
        try:
            if float(row["threshold"]) <= 0:
                raise ValueError
        except ValueError:
            problems.append(Problem(number, "threshold", row["threshold"], "expected a number above 0"))
        if row["comparator"] not in (">=", ">"):
            problems.append(Problem(number, "comparator", row["comparator"], "expected >= or >"))
        if row["change_kind"] not in ("absolute", "percent"):
            problems.append(
                Problem(number, "change_kind", row["change_kind"], "expected absolute or percent")
            )
        if row["confirm_visits"] not in ("1", "2", "3"):
            problems.append(Problem(number, "confirm_visits", row["confirm_visits"], "expected 1, 2 or 3"))
        if row["required"] not in ("yes", "no"):
            problems.append(Problem(number, "required", row["required"], "expected yes or no"))
        if not row["source"]:
            problems.append(
                Problem(
                    number,
                    "source",
                    "",
                    "every rule needs its source (a publication, or 'local rule, <who>, <date>')",
                )
            )
        if row["status"] not in ("verified", "memory", "local"):
            problems.append(Problem(number, "status", row["status"], "expected verified, memory or local"))
        if not row["version"] or len(row["version"]) > 20:
            problems.append(
                Problem(
                    number, "version", row["version"], "a rule set needs a version of at most 20 characters"
                )
            )
        if len(row["title"]) > 200:
            problems.append(
                Problem(number, "title", row["title"][:40] + "…", "a title of at most 200 characters")
            )
        grouped.setdefault(row["rule_set"], []).append((number, row))
    for rule_set, members in grouped.items():
        versions = {r["version"] for _, r in members}
        if len(versions) > 1:
            problems.append(
                Problem(
                    members[-1][0],
                    "version",
                    members[-1][1]["version"],
                    f"rule set {rule_set} has more than one version in the file",
                )
            )
        scales_seen = [r["scale"] for _, r in members]
        for number, row in members:
            if scales_seen.count(row["scale"]) > 1:
                problems.append(
                    Problem(number, "scale", row["scale"], f"scale listed twice in rule set {rule_set}")
                )
    if not rows:
        problems.append(Problem(None, None, None, "the file has no rule rows"))
    if problems:
        raise InputRejected(f"The rule-set file {name} was refused", problems)
    return {
        rule_set: RuleSet(
            id=rule_set,
            version=members[0][1]["version"],
            title=members[0][1]["title"],
            origin=origin,
            rules=tuple(
                Rule(
                    r["scale"],
                    float(r["threshold"]),
                    r["comparator"],
                    r["change_kind"],
                    int(r["confirm_visits"]),
                    r["required"] == "yes",
                    r["source"],
                    r["status"],
                )
                for _, r in members
            ),
        )
        for rule_set, members in grouped.items()
    }


def series_by_scale(scores: pd.DataFrame) -> dict[str, list[tuple[dt.date, float]]]:
    """One patient's scores as {scale: [(day, value), …] sorted by day} (what :func:`classify` reads)."""
    out: dict[str, list[tuple[dt.date, float]]] = {}
    for scale, day, value in sorted(zip(scores["scale"], scores["date"], scores["value"].astype(float))):
        out.setdefault(scale, []).append((day, value))
    return out


def _affected_hand(
    scores: dict[str, list[tuple[dt.date, float]]], regimen: Regimen, settings: ResponseSettings
) -> tuple[str, str]:
    """(scale, words) of the hand weaker at the regimen baseline; the weaker hand of each day on a tie."""
    # Each hand's baseline follows the same floor rule as every scale.
    left = baseline(scores.get("grip_kpa_left", []), regimen, settings)
    right = baseline(scores.get("grip_kpa_right", []), regimen, settings)
    if left is not None and right is not None and left[0] == right[0] and left[1] != right[1]:
        return (
            ("grip_kpa_left", "left hand, weaker at baseline")
            if left[1] < right[1]
            else ("grip_kpa_right", "right hand, weaker at baseline")
        )
    return "grip_kpa_weaker", "weaker hand of each day"


def classify(
    regimen: Regimen,
    scores: dict[str, list[tuple[dt.date, float]]],
    rule_set: RuleSet,
    *,
    at: dt.date,
    settings: ResponseSettings | None = None,
    scales: dict[str, ScaleInfo] | None = None,
) -> Classification:
    """Classify ``regimen`` of one patient on day ``at`` (scores after ``at`` are not seen).

    ``scores``: that patient's recorded and computed scores by scale (:func:`series_by_scale`).
    """
    settings = settings or ResponseSettings()
    scales = scales or scale_table()
    until = at if regimen.assessed_until is None else min(at, regimen.assessed_until)
    result = Classification(regimen, rule_set.id, rule_set.version, rule_set.title, at, "not_assessable")
    seen = {scale: [p for p in points if p[0] <= at] for scale, points in scores.items()}
    outcomes: dict[str, str] = {}
    compared: set[dt.date] = set()
    for rule in rule_set.rules:
        scale, hand = (rule.scale, "")
        if rule.scale == AFFECTED_GRIP:
            scale, hand = _affected_hand(seen, regimen, settings)
        info = scales[scale]
        label = info.label if not hand else f"grip strength ({hand})"
        series = seen.get(scale, [])
        base = baseline(series, regimen, settings)
        if base is None:
            outcomes[rule.scale] = "missing"
            floor = ""
            if settings.baseline_after_previous_regimen and regimen.previous_start is not None:
                floor = f", and not before the previous regimen began ({regimen.previous_start.isoformat()})"
            result.missing.append(
                f"{label}: no score from {settings.baseline_lookback_days} days before the regimen started "
                f"({regimen.start_date.isoformat()}) to {settings.baseline_grace_days} days after "
                f"(baseline){floor}"
            )
            continue
        base_date, base_value = base
        follow = [p for p in series if base_date < p[0] <= until]
        if not follow:
            outcomes[rule.scale] = "missing"
            result.missing.append(
                f"{label}: no score after the baseline of {base_date.isoformat()} while the regimen ran (to "
                f"{until.isoformat()})"
            )
            continue
        verdicts = []
        for day, value in follow:
            change = value - base_value
            pct = None if base_value == 0 else change / abs(base_value) * 100.0
            verdicts.append(
                (
                    day,
                    value,
                    change,
                    pct,
                    judge(
                        change, pct, info.higher_is_better, rule.threshold, rule.comparator, rule.change_kind
                    ),
                )
            )
        day, value, change, pct, verdict = verdicts[-1]
        last_k = [v[4] for v in verdicts[-rule.confirm_visits :]]
        confirmed = len(last_k) == rule.confirm_visits and all(v == verdict for v in last_k)
        if verdict == NOT_COMPARABLE:
            # e.g. a percent threshold on a baseline of 0: no change can be computed, which is not "stable".
            outcome = "missing"
            result.missing.append(
                f"{label}: the change from a baseline of {base_value:g} cannot be computed as the rule asks "
                f"({rule.threshold_words(info.unit)})"
            )
        elif verdict in (IMPROVED, WORSENED) and not confirmed:
            # The confirming visit has not happened yet: want of data, never "stable".
            outcome = "missing"
            result.missing.append(
                f"{label}: {verdict} on {day.isoformat()} ({base_value:g} → {value:g}); the rule set asks "
                f"for the same at {rule.confirm_visits} consecutive visits and the confirming visit is not "
                "recorded yet"
            )
        else:
            outcome = verdict if verdict in (IMPROVED, WORSENED) else "stable"
        outcomes[rule.scale] = outcome
        # A worsening met earlier in the regimen (and confirmed as the rule asks)
        # stays visible after recovery.
        for index in range(len(verdicts) - 1):
            run = [v[4] for v in verdicts[max(0, index - rule.confirm_visits + 1) : index + 1]]
            if len(run) == rule.confirm_visits and all(v == WORSENED for v in run) and outcome != WORSENED:
                result.notes.append(
                    f"{label}: worsened on {verdicts[index][0].isoformat()} earlier in this regimen "
                    f"({verdicts[index][1]:g} against a baseline of {base_value:g}), since recovered"
                )
                break
        compared.update([base_date, *[v[0] for v in verdicts[-rule.confirm_visits :]]])
        result.evidence.append(
            {
                "scale": scale,
                "rule_scale": rule.scale,
                "label": label,
                "unit": info.unit,
                "direction": info.direction_words,
                "baseline_date": base_date,
                "baseline_value": base_value,
                "date": day,
                "value": value,
                "change": round(change, 6),
                "change_pct": None if pct is None else round(pct, 6),
                "threshold": rule.threshold_words(info.unit),
                "verdict": verdict if verdict != WITHIN else "within_threshold",
                "outcome": outcome,
                "confirm_visits": rule.confirm_visits,
                "confirmed_dates": [v[0] for v in verdicts[-rule.confirm_visits :]]
                if confirmed and outcome != "stable"
                else [],
                "source": rule.source,
                "status": rule.status,
            }
        )
    result.compared = sorted(compared)
    required_missing = [r.scale for r in rule_set.rules if r.required and outcomes.get(r.scale) == "missing"]
    assessed = [o for o in outcomes.values() if o != "missing"]
    if required_missing or not assessed:
        result.classification = "not_assessable"
        return result
    if WORSENED in assessed and IMPROVED in assessed:
        result.classification = settings.mixed_changes
        result.notes.append(
            f"one scale improved and another worsened: classified {settings.mixed_changes.replace('_', ' ')} "
            "(setting mixed_changes)"
        )
    elif WORSENED in assessed:
        result.classification = "worsened"
    elif IMPROVED in assessed:
        result.classification = "improved"
    else:
        result.classification = "stable"
    return result
