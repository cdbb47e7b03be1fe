"""Text and JSON renderings of a criteria check (interface layer; the rules live in tracker.criteria).

Text: a summary per criteria set that fits :data:`WIDTH` columns (outcome in words, the deciding findings,
warnings, closest miss, changes since the previous visit); ``detail=True`` adds the per-item trace of every
nerve. Words come from :mod:`tracker.domain.labels`; identifiers stay in the JSON (DESIGN.md §5).
"""

from __future__ import annotations

import dataclasses
import importlib
import math
import textwrap
from typing import Any

import pandas as pd

from tracker import CAUTION
from tracker.criteria import engine
from tracker.criteria.model import MET, NOT_APPLICABLE, NOT_EVALUABLE, NOT_MET, UNDECIDED, SetResult, Settings
from tracker.criteria.sets import _gbs as gbs
from tracker.domain.labels import (
    COMPARATOR_SIGNS,
    CRITERIA_NAMES,
    OUTCOME_KEY_LABELS,
    clinical_number,
    criteria_title,
    identifiers_in_words,
    item_label,
    nerve_words,
    outcome_label,
    segment_words,
    setting_words,
    status_label,
    words,
)
from tracker.services.evaluation import VisitCheck, to_json

WIDTH = 120  # columns of the text output (a terminal, a pasted note)
SUMMARY_ROWS = 6  # deciding findings, changes or undecided items listed per set before "… and N more"
TITLES = CRITERIA_NAMES  # the sets' names in sentences (labels.py owns them)
# Verdict words of the printable report (tracker.report.content); the check text uses labels.status_label.
VERDICT = {
    "met": "● met",
    "not_met": "○ not met",
    "not_evaluable": "? not evaluable",
    "not_applicable": "– not applicable",
}
# Outcomes that reach no level: their met findings are "findings met", not "deciding findings".
NO_LEVEL = {"not_met", UNDECIDED, "normal", "equivocal", "not_evaluable"}


# Outcomes are electrodiagnostic criteria, never a diagnosis of the patient.
POSSIBLE_SPECIFICITY = (
    'caution: poor specificity reported for the "possible" level (69.2 % against axonal '
    "neuropathy controls; Rajabally et al., J Neurol Neurosurg Psychiatry 2009;80:1364–1368, "
    "for the 2006 version of the EFNS/PNS criteria)"
)


def outcome_words(criteria_id: str, outcome: str) -> str:
    """The outcome as electrodiagnostic wording (``check`` text)."""
    value = str(outcome)
    if value == UNDECIDED:
        return (
            f"{TITLES.get(criteria_id, criteria_id)} electrodiagnostic criteria: undecided "
            "(data missing that could make them met)"
        )
    if criteria_id == "efns-pns-2010-cidp":
        words_ = f"EFNS/PNS 2010 electrodiagnostic category: {outcome_label(value)}"
        return words_ + (f" — {POSSIBLE_SPECIFICITY}" if value == "possible" else "")
    if criteria_id == "ean-pns-2021-cidp":
        return {
            "cidp": "meets the EAN/PNS 2021 electrodiagnostic criteria for CIDP",
            "possible_cidp": "meets the EAN/PNS 2021 electrodiagnostic criteria for possible CIDP",
        }.get(value, "does not meet the EAN/PNS 2021 electrodiagnostic criteria for CIDP")
    if criteria_id == "aan-1991-cidp":
        return (
            "meets the AAN 1991 research electrodiagnostic criteria for CIDP"
            if value == "met"
            else "does not meet the AAN 1991 research electrodiagnostic criteria for CIDP"
        )
    if criteria_id == "efns-pns-2010-mmn":
        return f"EFNS/PNS 2010 MMN electrodiagnostic conduction block: {outcome_label(value)}"
    return f"{TITLES.get(criteria_id, criteria_id)} electrodiagnostic class: {outcome_label(value)}"


# ------------------------------------------------------------------------------------------ numbers, cells


def _present(value: Any) -> bool:
    return value is not None and value is not pd.NA and not (isinstance(value, float) and math.isnan(value))


def _text(value: Any) -> str:
    return value if isinstance(value, str) else ""


def _quantity(value: Any, unit: Any) -> str:
    """``7.05 ms``, ``31.9 m/s``: clinical precision by unit (labels.PRECISION); ``—`` when missing."""
    if not _present(value):
        return "—"
    unit = _text(unit)
    return f"{clinical_number(float(value), unit)} {unit}".rstrip()


def _threshold(finding: Any) -> str:
    """``≥ 6.60 ms``; empty when the finding has no threshold (never a bare ``≥``)."""
    if not _present(finding.threshold):
        return ""
    sign = COMPARATOR_SIGNS.get(_text(finding.comparator), "")
    return f"{sign} {_quantity(finding.threshold, finding.unit)}".strip()


def _limit(finding: Any) -> str:
    """``150 % of ULN 4.40``, ``cut-off for LFF 2 Hz``; the limit is in the finding's unit or its own (mV)."""
    name = _text(finding.limit_name)
    if not _present(finding.limit):
        return name
    return f"{name} {clinical_number(float(finding.limit), _text(finding.unit))}".strip()


def _sentence_limit(finding: Any) -> str:
    """The normal limit beside a threshold in a sentence; none for percentages (their thresholds are fixed,
    and a limit on such a row belongs to a precondition, shown in the --detail trace)."""
    return "" if _text(finding.unit) == "%" else _limit(finding)


def _where(finding: Any) -> str:
    segment = _text(finding.segment)
    return f", {segment_words(segment)}" if segment else ""


def _what(item: Any, parameter: Any) -> str:
    """The criteria item and the measured parameter in words, once when one names the other:
    ``motor conduction velocity``,
    ``definite conduction block: conduction block (negative-peak area reduction)``."""
    label, measured = item_label(item), identifiers_in_words(parameter) if isinstance(parameter, str) else ""
    said, named = set(measured.lower().split()), set(label.lower().split())
    if not measured or said <= named:
        return label
    if named <= said:
        return measured
    return f"{label}: {measured}"


def _wrap(text: str, first: str = "", rest: str | None = None) -> list[str]:
    """``text`` wrapped to :data:`WIDTH` columns, ``first`` before the first line and ``rest`` (default: as
    many spaces) before the others."""
    rest = " " * len(first) if rest is None else rest
    return textwrap.wrap(
        text, WIDTH, initial_indent=first, subsequent_indent=rest, break_on_hyphens=False
    ) or [first.rstrip()]


def _table(header: list[str], rows: list[list[str]], indent: str = "    ") -> list[str]:
    """A plain-text table within :data:`WIDTH` columns: the widest columns narrow and their cells wrap."""
    count = len(header)
    widths = [max([len(header[i])] + [len(r[i]) for r in rows]) for i in range(count)]
    budget = WIDTH - len(indent) - 2 * (count - 1)
    while sum(widths) > budget:
        widest = max(range(count), key=lambda i: widths[i])
        if widths[widest] <= 8:
            break
        widths[widest] -= 1

    def emit(cells: list[str]) -> list[str]:
        wrapped = [textwrap.wrap(c, widths[i], break_on_hyphens=False) or [""] for i, c in enumerate(cells)]
        return [
            (
                indent
                + "  ".join((w[k] if k < len(w) else "").ljust(widths[i]) for i, w in enumerate(wrapped))
            ).rstrip()
            for k in range(max(len(w) for w in wrapped))
        ]

    lines = emit(header) + [indent + "  ".join("-" * w for w in widths)]
    for row in rows:
        lines += emit(row)
    return lines


class _Sources:
    """Footnote numbers for the citations of the findings shown (criteria, then normal-limit source)."""

    def __init__(self) -> None:
        self.numbers: dict[str, int] = {}

    def refs(self, finding: Any) -> str:
        marks = ""
        for source in (_text(finding.source), _text(finding.limit_source)):
            if source:
                marks += f"[{self.numbers.setdefault(source, len(self.numbers) + 1)}]"
        # Anything short of a verified threshold with a normal limit not from memory is marked.
        memory = _text(finding.source_status) != "verified" or _text(finding.limit_status) == "memory"
        return marks + ("*" if memory else "")

    def lines(self) -> list[str]:
        if not self.numbers:
            return []
        lines = [
            "",
            "Sources (criteria, then the normal limit and its stratum; "
            "* = threshold or normal limit from memory, not verified):",
        ]
        for source, number in self.numbers.items():
            lines += _wrap(identifiers_in_words(source), f"  [{number}] ", " " * 7)
        return lines


# ------------------------------------------------------------------------------------------------- sentences


def finding_words(finding: Any, sources: _Sources | None = None) -> str:
    """``median right (motor): distal latency 7.05 ms (threshold ≥ 6.60 ms; 150 % of ULN 4.40) [1][2]``."""
    threshold, limit = _threshold(finding), _sentence_limit(finding)
    against = "; ".join(part for part in (f"threshold {threshold}" if threshold else "", limit) if part)
    where = nerve_words(finding.nerve, finding.side, finding.modality)
    text = (
        f"{where}: {_what(finding.item, finding.parameter)}"
        f"{_where(finding)} {_quantity(finding.value, finding.unit)}" + (f" ({against})" if against else "")
    )
    if _text(finding.reason):
        text += f" — {identifiers_in_words(finding.reason)}"
    return text + (f" {sources.refs(finding)}" if sources is not None else "")


def miss_words(miss: Any, sources: _Sources | None = None) -> str:
    """The closest miss in words: the value, how far it falls short, and the threshold it misses."""
    direction = "above" if _text(miss.comparator) in ("le", "lt") else "below"
    limit = _sentence_limit(miss)
    where = nerve_words(miss.nerve, miss.side, miss.modality)
    short = _quantity(abs(float(miss.margin)), miss.unit)
    text = (
        f"{where}: {_what(miss.item, miss.parameter)}{_where(miss)} {_quantity(miss.value, miss.unit)}, "
        f"{short} {direction} the threshold {_threshold(miss)}" + (f" ({limit})" if limit else "")
    )
    return text + (f" {sources.refs(miss)}" if sources is not None else "")


def _undecided_words(item: dict[str, Any]) -> str:
    segment = item.get("segment")
    where = f", {segment_words(segment)}" if isinstance(segment, str) and segment else ""
    nerve = nerve_words(str(item.get("nerve")), item.get("side"), item.get("modality"))
    reason = identifiers_in_words(item.get("reason"))
    return f"{nerve}: {_what(item.get('item'), item.get('parameter'))}{where} — {reason}"


def _change_words(change: Any) -> str:
    where = nerve_words(change.nerve, change.side, getattr(change, "modality", None))
    values = ""
    if _present(getattr(change, "previous_value", None)) or _present(getattr(change, "value", None)):
        unit = getattr(change, "unit", "")
        values = (
            f" {_quantity(getattr(change, 'previous_value', None), unit)} → {_quantity(change.value, unit)}"
        )
    return f"{where}: {_what(change.item, change.parameter)}{values}: {change.change}"


def _extras(outcome: pd.Series, keys: tuple[str, ...]) -> str:
    return "; ".join(f"{OUTCOME_KEY_LABELS.get(k, words(k))}: {outcome_label(outcome[k])}" for k in keys)


def _field(label: str, entries: list[str]) -> list[str]:
    """``  Label:        first entry`` with later entries (and wrapped lines) under the first."""
    head = f"  {label + ':':<20}"
    lines: list[str] = []
    for entry in entries:
        lines += _wrap(entry, head if not lines else " " * len(head), " " * (len(head) + 2))
    return lines


def _capped(entries: list[str], detail: bool, what: str) -> list[str]:
    if detail or len(entries) <= SUMMARY_ROWS:
        return entries
    return entries[:SUMMARY_ROWS] + [
        f"… and {len(entries) - SUMMARY_ROWS} more {what} (--detail lists them all)"
    ]


# ----------------------------------------------------------------------------------------------------- text


def _counting_items(criteria_id: str, result: SetResult, outcome: str) -> tuple[str, ...]:
    """The items whose met findings decide the outcome: the set's outcome items; for a GBS class the
    demyelinating features the set declares (``FEATURES``), with the low-CMAP items for the axonal and
    inexcitable classes (their other met items are normal values or preconditions). Empty = every item."""
    if result.outcome_items:
        return tuple(result.outcome_items)
    module = (
        importlib.import_module(f"tracker.criteria.sets.{engine.REGISTRY[criteria_id]}")
        if criteria_id in engine.REGISTRY
        else None
    )
    features = tuple(getattr(module, "FEATURES", ()))
    if features and outcome in ("axonal", "inexcitable"):
        features += (gbs.LOW_CMAP, gbs.VERY_LOW_CMAP)
    return features


def _deciding(criteria_id: str, result: SetResult, outcome: str) -> pd.DataFrame:
    """The met findings among the items that decide the set's outcome."""
    findings = result.findings[result.findings["status"] == MET]
    items = _counting_items(criteria_id, result, outcome)
    if not items:
        return findings.sort_values(["nerve", "side", "modality"], kind="stable")
    # By the set's own order of items (the rule names them in that order), then by nerve.
    findings = findings[findings["item"].isin(items)]
    rank = findings["item"].map({item: i for i, item in enumerate(items)})
    return (
        findings.assign(_rank=rank)
        .sort_values(["_rank", "nerve", "side", "modality"], kind="stable")
        .drop(columns="_rank")
    )


def _block(
    check: VisitCheck, criteria_id: str, sources: _Sources, *, detail: bool, warnings: bool
) -> list[str]:
    """The summary of one criteria set (and its per-item trace when ``detail``)."""
    result = check.results[criteria_id]
    outcome = result.outcomes.iloc[0]
    value = str(outcome["outcome"])
    lines = ["", f"{criteria_title(criteria_id)} (criteria version {result.version})"]
    lines += _field("Outcome", [outcome_words(criteria_id, value)])
    if _text(outcome.get("rule")):
        lines += _field("Rule", [identifiers_in_words(outcome["rule"])])
    if result.extra_keys:
        lines += _field("Details", [_extras(outcome, result.extra_keys)])
    deciding = _deciding(criteria_id, result, value)
    shown = deciding.head(SUMMARY_ROWS)  # footnotes only for the findings shown
    met = [finding_words(f, sources) for f in shown.itertuples()]
    if len(shown) < len(deciding):
        where = "the trace below shows them" if detail else "--detail lists them all"
        met.append(f"… and {len(deciding) - len(shown)} more findings met ({where})")
    label = "Deciding findings" if value not in NO_LEVEL else "Findings met"
    lines += _field(label, met or ["none"])
    items = outcome.get("undecided_items")
    if isinstance(items, (tuple, list)) and items:
        head = "Undecided" if value == UNDECIDED else "Could raise it"
        lead = (
            "data missing that could make the set met:"
            if value == UNDECIDED
            else "level reached; data missing that could raise it:"
        )
        lines += _field(head, [lead] + _capped([_undecided_words(i) for i in items], detail, "items"))
    if warnings and len(check.warnings):
        lines += _field("Warnings", [identifiers_in_words(m) for m in check.warnings["message"]])
    miss = check.closest.get(criteria_id)
    if miss is not None and len(miss):
        lines += _field("Closest miss", [miss_words(next(miss.itertuples()), sources)])
    lines += _changes(check, criteria_id, detail)
    counts = result.findings["status"].value_counts()
    tally = ", ".join(
        f"{int(counts.get(s, 0))} {status_label(s).split(' ', 1)[1]}"
        for s in (MET, NOT_MET, NOT_EVALUABLE, NOT_APPLICABLE)
    )
    lines += _field(
        "Trace",
        [f"{len(result.findings)} findings: {tally}" + ("" if detail else " (--detail shows every item)")],
    )
    if detail:
        lines += _trace(result, sources)
    return lines


def _changes(check: VisitCheck, criteria_id: str, detail: bool) -> list[str]:
    if check.previous_date is None:
        return _field("Changes", ["first visit: nothing to compare"])
    label = f"Since {check.previous_date.isoformat()}"
    entries = []
    moved = check.outcome_changes.get(criteria_id)
    if moved:
        entries.append(f"outcome: {outcome_label(moved[0])} → {outcome_label(moved[1])}")
    changes = check.changes.get(criteria_id)
    if changes is not None and len(changes):
        entries += _capped([_change_words(c) for c in changes.itertuples()], detail, "changes")
    return _field(label, entries or ["no outcome or finding changed"])


def _trace(result, sources: _Sources) -> list[str]:
    """Per nerve, every finding: value, normal limit, threshold, verdict with its reason, sources."""
    lines: list[str] = []
    for (nerve, side, modality), group in result.findings.groupby(["nerve", "side", "modality"], sort=True):
        rows = []
        for f in group.itertuples():
            verdict = status_label(f.status) + (
                f" ({identifiers_in_words(f.reason)})" if _text(f.reason) else ""
            )
            rows.append(
                [
                    _what(f.item, f.parameter) + _where(f),
                    _quantity(f.value, f.unit),
                    _limit(f) or "—",
                    _threshold(f) or "—",
                    verdict,
                    sources.refs(f),
                ]
            )
        lines += ["", f"    {nerve_words(nerve, side, modality)}"]
        lines += _table(
            ["finding", "value", "normal limit", "threshold", "verdict", "source"], rows, indent="    "
        )
    return lines


def _overview(check: VisitCheck) -> list[str]:
    """The sets side by side: one row per set."""
    rows = []
    for criteria_id, result in check.results.items():
        outcome = result.outcomes.iloc[0]
        moved = check.outcome_changes.get(criteria_id)
        change = (
            f"{outcome_label(moved[0])} → {outcome_label(moved[1])}"
            if moved
            else ("—" if check.previous_date else "first visit")
        )
        rows.append(
            [
                criteria_title(criteria_id),
                outcome_label(outcome["outcome"]),
                _extras(outcome, result.extra_keys) or "—",
                change,
            ]
        )
    since = f"outcome since {check.previous_date.isoformat()}" if check.previous_date else "outcome change"
    return ["", "Criteria sets side by side (electrodiagnostic outcomes):"] + _table(
        ["criteria set", "outcome", "details", since], rows, indent="  "
    )


def _settings_lines(settings: Settings | None) -> list[str]:
    if settings is None:
        return []
    said = [setting_words(f.name, getattr(settings, f.name)) for f in dataclasses.fields(settings)]
    return _wrap("; ".join(said), "Settings: ")


def text(check: VisitCheck, *, detail: bool = False, settings: Settings | None = None) -> str:
    """The check as text within :data:`WIDTH` columns: a summary per set, the item trace when ``detail``."""
    head = f"Patient {check.patient} — visit {check.visit_date.isoformat()}"
    head += f" — CIDP phenotype: {words(check.phenotype)}" if check.phenotype else ""
    limits = f"{check.limits.name} v{check.limits.version}" + (
        f" — {check.limits.description}" if check.limits.description else ""
    )
    lines = _wrap(head) + _wrap(identifiers_in_words(limits), "Normal limits: ") + _settings_lines(settings)
    several = len(check.results) > 1
    if several:
        lines += _overview(check)
        if len(check.warnings):
            lines += ["", "Warnings (every set):"]
            for message in check.warnings["message"]:
                lines += _wrap(identifiers_in_words(message), "  ", "    ")
    sources = _Sources()
    for criteria_id in check.results:
        lines += _block(check, criteria_id, sources, detail=detail, warnings=not several)
    lines += sources.lines()
    lines += [""] + _wrap(CAUTION)
    return "\n".join(lines)


# ----------------------------------------------------------------------------------------------------- JSON


def segment_object(segment: Any) -> dict[str, str | None] | None:
    """``"wrist → below_elbow"`` → ``{"from": "wrist", "to": "below_elbow", "name": "wrist → below_elbow"}``:
    ``from`` is the distal stimulation site, ``to`` the proximal one (identifiers, as in the import files)."""
    if not isinstance(segment, str) or not segment:
        return None
    low, arrow, high = segment.partition("→")
    if not arrow:
        return {"from": None, "to": None, "name": segment}
    return {"from": low.strip(), "to": high.strip(), "name": segment}


def _number_or_none(value: Any) -> float | None:
    return round(float(value), 6) if _present(value) else None


def closest_miss_object(miss: pd.DataFrame | None) -> dict[str, Any] | None:
    """The closest miss (DESIGN.md §5 extension) as an object: where, what, value, threshold, the gap."""
    if miss is None or not len(miss):
        return None
    row = next(miss.itertuples())
    return {
        "nerve": row.nerve,
        "side": row.side,
        "modality": row.modality,
        "item": row.item,
        "parameter": row.parameter,
        "segment": segment_object(row.segment),
        "value": _number_or_none(row.value),
        "unit": _text(row.unit) or None,
        "limit": _number_or_none(row.limit),
        "limit_name": _text(row.limit_name) or None,
        "threshold": _number_or_none(row.threshold),
        "comparator": _text(row.comparator) or None,
        # How far the value falls short of the threshold, in the value's unit and relative to the threshold.
        "margin": _number_or_none(abs(float(row.margin))),
        "relative_margin": _number_or_none(getattr(row, "relative_margin", None)),
        "source": _text(row.source) or None,
        "text": miss_words(row),
    }


def json_payload(
    check: VisitCheck, settings: Settings | None = None
) -> dict[str, Any] | list[dict[str, Any]]:
    """DESIGN.md §5 shape: one set → an object, several → a list of such objects."""
    payloads = []
    for criteria_id, result in check.results.items():
        body = to_json(result, check.visit_key)
        nerves = [
            {**n, "findings": [{**f, "segment": segment_object(f.get("segment"))} for f in n["findings"]]}
            for n in body["nerves"]
        ]
        undecided = [
            {**i, "segment": segment_object(i.get("segment"))} for i in body.get("undecided_items") or []
        ]
        moved = check.outcome_changes.get(criteria_id)
        changes = check.changes.get(criteria_id)
        payload = {
            "patient": check.patient,
            "visit_date": check.visit_date.isoformat(),
            "criteria": criteria_id,
            "criteria_version": body.pop("criteria_version"),
            "limits": f"{check.limits.name} v{check.limits.version}",
            **{k: v for k, v in body.items() if k not in ("criteria", "nerves", "undecided_items")},
            # Every set has the key (DESIGN.md §5); only the CIDP and MMN sets can fill it.
            "undecided_items": undecided,
            "nerves": nerves,
            "warnings": list(check.warnings["message"]) if len(check.warnings) else [],
            "closest_miss": closest_miss_object(check.closest.get(criteria_id)),
            "changes_since_previous": (
                (
                    [
                        {
                            "nerve": None,
                            "side": None,
                            "item": "outcome",
                            "change": f"{moved[0]} → {moved[1]}",
                            "previous": moved[0],
                            "current": moved[1],
                        }
                    ]
                    if moved
                    else []
                )
                + (
                    [
                        {"nerve": c.nerve, "side": c.side, "item": c.item, "change": c.change}
                        for c in changes.itertuples()
                    ]
                    if changes is not None and len(changes)
                    else []
                )
            )
            if check.previous_date is not None
            else None,
            "caution": CAUTION,
        }
        if settings is not None:
            payload["settings"] = dataclasses.asdict(settings)
        payloads.append(payload)
    return payloads[0] if len(payloads) == 1 else payloads
