"""Research export (issue 5): round trip, de-identification, determinism, file formats, spreadsheet safety,
filters — on both backends.

The clinic is the invented demo clinic (demo_data/, invented). The module's database adds invented
identities on top (record numbers, names, birth dates, examiners, laboratories, treatment notes), invented
formula-like recording sites, and invented birth years for two patients to reach ages 89 and over.
"""

from __future__ import annotations

import csv
import datetime as dt
import io
import json
import zipfile
from pathlib import Path

import openpyxl
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from sqlalchemy import select, update

from conftest import BACKENDS, DEMO, new_database
from tracker.db import migrate
from tracker.db.models import (
    NerveTest,
    OutcomeScore,
    Patient,
    PatientIdentity,
    StimulationSite,
    Treatment,
    Visit,
)
from tracker.db.session import make_engine, make_session_factory
from tracker.errors import TrackerError
from tracker.services import preferences
from tracker.services.export import deidentify, export_frame, write_export
from tracker.services.export import files as export_files
from tracker.services.export.tables import ExportOptions
from tracker.services.importing import import_file

DEMO_FILES = ("measurements.csv", "treatments.csv", "scores.csv")
USER = "export-tester"
# Invented identities (no real person): record number, name, birth date per demo patient.
IDENTITIES = {
    "DEMO-01": ("MRN-Q7734-ZX", "Orsolya Brandwijk-Tamsin", dt.date(1961, 3, 4)),
    "DEMO-02": ("MRN-Q7735-ZY", "Evander Quillfeather", dt.date(1954, 11, 27)),
    "DEMO-03": ("MRN-Q7736-ZZ", "Marisol Okonkwo-Hale", dt.date(1970, 7, 19)),
    "DEMO-04": ("MRN-Q7737-YA", "Thaddeus Vrancken", dt.date(1935, 1, 30)),
    "DEMO-05": ("MRN-Q7738-YB", "Ysolde Farrowmere", dt.date(1933, 8, 12)),
    "DEMO-06": ("MRN-Q7739-YC", "Casimir Lindqvist-Obi", dt.date(1966, 5, 8)),
}
EXAMINERS = ("Dr Petronella Gwynnemoor", "Dr Anselm Rautakorpi")
LABORATORIES = ("Fenwick Vale Neurophysiology Unit", "Harrowgate Clinical EMG Suite")
# Text a spreadsheet would evaluate (formula injection; common practice, no source), put in an exported field.
FORMULA_SITES = ('=HYPERLINK("http://example.invalid","x")', "+1+1", "-2+3", "@SUM(1)", "\tlead", "\rlead")


def _populate(url: str) -> None:
    migrate.upgrade(url)
    engine = make_engine(url)
    with make_session_factory(engine).begin() as session:
        for name in DEMO_FILES:
            import_file(session, DEMO / name, username=USER)
        patients = {p.code: p for p in session.scalars(select(Patient))}
        for code, (record_number, full_name, birth_date) in IDENTITIES.items():
            session.add(
                PatientIdentity(
                    patient_id=patients[code].id,
                    record_number=record_number,
                    full_name=full_name,
                    birth_date=birth_date,
                )
            )
        # Invented birth years around the Safe Harbor boundary: DEMO-04 is 89 in 2024 and 90 in 2025
        # (year difference); DEMO-05 is 92 in 2025.
        session.execute(update(Patient).where(Patient.code == "DEMO-04").values(birth_year=1935))
        session.execute(update(Patient).where(Patient.code == "DEMO-05").values(birth_year=1933))
        for number, visit in enumerate(session.scalars(select(Visit).order_by(Visit.id))):
            visit.examiner = EXAMINERS[number % 2]
            visit.laboratory = LABORATORIES[number % 2]
        for number, treatment in enumerate(session.scalars(select(Treatment).order_by(Treatment.id))):
            treatment.note = (
                f"invented note {number}: phoned Zebulon Marchetti-Quayle on 0311-555-{number:04d}"
            )
        tests = session.scalars(
            select(NerveTest)
            .where(NerveTest.modality == "motor")
            .order_by(NerveTest.id)
            .limit(len(FORMULA_SITES))
        ).all()
        for test, text in zip(tests, FORMULA_SITES):
            test.recording_site = text
        # Invented scores around DEMO-01's visit of 2023-10-10 to test the nearest-score rule (ONLS is not in
        # the demo files): 10 days before and 10 days after (a tie: the earlier counts), and 31 days after
        # the visit of 2023-05-16 (outside the ±30-day window).
        demo_01 = patients["DEMO-01"].id
        session.add_all(
            [
                OutcomeScore(patient_id=demo_01, score_date=dt.date(2023, 9, 30), scale="onls", value=3),
                OutcomeScore(patient_id=demo_01, score_date=dt.date(2023, 10, 20), scale="onls", value=4),
                OutcomeScore(patient_id=demo_01, score_date=dt.date(2023, 6, 16), scale="onls", value=5),
            ]
        )
    engine.dispose()


class Demo:
    def __init__(self, backend: str, url: str):
        self.backend = backend
        self.url = url
        self.engine = make_engine(url)
        self.sessions = make_session_factory(self.engine)

    # One criteria set unless a test asks for others: each set costs time, and
    # most tests are not about verdicts.
    def frame(self, **options) -> pd.DataFrame:
        options.setdefault("criteria", ("efns-pns-2010-cidp",))
        with self.sessions.begin() as session:
            return export_frame(session, ExportOptions(**options), username=USER)

    def write(self, out: Path, file_format: str, **options):
        options.setdefault("criteria", ("efns-pns-2010-cidp",))
        with self.sessions.begin() as session:
            return write_export(
                session, ExportOptions(**options), file_format=file_format, out=out, username=USER
            )

    def export_ids(self) -> dict[str, str]:
        with self.sessions() as session:
            secret = bytes.fromhex(preferences.get(session, preferences.EXPORT_SECRET_KEY))
            return {
                code: deidentify.export_id(secret, code) for code in session.scalars(select(Patient.code))
            }


@pytest.fixture(scope="module", params=BACKENDS)
def demo(request, tmp_path_factory):
    folder = tmp_path_factory.mktemp(f"export_{request.param}")
    for url in new_database(request.param, folder):
        _populate(url)
        found = Demo(request.param, url)
        found.frame(level="visit")  # the first export creates the secret
        yield found
        found.engine.dispose()


def _demo_rows() -> list[dict[str, str]]:
    with open(DEMO / "measurements.csv", encoding="utf-8", newline="") as handle:
        return list(csv.DictReader(handle))


def _read_csv(path: Path) -> pd.DataFrame:
    return pd.read_csv(path, dtype={"export_id": str})


# -- round trip ----------------------------------------------------------------------------------------------


def test_nerve_and_segment_values_round_trip_to_the_demo_file(demo, tmp_path):
    ids = demo.export_ids()
    nerve = _read_csv(demo.write(tmp_path / "n", "csv", level="nerve").files[0].path)
    segment = _read_csv(demo.write(tmp_path / "s", "csv", level="segment").files[0].path)
    # Demo data, invented: DEMO-01's first visit (2023-02-14), median right motor, site 1 latency 7.05 ms
    # and site 2 (elbow) 222 mm above it at 14.00 ms.
    rows = [
        r
        for r in _demo_rows()
        if r["patient"] == "DEMO-01"
        and r["visit_date"] == "2023-02-14"
        and r["nerve"] == "median"
        and r["modality"] == "motor"
    ]
    assert [r["latency_ms"] for r in rows] == ["7.05", "14.00"]
    median = nerve[
        (nerve["export_id"] == ids["DEMO-01"])
        & (nerve["days_since_first_visit"] == 0)
        & (nerve["nerve"] == "median")
        & (nerve["modality"] == "motor")
    ]
    assert median["distal_latency_ms"].tolist() == [7.05]
    assert median["distal_amplitude_mv"].tolist() == [4.3]
    forearm = segment[
        (segment["export_id"] == ids["DEMO-01"])
        & (segment["days_since_first_visit"] == 0)
        & (segment["nerve"] == "median")
        & (segment["site_order"] == 2)
    ]
    # By hand: 222 mm / (14.00 − 7.05) ms = 31.942446 m/s.
    assert forearm["segment_velocity_m_per_s"].iloc[0] == pytest.approx(222 / (14.00 - 7.05), abs=1e-6)
    assert forearm["segment"].iloc[0] == "wrist → elbow"


def test_every_distal_value_equals_the_database(demo, tmp_path):
    nerve = _read_csv(demo.write(tmp_path / "n", "csv", level="nerve").files[0].path)
    ids = demo.export_ids()
    with demo.sessions() as session:
        stored = pd.DataFrame(
            session.execute(
                select(
                    Patient.code,
                    Visit.visit_date,
                    NerveTest.nerve,
                    NerveTest.side,
                    NerveTest.modality,
                    StimulationSite.latency_ms,
                    StimulationSite.amplitude_mv,
                    StimulationSite.amplitude_uv,
                    NerveTest.temperature_c,
                    NerveTest.f_latency_ms,
                )
                .join(Visit, Visit.patient_id == Patient.id)
                .join(NerveTest, NerveTest.visit_id == Visit.id)
                .join(StimulationSite, StimulationSite.nerve_test_id == NerveTest.id)
                .where(StimulationSite.site_order == 1)
            ).all(),
            columns=[
                "code",
                "visit_date",
                "nerve",
                "side",
                "modality",
                "latency",
                "mv",
                "uv",
                "temperature",
                "f_latency",
            ],
        )
    first = stored.groupby("code")["visit_date"].transform("min")
    stored["export_id"] = stored["code"].map(ids)
    stored["days_since_first_visit"] = [(d - f).days for d, f in zip(stored["visit_date"], first)]
    merged = stored.merge(
        nerve, on=["export_id", "days_since_first_visit", "nerve", "side", "modality"], validate="one_to_one"
    )
    assert len(merged) == len(stored) == len(nerve) == 207  # 207 nerve tests in the demo file (invented)
    for exported, expected in (
        ("distal_latency_ms", "latency"),
        ("distal_amplitude_mv", "mv"),
        ("distal_amplitude_uv", "uv"),
        ("temperature_c", "temperature"),
        ("f_latency_ms", "f_latency"),
    ):
        pd.testing.assert_series_equal(
            merged[exported].astype(float), merged[expected].astype(float), check_names=False
        )


def test_visit_level_treatment_and_scores_at_the_visit(demo):
    visits = demo.frame(level="visit")
    ids = demo.export_ids()
    one = visits[visits["export_id"] == ids["DEMO-01"]].set_index("days_since_first_visit")
    # Demo data, invented (treatments.csv): DEMO-01 loads IVIg 2023-02-20…24, maintenance from 2023-03-17
    # (1 g/kg every 21 days). By hand: 2023-02-14 → 2023-05-16 is 14 + 31 + 30 + 16 = 91 days, and
    # 2023-03-17 → 2023-05-16 is 14 + 30 + 16 = 60 days.
    assert pd.isna(one.loc[0, "therapy_at_visit"])
    assert one.loc[91, "therapy_at_visit"] == "ivig"
    assert (
        one.loc[91, "therapy_dose"],
        one.loc[91, "therapy_dose_unit"],
        one.loc[91, "therapy_interval_days"],
    ) == (1.0, "g/kg", 21)
    assert one.loc[91, "therapy_days_since_start"] == 60
    # scores.csv (invented): INCAT 5 on the first visit day, 4 on 2023-05-16.
    assert (one.loc[0, "score_incat"], one.loc[0, "score_incat_offset_days"]) == (5.0, 0)
    assert one.loc[91, "score_incat"] == 4.0
    # Project rule (documented in the dictionary): nearest within ±30 days, the earlier on a tie.
    # 2023-02-14 → 2023-10-10 is 91 + 147 = 238 days (May 16 → Oct 10: 15 + 30 + 31 + 31 + 30 + 10 = 147).
    assert (one.loc[238, "score_onls"], one.loc[238, "score_onls_offset_days"]) == (3.0, -10)
    assert pd.isna(one.loc[91, "score_onls"])  # the only nearby ONLS is 31 days after
    assert "Zebulon" not in visits.to_csv()  # treatment notes are never exported


# -- de-identification ---------------------------------------------------------------------------------------


def _identifying_strings(demo) -> list[str]:
    """Every identifying string stored in the database, in the renderings a file could hold."""
    strings: list[str] = []
    with demo.sessions() as session:
        for record_number, full_name, birth_date in session.execute(
            select(PatientIdentity.record_number, PatientIdentity.full_name, PatientIdentity.birth_date)
        ):
            strings += [
                record_number,
                full_name,
                *[part for part in full_name.replace("-", " ").split() if len(part) > 3],
            ]
            strings += [
                birth_date.isoformat(),
                birth_date.strftime("%d/%m/%Y"),
                birth_date.strftime("%m/%d/%Y"),
                birth_date.strftime("%d.%m.%Y"),
                birth_date.strftime("%Y%m%d"),
                f"{birth_date.day} {birth_date.strftime('%B %Y')}",
            ]
        strings += [e for e in session.scalars(select(Visit.examiner).distinct()) if e]
        strings += [lab for lab in session.scalars(select(Visit.laboratory).distinct()) if lab]
        strings += [n for n in session.scalars(select(Treatment.note)) if n]
        strings += list(session.scalars(select(Patient.code)))
    assert len(strings) > 60 and "DEMO-01" in strings and "Evander Quillfeather" in strings
    return strings


def _file_texts(path: Path) -> list[bytes]:
    """The bytes of a file, plus what compression hides: xlsx members decompressed, Parquet values decoded."""
    raw = path.read_bytes()
    texts = [raw]
    if path.suffix == ".xlsx":
        with zipfile.ZipFile(path) as archive:
            texts += [archive.read(name) for name in archive.namelist()]
    if path.suffix == ".parquet":
        table = pq.read_table(path)
        texts.append(str(table.schema.metadata).encode())
        texts.append("\n".join(str(v) for column in table.columns for v in column.to_pylist()).encode())
    return texts


@pytest.mark.parametrize("file_format", ["csv", "parquet", "xlsx"])
def test_no_identifying_string_in_any_file(demo, tmp_path, file_format):
    strings = _identifying_strings(demo)
    written = []
    for level in ("visit", "nerve", "segment", "long"):
        written += [f.path for f in demo.write(tmp_path / level, file_format, level=level).files]
    # data, dictionary (not for xlsx: a sheet), limits table, criteria table, manifest
    assert len(written) == 4 * (5 if file_format != "xlsx" else 4)
    assert sum(p.name.endswith((".limits.csv", ".criteria.csv")) for p in written) == 8
    # The visit level's treatment-response columns (regimen, response, score
    # changes) are among the scanned bytes.
    assert any(
        b"response_trial_aincat" in text and b"regimen_start_days_since_first_visit" in text
        for text in _file_texts(written[0])
    )
    for path in written:
        for text in _file_texts(path):
            lowered = text.lower()
            found = [s for s in strings if s.lower().encode("utf-8") in lowered]
            assert found == [], f"{path.name} holds identifying text"


def test_shifted_dates_keep_intervals_and_move_every_date(demo):
    visits = demo.frame(level="visit", dates="shifted")
    ids = demo.export_ids()
    real: dict[str, list[dt.date]] = {}
    for row in _demo_rows():
        real.setdefault(row["patient"], [])
        day = dt.date.fromisoformat(row["visit_date"])
        if day not in real[row["patient"]]:
            real[row["patient"]].append(day)
    for code, days in real.items():
        days = sorted(days)
        shifted = (
            visits.loc[visits["export_id"] == ids[code]]
            .sort_values("visit_number")["visit_date_shifted"]
            .tolist()
        )
        assert len(shifted) == len(days)
        offset = (shifted[0] - days[0]).days
        assert 1 <= abs(offset) <= 365  # project rule: a shift of 1 to 365 days, never 0
        assert [(s - d).days for s, d in zip(shifted, days)] == [offset] * len(days)
        assert visits.loc[visits["export_id"] == ids[code], "days_since_first_visit"].tolist() == [
            (d - days[0]).days for d in days
        ]


def test_relative_dates_have_no_date_column(demo, tmp_path):
    visits = demo.frame(level="visit", dates="relative")
    assert "visit_date_shifted" not in visits and "visit_date" not in visits
    schema = pq.read_schema(
        demo.write(tmp_path / "r", "parquet", level="nerve", dates="relative").files[0].path
    )
    assert not any(pa.types.is_date(field.type) for field in schema)


def test_ages_over_89_are_top_coded_at_90_with_a_flag(demo):
    # HIPAA Safe Harbor, 45 CFR 164.514(b)(2)(i)(C): ages over 89 are aggregated
    # into one category of 90 or older.
    visits = demo.frame(level="visit")
    ids = demo.export_ids()
    assert visits["age_at_visit"].dtype == "Int64" and visits["age_top_coded"].dtype == "boolean"
    # Invented birth years: DEMO-04 born 1935, visits 2024 (89) ×3 and 2025 (90);
    # DEMO-05 born 1933, visits 2025 (92 → 90, top-coded).
    four = visits[visits["export_id"] == ids["DEMO-04"]]
    assert four["age_at_visit"].tolist() == [89, 89, 89, 90]
    assert four["age_top_coded"].tolist() == [False, False, False, True]
    five = visits[visits["export_id"] == ids["DEMO-05"]]
    assert set(five["age_at_visit"]) == {90} and set(five["age_top_coded"]) == {True}
    # DEMO-01 born 1961 (demo file, invented), first visit in 2023: 62.
    one = visits[visits["export_id"] == ids["DEMO-01"]]
    assert (one["age_at_visit"].iloc[0], one["age_top_coded"].iloc[0]) == (62, False)
    assert visits["age_at_visit"].max() == 90  # nothing above the top code


def test_export_ids_stable_in_one_database_and_unlinkable_across_two(demo, tmp_path):
    first = demo.frame(level="visit", dates="relative")["export_id"]
    again = demo.frame(level="visit", dates="relative")["export_id"]
    assert first.tolist() == again.tolist()
    assert first.nunique() == 6
    for url in new_database(demo.backend, tmp_path):
        _populate(url)
        other = Demo(demo.backend, url)
        try:
            theirs = other.frame(level="visit", dates="relative")
            assert len(theirs) == len(first)
            assert not set(theirs["export_id"]) & set(first)  # same patients, different secret
            # Shifts differ too: the same real visit gets another shifted date.
            assert (
                other.frame(level="visit")["visit_date_shifted"].tolist()
                != demo.frame(level="visit")["visit_date_shifted"].tolist()
            )
        finally:
            other.engine.dispose()


# -- files ---------------------------------------------------------------------------------------------------


@pytest.mark.parametrize("file_format", ["csv", "parquet", "xlsx"])
def test_same_options_twice_give_identical_bytes(demo, tmp_path, file_format):
    options = {
        "level": "nerve",
        "criteria": ("efns-pns-2010-cidp", "ean-pns-2021-cidp"),
        "diagnoses": ("cidp",),
    }
    one = demo.write(tmp_path / "one" / "cohort", file_format, **options)
    two = demo.write(tmp_path / "two" / "cohort", file_format, **options)
    assert [f.path.name for f in one.files] == [f.path.name for f in two.files]
    for a, b in zip(one.files, two.files):
        assert a.path.read_bytes() == b.path.read_bytes(), a.path.name
    assert one.manifest["files"][0]["rows"] > 0
    if file_format == "xlsx":
        # Two exports within one 2-second zip time step would match anyway: check the fixed times directly.
        with zipfile.ZipFile(one.files[0].path) as archive:
            assert {entry.date_time for entry in archive.infolist()} == {(1980, 1, 1, 0, 0, 0)}
            core = archive.read("docProps/core.xml").decode()
        assert core.count("1980-01-01T00:00:00Z") == 2


def test_chunk_size_does_not_change_the_data(demo, tmp_path):
    # DEMO-01 and DEMO-02 have 11 visits (demo file, invented): three chunks of 4, 4 and 3 against one.
    options = {
        "level": "segment",
        "patients": ("DEMO-01", "DEMO-02"),
        "criteria": ("efns-pns-2010-cidp", "efns-pns-2010-mmn"),
    }
    small = demo.write(tmp_path / "small", "csv", chunk_visits=4, **options)
    whole = demo.write(tmp_path / "whole", "csv", chunk_visits=1000, **options)
    assert small.rows == whole.rows > 0
    assert small.files[0].path.read_bytes() == whole.files[0].path.read_bytes()


def test_manifest_names_versions_filters_counts_and_hashes(demo, tmp_path):
    result = demo.write(
        tmp_path / "m",
        "parquet",
        level="visit",
        outcomes=(("efns-pns-2010-cidp", "definite"),),
        patients=("DEMO-01", "DEMO-02"),
    )
    manifest = json.loads(result.files[-1].path.read_text(encoding="utf-8"))
    assert manifest == result.manifest
    import tracker

    assert manifest["tool_version"] == tracker.__version__ and manifest["caution"] == tracker.CAUTION
    assert {c["id"]: c["version"] for c in manifest["criteria"]}["efns-pns-2010-cidp"] == "2010.3"
    assert manifest["limits"] == {"name": "default", "version": 2}
    assert manifest["filters"]["outcome"] == ["efns-pns-2010-cidp=definite"]
    ids = demo.export_ids()
    # Patient codes are not written, not even as the filter: the export ids stand in.
    assert manifest["filters"]["patients"] == {
        "count": 2,
        "export_ids": sorted([ids["DEMO-01"], ids["DEMO-02"]]),
    }
    for entry, written in zip(manifest["files"], result.files):
        assert entry["sha256"] == export_files.sha256_of(written.path)
        assert entry["bytes"] == written.path.stat().st_size
    assert manifest["files"][0]["rows"] == pq.read_metadata(result.files[0].path).num_rows


def test_excel_opens_with_openpyxl_and_has_the_dictionary_sheet(demo, tmp_path):
    result = demo.write(tmp_path / "x", "xlsx", level="segment")
    book = openpyxl.load_workbook(result.files[0].path)
    assert book.sheetnames == ["data", "dictionary"]
    header = [c.value for c in book["data"][1]]
    dictionary = [[c.value for c in row] for row in book["dictionary"].iter_rows()]
    assert dictionary[0] == [
        "column",
        "meaning",
        "unit",
        "type",
        "derivation",
        "depends_on",
        "pandas_dtype",
        "parquet_type",
        "values",
    ]
    assert [row[0] for row in dictionary[1:] if not row[0].startswith("(")] == header
    assert dictionary[-1][0] == "(caution)" and "qualified clinician" in dictionary[-1][1]
    velocity = dict((row[0], row) for row in dictionary[1:])["segment_velocity_m_per_s"]
    assert velocity[2] == "m/s" and velocity[3] == "decimal number"
    verdict = dict((row[0], row) for row in dictionary[1:])["efns2010_cidp__cv"]
    assert "efns-pns-2010-cidp version 2010.3" in verdict[5]
    assert "normal limits default version 2" in verdict[5]
    assert book["data"].max_row == result.rows + 1
    # Fixed document dates (byte-identical files).
    assert book.properties.created == book.properties.modified == dt.datetime(1980, 1, 1)


def test_parquet_column_types(demo, tmp_path):
    schema = pq.read_schema(demo.write(tmp_path / "v", "parquet", level="visit").files[0].path)
    types = {field.name: field.type for field in schema}
    assert types["visit_date_shifted"] == pa.date32()
    assert types["days_since_first_visit"] == pa.int32() and types["visit_number"] == pa.int32()
    assert types["height_cm"] == pa.float64() and types["score_incat"] == pa.float64()
    assert types["age_at_visit"] == pa.int32()  # a number, top-coded at 90 (issue 13; was text "90+")
    schema = pq.read_schema(demo.write(tmp_path / "n", "parquet", level="nerve").files[0].path)
    types = {field.name: field.type for field in schema}
    for name in (
        "distal_latency_ms",
        "distal_amplitude_mv",
        "distal_amplitude_uv",
        "f_latency_ms",
        "temperature_c",
    ):
        assert types[name] == pa.float64(), name
    assert types["f_absent"] == pa.bool_() and types["nerve"] == pa.string()
    table = pq.read_table(demo.write(tmp_path / "l", "parquet", level="long").files[0].path)
    assert (
        table.schema.field("value").type == pa.float64()
        and table.schema.field("site_order").type == pa.int32()
    )
    assert set(table.column("unit").to_pylist()) >= {"ms", "mV", "µV", "mm", "m/s", "%", "°C"}


# -- spreadsheet safety --------------------------------------------------------------------------------------


def test_neutralise_text_prefixes_formula_starts_only():
    # Formula injection defence: common practice (prefix a single quote), no single source.
    for text in ("=1+2", "+1", "-1", "@SUM(A1)", "\tx", "\rx"):
        assert export_files.neutralise_text(text) == "'" + text
    for value in ("wrist → elbow", "a=b", "", 3.5, -3.5, 0, None):
        assert export_files.neutralise_text(value) == value
    columns = [export_files.Column("t", "text", "", "", ""), export_files.Column("x", "float", "", "", "")]
    frame = pd.DataFrame({"t": pd.Series(["=cmd", "ok", None], dtype="str"), "x": [-1.5, 2.0, -0.25]})
    out = export_files.neutralise_frame(frame, columns)
    assert out["t"].tolist()[:2] == ["'=cmd", "ok"] and pd.isna(out["t"].iloc[2])
    assert out["x"].tolist() == [-1.5, 2.0, -0.25]


def test_formula_like_text_is_neutralised_in_csv_and_excel(demo, tmp_path):
    path = demo.write(tmp_path / "c", "csv", level="nerve").files[0].path
    with open(path, encoding="utf-8", newline="") as handle:
        cells = [cell for row in csv.reader(handle) for cell in row]
    assert "'" + FORMULA_SITES[0] in cells and "'-2+3" in cells and "'\tlead" in cells
    for cell in cells:
        assert not cell.startswith(("=", "+", "@", "\t", "\r")), cell
        if cell.startswith("-"):
            float(cell)  # a negative number, written as a number
    book = openpyxl.load_workbook(demo.write(tmp_path / "x", "xlsx", level="segment").files[0].path)
    numbers = 0
    for row in book["data"].iter_rows(min_row=2):
        for cell in row:
            assert cell.data_type != "f"
            if isinstance(cell.value, str):
                assert not cell.value.startswith(export_files.FORMULA_STARTS)
            elif isinstance(cell.value, float) and cell.value < 0:
                numbers += 1
    assert numbers > 0  # negative reductions (area rising over a segment) stay numbers
    sites = openpyxl.load_workbook(demo.write(tmp_path / "y", "xlsx", level="nerve").files[0].path)["data"]
    column = [c.value for c in sites[1]].index("recording_site")
    values = {row[column].value for row in sites.iter_rows(min_row=2)}
    # XML end-of-line handling turns a stored carriage return into a line feed when the sheet is read back.
    assert {"'" + text.replace("\r", "\n") for text in FORMULA_SITES} <= values


def test_excel_row_limit_is_refused_and_partial_files_removed(demo, tmp_path, monkeypatch):
    monkeypatch.setattr(export_files, "EXCEL_MAX_DATA_ROWS", 10)
    with pytest.raises(TrackerError, match="most one Excel sheet holds"):
        demo.write(tmp_path / "big", "xlsx", level="nerve")
    assert list(tmp_path.iterdir()) == []


# -- filters -------------------------------------------------------------------------------------------------


def test_filters_select_the_right_visits(demo):
    ids = demo.export_ids()
    rows = _demo_rows()
    visits_of = {}
    for row in rows:
        visits_of.setdefault(row["patient"], set()).add(row["visit_date"])
    mmn = demo.frame(level="visit", diagnoses=("mmn",))
    assert set(mmn["export_id"]) == {ids["DEMO-04"]} and len(mmn) == len(visits_of["DEMO-04"]) == 4
    in_2024 = demo.frame(level="visit", date_from=dt.date(2024, 1, 1), date_to=dt.date(2024, 12, 31))
    expected = sorted((ids[p], d) for p, dates in visits_of.items() for d in dates if d.startswith("2024"))
    assert len(in_2024) == len(expected) == 10  # counted from the demo file (invented)
    two = demo.frame(level="nerve", patients=("DEMO-02", "DEMO-05"))
    assert set(two["export_id"]) == {ids["DEMO-02"], ids["DEMO-05"]}
    assert two.groupby("export_id")["days_since_first_visit"].nunique().to_dict() == {
        ids["DEMO-02"]: 6,
        ids["DEMO-05"]: 3,
    }
    everything = demo.frame(level="visit", criteria=("efns-pns-2010-cidp",))
    definite = demo.frame(
        level="visit", criteria=("efns-pns-2010-cidp",), outcomes=(("efns-pns-2010-cidp", "definite"),)
    )
    assert definite.reset_index(drop=True).equals(
        everything[everything["efns2010_cidp__outcome"] == "definite"].reset_index(drop=True)
    )
    # DEMO-01's first visit is definite by hand (tests/test_demo_outcomes.py: distal latency in 4 nerves,
    # EFNS/PNS 2010, Van den Bergh PYK et al., Eur J Neurol 2010;17:356–363).
    assert ((definite["export_id"] == ids["DEMO-01"]) & (definite["days_since_first_visit"] == 0)).sum() == 1
    # An outcome filter on a set not shown still filters; its columns stay out.
    filtered = demo.frame(
        level="segment", criteria=("aan-1991-cidp",), outcomes=(("efns-pns-2010-cidp", "definite"),)
    )
    assert not any(c.startswith("efns2010_cidp") for c in filtered.columns)
    assert set(filtered["export_id"]) <= set(definite["export_id"])


@pytest.mark.parametrize(
    ("options", "message"),
    [
        ({"outcomes": (("efns-pns-2010-cidp", "definitely"),)}, "Unknown outcome"),
        ({"criteria": ("no-such-set",)}, "Unknown criteria set"),
        ({"patients": ("DEMO-99",)}, "No patient with code"),
        ({"date_from": dt.date(2025, 1, 1), "date_to": dt.date(2024, 1, 1)}, "date range is empty"),
    ],
)
def test_bad_options_are_refused(demo, options, message):
    with pytest.raises(TrackerError, match=message):
        demo.frame(level="visit", **options)


def test_long_level_lists_each_quantity_with_its_unit(demo):
    long = demo.frame(level="long", patients=("DEMO-01",))
    nerve = demo.frame(level="nerve", patients=("DEMO-01",))
    first = long[
        (long["days_since_first_visit"] == 0) & (long["nerve"] == "median") & (long["modality"] == "motor")
    ]
    latency = first[(first["quantity"] == "onset_latency")].set_index("site_order")["value"]
    assert latency.to_dict() == {1: 7.05, 2: 14.0}  # demo file, invented
    amplitude = first[(first["quantity"] == "amplitude") & (first["site_order"] == 1)]
    assert amplitude[["value", "unit", "origin"]].values.tolist() == [[4.3, "mV", "measured"]]
    velocity = first[first["quantity"] == "segment_velocity"]
    assert (
        velocity["value"].iloc[0] == pytest.approx(222 / (14.00 - 7.05), abs=1e-6)
        and velocity["unit"].iloc[0] == "m/s"
    )
    assert velocity["origin"].iloc[0] == "derived"
    sensory = long[(long["modality"] == "sensory") & (long["quantity"] == "amplitude")]
    assert set(sensory["unit"]) == {"µV"}
    # Every non-empty distal latency of the nerve level is one onset_latency row at site 1 of the long level,
    # and every distal site without a response is one more (flagged) row.
    at_site_1 = long[long["quantity"].eq("onset_latency") & long["site_order"].eq(1)]
    assert (~at_site_1["response_absent"]).sum() == nerve["distal_latency_ms"].notna().sum()
    assert at_site_1["response_absent"].sum() == nerve["no_response"].sum()


def test_io_read_back_of_csv_keeps_the_columns_of_the_dictionary(demo, tmp_path):
    result = demo.write(tmp_path / "d", "csv", level="visit")
    data = _read_csv(result.files[0].path)
    dictionary = pd.read_csv(io.StringIO(result.files[1].path.read_text(encoding="utf-8")))
    listed = dictionary["column"].tolist()
    assert [c for c in listed if not c.startswith("(")] == list(data.columns)
    assert listed[-1] == "(caution)"
    assert "qualified clinician" in dictionary["meaning"].iloc[-1]
    age = dictionary.set_index("column").loc["age_at_visit"]
    assert "top-coded at 90" in age["meaning"] and "164.514" in age["derivation"]
    assert "was text" in age["meaning"]  # what changed, said where the column is explained


def test_every_criteria_set_gives_outcomes_and_verdicts(demo):
    from tracker.criteria import engine

    nerves = demo.frame(level="nerve", criteria=())  # empty: every available set
    visits = demo.frame(level="visit", criteria=())
    for criteria_id in engine.available():
        prefix = criteria_id.split("-")[0]
        outcome = [c for c in visits.columns if c.startswith(prefix) and c.endswith("__outcome")]
        assert outcome, criteria_id
        verdicts = [c for c in nerves.columns if c.startswith(prefix) and "__" in c]
        assert verdicts, criteria_id
    verdicts = [c for c in nerves.columns if "__" in c and not c.endswith(("__value", "__segment"))]
    statuses = set(pd.unique(nerves[verdicts].to_numpy().ravel()))
    # DESIGN.md §5 vocabulary; the invented demo clinic has no gap in the exported verdicts, only exclusions.
    found = {s for s in statuses if isinstance(s, str)}
    assert {"met", "not_met", "not_applicable"} <= found
    assert found <= {"met", "not_met", "not_evaluable", "not_applicable"}
    # EFNS/PNS 2010 outcome values (DESIGN.md §5) and the hand-checked definite of DEMO-01's first visit.
    assert set(visits["efns2010_cidp__outcome"].dropna()) <= {"definite", "probable", "possible", "not_met"}
    ids = demo.export_ids()
    first = visits[(visits["export_id"] == ids["DEMO-01"]) & (visits["days_since_first_visit"] == 0)]
    assert first["efns2010_cidp__outcome"].tolist() == ["definite"]
    assert first["efns2010_cidp__rule"].tolist() == ["(a) distal latency in ≥ 2 nerves"]
