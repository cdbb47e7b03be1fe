"""Research export as FHIR R4 resources (``ncs-tracker export --format fhir``): NDJSON files, one per resource
type, in one folder — ``Patient.ndjson``, ``Observation.ndjson``, ``DiagnosticReport.ndjson`` — beside a
manifest that lists them with their SHA-256.

The resources are built from the same plan as the tables (:func:`tracker.services.export.tables.prepare`):
the same visits, filters, chunks, export ids, date shifts and permission check. So they are de-identified
by the same rules: a Patient carries the export id only (the clinic code, record number, name and birth date
only in an identified export, which needs ``--identified`` and the role); dates are the shifted ones, or
absent with ``--dates relative`` (the days since the first visit are an extension of every resource).

- one **Observation** per row of the long level: a measured or derived value in its UCUM unit, or a recorded
  absence (see :func:`observation`);
- one **DiagnosticReport** per study (visit), referencing its Observations, with the criteria outcomes of the
  visit level and the safety caution as its conclusion;
- one **Patient** per patient exported.

Lines are compact JSON with keys in a fixed order: the same database and options give byte-identical files.
"""

from __future__ import annotations

import dataclasses
import json
import os
from collections.abc import Callable
from pathlib import Path
from typing import IO, TYPE_CHECKING, Any

import pandas as pd
from sqlalchemy.orm import Session

from tracker import CAUTION
from tracker.domain import labels
from tracker.errors import TrackerError
from tracker.services.access.permissions import Actor
from tracker.services.export.files import private_file, sha256_of
from tracker.services.export.tables import ExportOptions, ExportPlan, prepare

if TYPE_CHECKING:  # run.py dispatches to this module, so it is imported late at run time
    from tracker.services.export.run import ExportResult

FHIR_VERSION = "4.0.1"
RESOURCE_TYPES = ("Patient", "Observation", "DiagnosticReport")
DEFAULT_FOLDER = "ncs-export-fhir"
MANIFEST_NAME = "ncs-export-fhir.manifest.json"
# Our own code systems (no standard terminology codes these quantities at this granularity).
PARAMETER_SYSTEM = "urn:ncs-tracker:parameter"
CONTEXT_SYSTEM = "urn:ncs-tracker:context"
STUDY_SYSTEM = "urn:ncs-tracker:study"
EXPORT_ID_SYSTEM = "urn:ncs-tracker:export-id"
PATIENT_CODE_SYSTEM = "urn:ncs-tracker:patient-code"
RECORD_NUMBER_SYSTEM = "urn:ncs-tracker:record-number"
DAYS_EXTENSION = "urn:ncs-tracker:extension:days-since-first-visit"
VISIT_NUMBER_EXTENSION = "urn:ncs-tracker:extension:visit-number"
UCUM = "http://unitsofmeasure.org"
ABSENT_REASON_SYSTEM = "http://terminology.hl7.org/CodeSystem/data-absent-reason"
CATEGORY_SYSTEM = "http://terminology.hl7.org/CodeSystem/observation-category"
# Units of the long level → UCUM codes (the Unified Code for Units of Measure, case-sensitive form).
UCUM_CODES = {
    "ms": "ms",
    "mV": "mV",
    "µV": "uV",
    "mm": "mm",
    "m/s": "m/s",
    "mV·ms": "mV.ms",
    "%": "%",
    "°C": "Cel",
    "Hz": "Hz",
}


def fhir_paths(out: Path | str | None) -> dict[str, Path]:
    """Where the files go: ``out`` is the folder (created if needed); default ``./ncs-export-fhir``.
    Returns ``{"Patient": …, "Observation": …, "DiagnosticReport": …, "manifest": …}`` as absolute paths."""
    folder = Path.cwd() / DEFAULT_FOLDER if out is None else Path(out)
    folder = folder.absolute()
    paths = {kind: folder / f"{kind}.ndjson" for kind in RESOURCE_TYPES}
    paths["manifest"] = folder / MANIFEST_NAME
    return paths


def _line(resource: dict[str, Any]) -> bytes:
    return (json.dumps(resource, ensure_ascii=False, separators=(",", ":"), allow_nan=False) + "\n").encode()


def _missing(value: Any) -> bool:
    return value is None or value is pd.NA or (isinstance(value, float) and value != value)


def _concept(system: str, code: str, display: str) -> dict[str, Any]:
    return {"coding": [{"system": system, "code": code, "display": display}], "text": display}


def _date_fields(row: Any, options: ExportOptions) -> dict[str, Any]:
    """effectiveDateTime (real date when identified, shifted date, or none with relative dates)."""
    if options.identified:
        return {"effectiveDateTime": row["visit_date"].isoformat()}
    if options.dates == "shifted":
        return {"effectiveDateTime": row["visit_date_shifted"].isoformat()}
    return {}


def _days_extension(row: Any) -> list[dict[str, Any]]:
    return [{"url": DAYS_EXTENSION, "valueInteger": int(row["days_since_first_visit"])}]


def patient(export_id: str, identity: dict[str, Any] | None) -> dict[str, Any]:
    """A Patient with the export id only; ``identity`` (identified export only): code, record number, name,
    birth date."""
    resource: dict[str, Any] = {
        "resourceType": "Patient",
        "id": export_id,
        "identifier": [{"system": EXPORT_ID_SYSTEM, "value": export_id}],
    }
    if identity is None:
        return resource
    resource["identifier"].append({"system": PATIENT_CODE_SYSTEM, "value": str(identity["patient_code"])})
    if not _missing(identity.get("record_number")):
        resource["identifier"].append(
            {"system": RECORD_NUMBER_SYSTEM, "value": str(identity["record_number"])}
        )
    if not _missing(identity.get("full_name")):
        resource["name"] = [{"text": str(identity["full_name"])}]
    if not _missing(identity.get("birth_date")):
        resource["birthDate"] = identity["birth_date"].isoformat()
    return resource


def _has_segment(row: Any) -> bool:
    # Text columns of the long level hold "None" for an empty cell once conformed to str.
    return not _missing(row["segment"]) and str(row["segment"]) not in ("", "None", "nan", "<NA>")


def _component(code: str, value_key: str, value: Any) -> dict[str, Any]:
    return {"code": _concept(CONTEXT_SYSTEM, code, labels.words(code)), value_key: value}


def observation(row: Any, resource_id: str, options: ExportOptions) -> dict[str, Any]:
    """One Observation from one row of the long level (units as the long level's ``unit`` column).

    A value → ``valueQuantity`` in its UCUM unit. A recorded absence (``response_absent``) is a finding, not
    missing data: its row keeps the value it has (amplitude 0, F-wave persistence 0 %) and, where there is
    none (no latency without a response), carries ``dataAbsentReason`` ``not-applicable`` — there is no
    proper value, not "not performed" — and every absence row has the component ``response_absent`` with
    ``valueBoolean`` true. A quantity never measured has no Observation at all.
    """
    quantity = str(row["quantity"])
    # The vocabulary's words where it has the quantity (F-wave latency, velocities), else the id in words.
    words = labels.NERVE_PARAMETER_LABELS.get(quantity, (labels.words(quantity), ""))[0]
    site = labels.nerve_words(str(row["nerve"]), str(row["side"]), str(row["modality"]))
    if not _missing(row["site_order"]):
        site += f", stimulation site {int(row['site_order'])}"
    if _has_segment(row):
        site += f", segment {labels.segment_words(row['segment'])}"
    resource: dict[str, Any] = {
        "resourceType": "Observation",
        "id": resource_id,
        "extension": _days_extension(row),
        "status": "final",
        "category": [{"coding": [{"system": CATEGORY_SYSTEM, "code": "procedure", "display": "Procedure"}]}],
        "code": _concept(PARAMETER_SYSTEM, quantity, words),
        "subject": {"reference": f"Patient/{row['export_id']}"},
        **_date_fields(row, options),
    }
    if _missing(row["value"]):
        resource["dataAbsentReason"] = {
            "coding": [
                {"system": ABSENT_REASON_SYSTEM, "code": "not-applicable", "display": "Not Applicable"}
            ],
            "text": "no response recorded: the value does not exist",
        }
    else:
        unit = str(row["unit"])
        if unit not in UCUM_CODES:
            raise TrackerError(f"No UCUM code for the unit {unit!r} of {quantity}.")
        resource["valueQuantity"] = {
            "value": float(row["value"]),
            "unit": unit,
            "system": UCUM,
            "code": UCUM_CODES[unit],
        }
    resource["bodySite"] = {"text": site}
    resource["method"] = {"text": "derived from stored values" if row["origin"] == "derived" else "measured"}
    components = [
        _component("nerve", "valueString", str(row["nerve"])),
        _component("side", "valueString", str(row["side"])),
        _component("modality", "valueString", str(row["modality"])),
    ]
    if not _missing(row["site_order"]):
        components.append(_component("site_order", "valueInteger", int(row["site_order"])))
    if _has_segment(row):
        components.append(_component("segment", "valueString", str(row["segment"])))
    if bool(row["response_absent"]) is True:
        components.append(_component("response_absent", "valueBoolean", True))
    resource["component"] = components
    return resource


def conclusion(row: Any, plan: ExportPlan) -> str:
    """The criteria outcomes of one visit in words, then the safety caution."""
    parts = []
    for found in plan.sets:
        outcome = row.get(f"{found.alias}__outcome")
        undecided = row.get(f"{found.alias}__undecided")
        if not _missing(outcome):
            words = labels.outcome_label(outcome)
        elif not _missing(undecided) and bool(undecided):
            words = labels.outcome_label("undecided")
        else:
            words = "no outcome (no nerve test evaluated)"
        parts.append(f"{labels.criteria_title(found.criteria)} ({found.criteria} {found.version}): {words}")
    outcomes = "; ".join(parts) if parts else "no criteria set evaluated"
    return f"Electrodiagnostic criteria outcomes: {outcomes}. {CAUTION}"


def report(row: Any, plan: ExportPlan, results: list[str]) -> dict[str, Any]:
    """One DiagnosticReport per study (visit), referencing its Observations."""
    resource: dict[str, Any] = {
        "resourceType": "DiagnosticReport",
        "id": f"{row['export_id']}-{int(row['visit_number'])}",
        "extension": _days_extension(row)
        + [{"url": VISIT_NUMBER_EXTENSION, "valueInteger": int(row["visit_number"])}],
        "status": "final",
        "code": _concept(STUDY_SYSTEM, "nerve_conduction_study", "nerve conduction study"),
        "subject": {"reference": f"Patient/{row['export_id']}"},
        **_date_fields(row, plan.options),
    }
    if results:
        resource["result"] = [{"reference": f"Observation/{r}"} for r in results]
    resource["conclusion"] = conclusion(row, plan)
    return resource


def write_fhir(
    session: Session,
    options: ExportOptions,
    *,
    out: Path | str | None,
    username: str,
    actor: Actor | None = None,
    overwrite: bool = False,
    progress: Callable[[int, int], None] | None = None,
) -> ExportResult:
    """Write Patient, Observation and DiagnosticReport NDJSON files and the manifest; audit the export.

    Two plans over the same visits: the long level (values) and the visit level (outcomes), read chunk by
    chunk in step (both order the visits alike). Files are written under temporary names and renamed only when
    everything succeeded. Returns a :class:`tracker.services.export.run.ExportResult`.
    """
    from tracker.services.export import run  # run dispatches here: imported late

    paths = fhir_paths(out)
    existing = [p for p in paths.values() if os.path.lexists(p)]
    if existing and not overwrite:
        raise TrackerError(f"{existing[0]} already exists; choose another --out or add --overwrite.")
    values = prepare(session, dataclasses.replace(options, level="long"), username=username, actor=actor)
    visits = prepare(session, dataclasses.replace(options, level="visit"), username=username, actor=actor)
    paths["manifest"].parent.mkdir(parents=True, exist_ok=True)
    partial: dict[str, Path] = {}
    handles: dict[str, IO[bytes]] = {}
    counts = dict.fromkeys(RESOURCE_TYPES, 0)
    try:
        for kind in RESOURCE_TYPES:
            partial[kind], handles[kind] = private_file(paths[kind])
        seen: set[str] = set()
        for long_frame, visit_frame in zip(values.frames(session, progress), visits.frames(session)):
            _write_chunk(long_frame, visit_frame, visits, seen, handles, counts)
        for handle in handles.values():
            handle.close()
        written = [
            run.WrittenFile(
                kind, paths[kind], sha256_of(partial[kind]), partial[kind].stat().st_size, counts[kind]
            )
            for kind in RESOURCE_TYPES
        ]
        selected = run.summary_text(values, counts["Observation"], len(written) + 1).rsplit(" → ", 1)[0]
        summary = f"{selected} → {_resources_words(counts)} in {len(written) + 1} files"
        manifest = run.build_manifest(values, "fhir", written, summary=summary)
        manifest["criteria"] = run.build_manifest(visits, "fhir", written)["criteria"]
        manifest["level"] = "resources: Observation per long-level row, DiagnosticReport per visit"
        manifest["fhir"] = {
            "version": f"R4 ({FHIR_VERSION})",
            "files": {kind: f"{kind}.ndjson" for kind in RESOURCE_TYPES},
            "code_systems": {
                "parameter": PARAMETER_SYSTEM,
                "context (components)": CONTEXT_SYSTEM,
                "study": STUDY_SYSTEM,
            },
            "units": f"UCUM ({UCUM})",
            "absences": (
                "a recorded absence is a finding: component response_absent with valueBoolean true; a value "
                "that cannot exist (no latency without a response) has dataAbsentReason not-applicable; a "
                "quantity never measured has no Observation"
            ),
            "dates": (
                "real dates (identified export)"
                if options.identified
                else "shifted dates"
                if options.dates == "shifted"
                else "no dates; extension days-since-first-visit only"
            ),
        }
        partial["manifest"], handle = private_file(paths["manifest"])
        with handle:
            handle.write((json.dumps(manifest, indent=2, ensure_ascii=False) + "\n").encode("utf-8"))
        run._audit(session, values, "fhir", written, username)
        for role, path in paths.items():
            partial[role].replace(path)
    except BaseException:
        for handle in handles.values():
            handle.close()
        for path in partial.values():
            path.unlink(missing_ok=True)
        raise
    files = [*written]
    files.append(
        run.WrittenFile(
            "manifest",
            paths["manifest"],
            sha256_of(paths["manifest"]),
            paths["manifest"].stat().st_size,
            None,
        )
    )
    return run.ExportResult(files, values.visit_count, counts["Observation"], manifest, summary)


def _resources_words(counts: dict[str, int]) -> str:
    return ", ".join(f"{counts[kind]:,} {kind}" for kind in RESOURCE_TYPES) + " resources"


def _write_chunk(
    long_frame: pd.DataFrame,
    visit_frame: pd.DataFrame,
    plan: ExportPlan,
    seen: set[str],
    handles: dict[str, IO[bytes]],
    counts: dict[str, int],
) -> None:
    """Resources of one chunk of visits: new Patients, then Observations, then DiagnosticReports."""
    options = plan.options
    for row in visit_frame.to_dict("records"):
        if row["export_id"] in seen:
            continue
        seen.add(row["export_id"])
        handles["Patient"].write(_line(patient(row["export_id"], row if options.identified else None)))
        counts["Patient"] += 1
    results: dict[tuple[str, int], list[str]] = {}
    for row in long_frame.to_dict("records"):
        key = (row["export_id"], int(row["visit_number"]))
        ids = results.setdefault(key, [])
        resource_id = f"{key[0]}-{key[1]}-{len(ids) + 1}"
        ids.append(resource_id)
        handles["Observation"].write(_line(observation(row, resource_id, options)))
        counts["Observation"] += 1
    for row in visit_frame.to_dict("records"):
        key = (row["export_id"], int(row["visit_number"]))
        handles["DiagnosticReport"].write(_line(report(row, plan, results.pop(key, []))))
        counts["DiagnosticReport"] += 1
    if results:  # both plans read the same visits in the same order; anything else is a bug
        raise TrackerError("The FHIR export's value and visit chunks disagree; nothing was written.")
