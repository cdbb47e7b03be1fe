"""Research export as FHIR R4 NDJSON (issue 13, point 9): every line of every file parses as its resource
against the FHIR models of ``fhir.resources`` (R4B, 4.3.0: the technical-correction release of R4, whose
Patient, Observation and DiagnosticReport keep R4's elements — from memory, not verified element by
element); references resolve; UCUM units; recorded absences as flagged findings; de-identified by the same
rules (byte scan for identifiers, export ids only, shifted or no dates); identified only with the role; the
manifest lists the files with their checksums — on both backends.

Data: the invented demo clinic with invented identities (tests/test_export.py builds it).
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
from pathlib import Path

import pytest
from fhir.resources.R4B.diagnosticreport import DiagnosticReport
from fhir.resources.R4B.observation import Observation
from fhir.resources.R4B.patient import Patient as FhirPatient
from pydantic import ValidationError

import tracker
from conftest import BACKENDS, new_database, run_cli
from test_export import USER, Demo, _identifying_strings, _populate
from tracker.services.access.permissions import Actor, NotPermitted
from tracker.services.export import ExportOptions, export_frame, write_export
from tracker.services.export.columns import criteria_alias

MODELS = {"Patient": FhirPatient, "Observation": Observation, "DiagnosticReport": DiagnosticReport}
# UCUM case-sensitive codes of the long level's units (UCUM specification, Regenstrief Institute; "Cel" is
# the degree Celsius, "uV" the microvolt).
UCUM_OF_UNIT = {
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


@pytest.fixture(scope="module", params=BACKENDS)
def demo(request, tmp_path_factory):
    folder = tmp_path_factory.mktemp(f"fhir_{request.param}")
    for url in new_database(request.param, folder):
        _populate(url)
        found = Demo(request.param, url)
        found.frame(level="visit")  # the first export creates the secret
        yield found
        found.engine.dispose()


def _write(demo: Demo, out: Path, **options):
    options.setdefault("criteria", ("efns-pns-2010-cidp",))
    with demo.sessions.begin() as session:
        return write_export(session, ExportOptions(**options), file_format="fhir", out=out, username=USER)


def _resources(folder: Path) -> dict[str, list[dict]]:
    """Every line of every NDJSON file, validated against its FHIR model (a failure raises)."""
    found: dict[str, list[dict]] = {}
    for kind, model in MODELS.items():
        lines = (folder / f"{kind}.ndjson").read_text(encoding="utf-8").splitlines()
        found[kind] = []
        for line in lines:
            model.model_validate_json(line)
            found[kind].append(json.loads(line))
    return found


@pytest.fixture(scope="module")
def shifted(demo, tmp_path_factory):
    folder = tmp_path_factory.mktemp("fhir_shifted")
    result = _write(demo, folder)
    return result, _resources(folder)


def test_every_line_validates_and_references_resolve(demo, shifted):
    result, found = shifted
    long = demo.frame(level="long")
    visits = demo.frame(level="visit")
    assert len(found["Observation"]) == len(long) == result.rows > 0
    assert len(found["DiagnosticReport"]) == len(visits) == result.visits
    assert len(found["Patient"]) == visits["export_id"].nunique()
    patients = {p["id"] for p in found["Patient"]}
    observations = {o["id"]: o for o in found["Observation"]}
    assert len(observations) == len(found["Observation"])  # ids are unique
    referenced = []
    for report in found["DiagnosticReport"]:
        assert report["subject"]["reference"].removeprefix("Patient/") in patients
        for ref in report.get("result", []):
            observation = observations[ref["reference"].removeprefix("Observation/")]
            assert observation["subject"] == report["subject"]
            assert observation["effectiveDateTime"] == report["effectiveDateTime"]
            referenced.append(observation["id"])
    assert sorted(referenced) == sorted(observations)  # every Observation belongs to one study


def test_a_broken_resource_fails_validation():
    # The validation in these tests can fail: a missing status and an unknown element are refused.
    with pytest.raises(ValidationError):
        Observation.model_validate({"resourceType": "Observation", "code": {"text": "x"}})
    with pytest.raises(ValidationError):
        Observation.model_validate(
            {"resourceType": "Observation", "status": "final", "code": {"text": "x"}, "patientName": "x"}
        )


def test_observations_carry_ucum_units_and_match_the_long_level(demo, shifted):
    _, found = shifted
    long = demo.frame(level="long")
    for observation, row in zip(found["Observation"], long.to_dict("records")):
        coding = observation["code"]["coding"][0]
        assert coding["system"] == "urn:ncs-tracker:parameter" and coding["code"] == row["quantity"]
        assert coding["display"] == observation["code"]["text"] and " " in coding["display"] + " "
        parts = {c["code"]["coding"][0]["code"]: c for c in observation["component"]}
        assert parts["nerve"]["valueString"] == row["nerve"]
        assert parts["side"]["valueString"] == row["side"]
        assert row["nerve"].replace("_", " ") in observation["bodySite"]["text"]
        if row["value"] == row["value"]:  # a value
            quantity = observation["valueQuantity"]
            assert quantity["value"] == pytest.approx(row["value"])
            assert quantity["system"] == "http://unitsofmeasure.org"
            assert quantity["code"] == UCUM_OF_UNIT[row["unit"]] and quantity["unit"] == row["unit"]
            assert "dataAbsentReason" not in observation
        else:
            assert "valueQuantity" not in observation
            assert observation["dataAbsentReason"]["coding"][0]["code"] == "not-applicable"
        assert ("response_absent" in parts) == bool(row["response_absent"])
    units = {o["valueQuantity"]["code"] for o in found["Observation"] if "valueQuantity" in o}
    assert {"ms", "mV", "uV", "mm", "m/s", "%", "Cel"} <= units


def test_recorded_absences_are_flagged_findings(demo, shifted):
    _, found = shifted
    absent = [
        o
        for o in found["Observation"]
        if any(c["code"]["coding"][0]["code"] == "response_absent" for c in o["component"])
    ]
    assert absent, "the demo clinic records absent F-waves"
    for observation in absent:
        flag = next(
            c for c in observation["component"] if c["code"]["coding"][0]["code"] == "response_absent"
        )
        assert flag["valueBoolean"] is True
    # FHIR R4 obs-6: dataAbsentReason only when there is no value.
    for observation in found["Observation"]:
        assert not ("dataAbsentReason" in observation and "valueQuantity" in observation)
    assert any(o["code"]["coding"][0]["code"] == "f_latency" and "dataAbsentReason" in o for o in absent)


def test_reports_hold_outcomes_and_the_caution(demo, shifted):
    _, found = shifted
    visits = demo.frame(level="visit").to_dict("records")
    assert len(visits) == len(found["DiagnosticReport"])
    version = next(c["version"] for c in shifted[0].manifest["criteria"] if c["id"] == "efns-pns-2010-cidp")
    checked = 0
    for report, row in zip(found["DiagnosticReport"], visits):
        assert report["id"] == f"{row['export_id']}-{row['visit_number']}"
        assert report["conclusion"].endswith(tracker.CAUTION)
        assert "efns-pns-2010-cidp" in report["conclusion"]
        outcome = row[f"{criteria_alias('efns-pns-2010-cidp')}__outcome"]
        if isinstance(outcome, str):
            assert f"efns-pns-2010-cidp {version}): {outcome.replace('_', ' ')}" in report["conclusion"]
            checked += 1
    assert checked > 0
    assert any("definite" in r["conclusion"] for r in found["DiagnosticReport"])


def test_de_identified_by_the_same_rules(demo, shifted, tmp_path):
    result, found = shifted
    ids = demo.export_ids()
    for resource in found["Patient"]:
        assert set(resource) == {"resourceType", "id", "identifier"}
        assert resource["identifier"] == [{"system": "urn:ncs-tracker:export-id", "value": resource["id"]}]
        assert resource["id"] in ids.values()
    # Shifted dates: the same as the visit level's shifted dates, in the same order.
    visits = demo.frame(level="visit")
    assert [r["effectiveDateTime"] for r in found["DiagnosticReport"]] == [
        d.isoformat() for d in visits["visit_date_shifted"]
    ]
    # The byte scan for identifiers, over every file the FHIR export writes (manifest too).
    strings = _identifying_strings(demo)
    real_dates = set()
    with demo.sessions() as session:
        from sqlalchemy import select

        from tracker.db.models import Visit

        real_dates = {d.isoformat() for d in session.scalars(select(Visit.visit_date))}
    relative = _write(demo, tmp_path / "relative", dates="relative")
    written = [f.path for f in result.files] + [f.path for f in relative.files]
    assert len(written) == 8
    for path in written:
        lowered = path.read_bytes().lower()
        assert [s for s in strings if s.lower().encode("utf-8") in lowered] == [], path.name
    relative_text = b"".join(f.path.read_bytes() for f in relative.files)
    assert b"effectiveDateTime" not in relative_text
    assert [d for d in real_dates if d.encode() in relative_text] == []
    for resource in _resources(tmp_path / "relative")["DiagnosticReport"]:
        assert resource["extension"][0]["url"] == "urn:ncs-tracker:extension:days-since-first-visit"


def test_manifest_lists_the_files_with_checksums(shifted):
    result, _ = shifted
    manifest = result.manifest
    assert manifest["caution"] == tracker.CAUTION and manifest["format"] == "fhir"
    listed = {entry["name"]: entry for entry in manifest["files"]}
    assert set(listed) == {"Patient.ndjson", "Observation.ndjson", "DiagnosticReport.ndjson"}
    for written in result.files:
        if written.role == "manifest":
            assert json.loads(written.path.read_text(encoding="utf-8")) == manifest
            continue
        entry = listed[written.path.name]
        assert entry["sha256"] == hashlib.sha256(written.path.read_bytes()).hexdigest()
        assert entry["rows"] == len(written.path.read_text(encoding="utf-8").splitlines())
    assert "Patient" in result.summary and "Observation" in result.summary


def test_same_options_give_identical_bytes(demo, tmp_path):
    a = _write(demo, tmp_path / "a", chunk_visits=3)
    b = _write(demo, tmp_path / "b")
    for x, y in zip(a.files, b.files):
        if x.role != "manifest":  # the manifest records the chunk size
            assert x.path.read_bytes() == y.path.read_bytes(), x.role


def test_identified_needs_the_role(demo, tmp_path):
    with demo.sessions.begin() as session, pytest.raises(NotPermitted):
        write_export(
            session,
            ExportOptions(identified=True, criteria=("efns-pns-2010-cidp",)),
            file_format="fhir",
            out=tmp_path / "refused",
            username=USER,
        )
    assert not (tmp_path / "refused" / "Patient.ndjson").exists()


def test_cli_writes_fhir_files(demo, tmp_path, capsys):
    out_folder = str(tmp_path / "f")
    code, out, err = run_cli(
        capsys,
        "--db",
        demo.url,
        "export",
        "--format",
        "fhir",
        "--criteria",
        "efns-pns-2010-cidp",
        "--out",
        out_folder,
    )
    assert code == 0, err
    assert "Observation.ndjson" in out and tracker.CAUTION in out
    found = _resources(tmp_path / "f")
    assert found["Patient"] and found["Observation"] and found["DiagnosticReport"]


def test_identified_export_names_the_patient_with_the_role(demo, tmp_path):
    actor = _coordinator(demo)
    with demo.sessions.begin() as session:
        write_export(
            session,
            ExportOptions(identified=True, criteria=("efns-pns-2010-cidp",)),
            file_format="fhir",
            out=tmp_path / "identified",
            username=actor.name,
            actor=actor,
        )
    found = _resources(tmp_path / "identified")
    systems = {i["system"] for p in found["Patient"] for i in p["identifier"]}
    assert "urn:ncs-tracker:patient-code" in systems
    with demo.sessions() as session:
        frame = export_frame(
            session,
            ExportOptions(identified=True, criteria=("efns-pns-2010-cidp",)),
            username=actor.name,
            actor=actor,
        )
    assert [r["effectiveDateTime"] for r in found["DiagnosticReport"]] == [
        d.isoformat() for d in frame["visit_date"]
    ]
    assert isinstance(frame["visit_date"].iloc[0], dt.date)


def _coordinator(demo: Demo) -> Actor:
    """An invented coordinator account, authenticated (as after a password check). Added last: the other tests
    of this module run without accounts."""
    from tracker.db.models import User
    from tracker.services.access import accounts

    name = "coordinator-invented-fhir"
    with demo.sessions.begin() as session:
        session.add(
            User(username=name, role="coordinator", password_hash=accounts.hash_password("invented-pw-1"))
        )
    return Actor(name, "coordinator", "os-login", authenticated=True)
