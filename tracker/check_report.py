"""Text and JSON renderings of a criteria check (interface layer; the rules live in tracker.criteria)."""

from __future__ import annotations

import math
from typing import Any

from tracker import CAUTION
from tracker.criteria.thresholds import COMPARATORS
from tracker.domain.labels import CRITERIA_NAMES
from tracker.services.evaluation import VisitCheck, to_json

VERDICT = {"met": "● met", "not_met": "○ not met", "not_evaluable": "? not evaluable", "not_applicable": "– not applicable"}
TITLES = CRITERIA_NAMES  # the sets' names in sentences (labels.py owns them)


# Outcomes are electrodiagnostic criteria, never a diagnosis of the patient.
POSSIBLE_SPECIFICITY = ("caution: poor specificity reported for the \"possible\" level (69.2 % against axonal "
                        "neuropathy controls; Rajabally et al., J Neurol Neurosurg Psychiatry 2009;80:1364–1368, "
                        "for the 2006 version of the EFNS/PNS criteria)")


def outcome_words(criteria_id: str, outcome: str) -> str:
    """The outcome as electrodiagnostic wording (``check`` text)."""
    value = str(outcome)
    if value == "undecided":
        return f"{TITLES.get(criteria_id, criteria_id)} electrodiagnostic criteria: undecided (data missing that could make them met)"
    if criteria_id == "efns-pns-2010-cidp":
        words = f"EFNS/PNS 2010 electrodiagnostic category: {value.replace('_', ' ')}"
        return words + (f" — {POSSIBLE_SPECIFICITY}" if value == "possible" else "")
    if criteria_id == "ean-pns-2021-cidp":
        return {"cidp": "meets the EAN/PNS 2021 electrodiagnostic criteria for CIDP",
                "possible_cidp": "meets the EAN/PNS 2021 electrodiagnostic criteria for possible CIDP"}.get(
            value, "does not meet the EAN/PNS 2021 electrodiagnostic criteria for CIDP")
    if criteria_id == "aan-1991-cidp":
        return ("meets the AAN 1991 research electrodiagnostic criteria for CIDP" if value == "met"
                else "does not meet the AAN 1991 research electrodiagnostic criteria for CIDP")
    if criteria_id == "efns-pns-2010-mmn":
        return f"EFNS/PNS 2010 MMN electrodiagnostic conduction block: {value.replace('_', ' ')}"
    return f"{TITLES.get(criteria_id, criteria_id)} electrodiagnostic class: {value.replace('_', ' ')}"


def _number(value: Any, unit: str = "") -> str:
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "—"
    return f"{value:.2f}".rstrip("0").rstrip(".") + (f" {unit}" if unit else "")


def _table(header: list[str], rows: list[list[str]], indent: str = "    ") -> list[str]:
    widths = [max([len(header[i])] + [len(r[i]) for r in rows]) for i in range(len(header))]
    fmt = lambda cells: indent + "  ".join(c.ljust(w) for c, w in zip(cells, widths)).rstrip()
    return [fmt(header), indent + "  ".join("-" * w for w in widths)] + [fmt(r) for r in rows]


def text(check: VisitCheck) -> str:
    lines = [
        f"Patient {check.patient} — visit {check.visit_date.isoformat()}" + (f" (phenotype: {check.phenotype})" if check.phenotype else ""),
        f"Normal limits: {check.limits.name} v{check.limits.version}" + (f" — {check.limits.description}" if check.limits.description else ""),
    ]
    sources: dict[str, int] = {}
    if len(check.results) > 1:
        rows = []
        for criteria_id, result in check.results.items():
            outcome = result.outcomes.iloc[0]
            extra = ", ".join(f"{k.replace('_', ' ')}: {outcome[k]}" for k in result.extra_keys)
            rows.append([criteria_id, str(outcome["outcome"]), extra])
        lines += ["", "Side by side:"] + _table(["criteria", "outcome", "details"], rows, indent="  ")
    for criteria_id, result in check.results.items():
        outcome = result.outcomes.iloc[0]
        lines += ["", f"== {TITLES.get(criteria_id, criteria_id)} ({criteria_id}, table version {result.version}) =="]
        lines.append(f"Outcome: {outcome_words(criteria_id, outcome['outcome'])} — {outcome.get('rule', '')}")
        for key in result.extra_keys:
            lines.append(f"{key.replace('_', ' ')}: {outcome[key]}")
        lines += _undecided_lines(outcome)
        for (nerve, side, modality), group in result.findings.groupby(["nerve", "side", "modality"], sort=True):
            rows = []
            for f in group.itertuples():
                source = f.source if isinstance(f.source, str) else ""
                number = sources.setdefault(source, len(sources) + 1) if source else None
                mark = "" if f.source_status == "verified" and f.limit_status != "memory" else "*"
                limit = f"{f.limit_name} {_number(f.limit)}".strip() if isinstance(f.limit_name, str) and f.limit_name else ""
                threshold = f"{COMPARATORS.get(f.comparator, f.comparator) if isinstance(f.comparator, str) else ''} {_number(f.threshold, f.unit)}"
                verdict = VERDICT[f.status] + (f" ({f.reason})" if f.reason else "")
                value = _number(f.value, f.unit) + (f" [{f.segment}]" if isinstance(f.segment, str) and f.segment else "")
                limit_source = f.limit_source if isinstance(f.limit_source, str) else ""
                limit_number = sources.setdefault(limit_source, len(sources) + 1) if limit_source else None
                refs = (f"[{number}]" if number else "") + (f"[{limit_number}]" if limit_number else "")
                rows.append([f.item, f.parameter, value, limit or "—", threshold.strip(), verdict, f"{refs}{mark}"])
            lines += ["", f"  {nerve} {side} ({modality})"]
            lines += _table(["item", "parameter", "value", "limit", "threshold", "verdict", "source"], rows)
        miss = check.closest.get(criteria_id)
        if miss is not None and len(miss):
            lines += ["", f"Closest miss: {miss.iloc[0]['text']}"]
        changes = check.changes.get(criteria_id)
        if check.previous_date is not None:
            moved = check.outcome_changes.get(criteria_id)
            if (changes is not None and len(changes)) or moved:
                lines += ["", f"Changed since the previous visit ({check.previous_date.isoformat()}):"]
                if moved:
                    lines.append(f"  outcome: {moved[0]} → {moved[1]}")
                if changes is not None:
                    lines += [f"  {c.nerve} {c.side} {c.item} ({c.parameter}): {c.change}" for c in changes.itertuples()]
            else:
                lines += ["", f"No finding changed since the previous visit ({check.previous_date.isoformat()})."]
    if len(check.warnings):
        lines += ["", "Warnings:"] + [f"  {m}" for m in check.warnings["message"]]
    if sources:
        lines += ["", "Sources — criteria, then normal limit with the stratum chosen (* = the threshold or the normal limit is from memory, not verified):"]
        lines += [f"  [{n}] {s}" for s, n in sources.items()]
    lines += ["", CAUTION]
    return "\n".join(lines)


def _undecided_lines(outcome) -> list[str]:
    """The findings not evaluable for want of data that could make the set met or raise its level."""
    items = outcome.get("undecided_items")
    if not isinstance(items, (tuple, list)) or not items:
        return []
    head = ("Undecided — not evaluable for want of data, and could make the set met:" if outcome["outcome"] == "undecided"
            else "Level reached; not evaluable for want of data, and could raise it:")
    return [head] + [
        f"  {f.get('nerve')} {f.get('side')} {f.get('item')} ({f.get('parameter')}" + (f", {f['segment']}" if f.get("segment") else "") + f"): {f.get('reason')}"
        for f in items
    ]


def json_payload(check: VisitCheck) -> dict[str, Any] | list[dict[str, Any]]:
    """DESIGN.md §5 shape; a list when several criteria sets were asked for."""
    payloads = []
    for criteria_id, result in check.results.items():
        body = to_json(result, check.visit_key)
        payloads.append(
            {
                "patient": check.patient,
                "visit_date": check.visit_date.isoformat(),
                "criteria": criteria_id,
                "criteria_version": body.pop("criteria_version"),
                "limits": f"{check.limits.name} v{check.limits.version}",
                **{k: v for k, v in body.items() if k != "criteria"},
                "warnings": list(check.warnings["message"]) if len(check.warnings) else [],
                "closest_miss": check.closest[criteria_id].iloc[0]["text"] if len(check.closest.get(criteria_id, [])) else None,
                "changes_since_previous": (
                    [{"nerve": None, "side": None, "item": "outcome", "change": f"{moved[0]} → {moved[1]}", "previous": moved[0], "current": moved[1]}
                     for moved in [check.outcome_changes.get(criteria_id)] if moved]
                    + [{"nerve": c.nerve, "side": c.side, "item": c.item, "change": c.change} for c in check.changes.get(criteria_id, []).itertuples()]
                ) if check.previous_date is not None else None,
                "caution": CAUTION,
            }
        )
    return payloads[0] if len(payloads) == 1 else payloads
