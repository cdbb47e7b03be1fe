"""Research export, analysis-ready (issue 13): types read back as the dictionary says, recorded absences as
flagged rows, per-nerve values behind the verdicts, ordered outcome categories, a folder that explains itself
(limits and criteria tables), the criteria settings honoured, and a closing summary in words — on both
backends.

Data: the invented demo clinic (demo_data/), plus an invented patient INV-77 whose one visit lacks F-waves and
proximal data (so that CIDP outcomes are undecided), and an invented complete block: DEMO-01's first visit,
fibular nerve, no response at the popliteal fossa.
"""

from __future__ import annotations

import csv
import datetime as dt
import json
import re
from pathlib import Path

import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from sqlalchemy import select

import tracker
from conftest import BACKENDS, DEMO, new_database, run_cli
from tracker.criteria import thresholds
from tracker.criteria.citations import citations
from tracker.db import migrate
from tracker.db.models import NerveTest, Patient, StimulationSite, Visit
from tracker.db.session import make_engine, make_session_factory
from tracker.services import preferences
from tracker.services.export import export_frame, write_export
from tracker.services.export import files as export_files
from tracker.services.export.tables import ExportOptions
from tracker.services.importing import import_file
from tracker.services.limit_sets import resolve

USER = "export-analyst"
DEMO_FILES = ("measurements.csv", "treatments.csv", "scores.csv")
# Invented: one visit, two motor nerves with normal distal values and one segment each, no F-waves, no
# sensory nerves. Nothing is abnormal, but the missing F-waves could be: CIDP outcomes are undecided.
UNDECIDED_VISIT = """\
patient,visit_date,nerve,side,modality,site_order,site,distance_mm,latency_ms,amplitude_mv,duration_ms,\
temperature_c,birth_year,sex,height_cm,diagnosis
INV-77,2024-03-01,median,right,motor,1,wrist,70,3.6,8.1,5.2,33.5,1970,female,165,cidp
INV-77,2024-03-01,median,right,motor,2,elbow,220,7.6,7.8,5.6,33.5,1970,female,165,cidp
INV-77,2024-03-01,ulnar,right,motor,1,wrist,70,2.9,9.0,5.5,33.5,1970,female,165,cidp
INV-77,2024-03-01,ulnar,right,motor,2,below_elbow,210,6.6,8.7,5.9,33.5,1970,female,165,cidp
"""
LEVELS = ("visit", "nerve", "segment", "long")
# A set of each kind: ordered levels (EFNS/PNS 2010 CIDP), an ordered extra key (EAN/PNS 2021 motor), a
# classification that is not a scale (Hadden 1998 GBS).
SETS = ("efns-pns-2010-cidp", "ean-pns-2021-cidp", "hadden-1998-gbs")


def _populate(url: str, folder: Path) -> None:
    migrate.upgrade(url)
    engine = make_engine(url)
    invented = folder / "invented_undecided.csv"
    invented.write_text(UNDECIDED_VISIT, encoding="utf-8")
    with make_session_factory(engine).begin() as session:
        for name in DEMO_FILES:
            import_file(session, DEMO / name, username=USER)
        import_file(session, invented, username=USER)
        # Invented complete block: DEMO-01, 2023-02-14, fibular right, no response at the popliteal fossa.
        site = session.scalar(
            select(StimulationSite)
            .join(NerveTest, NerveTest.id == StimulationSite.nerve_test_id)
            .join(Visit, Visit.id == NerveTest.visit_id)
            .join(Patient, Patient.id == Visit.patient_id)
            .where(
                Patient.code == "DEMO-01",
                Visit.visit_date == dt.date(2023, 2, 14),
                NerveTest.nerve == "fibular",
                NerveTest.modality == "motor",
                StimulationSite.site_order == 3,
            )
        )
        site.amplitude_mv, site.latency_ms, site.duration_ms, site.area_mvms = 0.0, None, None, None
    engine.dispose()


class Clinic:
    def __init__(self, url: str):
        self.url = url
        self.engine = make_engine(url)
        self.sessions = make_session_factory(self.engine)

    def frame(self, **options) -> pd.DataFrame:
        options.setdefault("criteria", SETS)
        with self.sessions.begin() as session:
            return export_frame(session, ExportOptions(**options), username=USER)

    def write(self, out: Path, file_format: str = "parquet", **options):
        options.setdefault("criteria", SETS)
        with self.sessions.begin() as session:
            return write_export(
                session, ExportOptions(**options), file_format=file_format, out=out, username=USER
            )


@pytest.fixture(scope="module", params=BACKENDS)
def clinic(request, tmp_path_factory):
    folder = tmp_path_factory.mktemp(f"analysis_{request.param}")
    for url in new_database(request.param, folder):
        _populate(url, folder)
        found = Clinic(url)
        yield found
        found.engine.dispose()


def _dictionary(result) -> pd.DataFrame:
    path = next(f.path for f in result.files if f.role == "dictionary")
    return pd.read_csv(path, dtype=str, keep_default_na=False).set_index("column")


def _demo_rows() -> list[dict[str, str]]:
    with open(DEMO / "measurements.csv", encoding="utf-8", newline="") as handle:
        return list(csv.DictReader(handle))


# -- 1. types ------------------------------------------------------------------------------------------------


@pytest.mark.parametrize("level", LEVELS)
def test_every_parquet_column_reads_back_with_the_type_the_dictionary_gives(clinic, tmp_path, level):
    result = clinic.write(tmp_path / level, level=level)
    dictionary = _dictionary(result)
    path = result.files[0].path
    schema = pq.read_schema(path)
    frame = pd.read_parquet(path)
    assert list(frame.columns) == schema.names == [c for c in dictionary.index if not c.startswith("(")]
    for field in schema:
        row = dictionary.loc[field.name]
        assert str(field.type) == row["parquet_type"], field.name
        dtype = frame[field.name].dtype
        if row["type"] == "category":
            assert isinstance(dtype, pd.CategoricalDtype), field.name
            ordered = row["pandas_dtype"] == "category (ordered)"
            assert dtype.ordered is ordered and field.type.ordered is ordered, field.name
            separator = " < " if ordered else ", "
            assert list(dtype.categories) == row["values"].split(" (")[0].split(separator), field.name
        elif row["type"] == "date (YYYY-MM-DD)":
            assert dtype == object and pa.types.is_date32(field.type), field.name
            assert all(isinstance(v, dt.date) for v in frame[field.name].dropna())
        else:
            assert str(dtype) == row["pandas_dtype"], field.name
        # Every count of days, ages and counts: nullable whole numbers, never float64.
        if re.search(r"days|^age_at_visit$|^nerve_tests|_items$|^visit_number$", field.name):
            assert (row["type"], str(dtype), field.type) == ("whole number", "Int64", pa.int32()), field.name
    if level == "visit":
        for name in (
            "days_since_onset",
            "therapy_interval_days",
            "therapy_days_since_start",
            "score_onls_offset_days",
            "regimen_interval_days",
            "regimen_days_since_start",
            "adjusted_incat_baseline_offset_days",
        ):
            # Columns with empty cells were read back as float64 before (issue 13).
            assert frame[name].dtype == "Int64" and frame[name].isna().any(), name
        assert frame["age_top_coded"].dtype == "boolean"


def test_day_counts_are_whole_numbers_in_csv_and_excel(clinic, tmp_path):
    csv_path = clinic.write(tmp_path / "v", "csv", level="visit").files[0].path
    xlsx_path = clinic.write(tmp_path / "x", "xlsx", level="visit").files[0].path
    text = pd.read_csv(csv_path, dtype=str)
    import openpyxl

    sheet = openpyxl.load_workbook(xlsx_path)["data"]
    header = [c.value for c in sheet[1]]
    for name in (
        "therapy_interval_days",
        "regimen_days_since_start",
        "age_at_visit",
        "score_incat_offset_days",
    ):
        cells = text[name].dropna()
        assert len(cells) and all(re.fullmatch(r"-?\d+", c) for c in cells), name
        values = [row[header.index(name)].value for row in sheet.iter_rows(min_row=2)]
        assert all(isinstance(v, int) for v in values if v is not None), name


# -- 2. absences are findings --------------------------------------------------------------------------------


def test_recorded_absences_are_flagged_rows_at_every_level(clinic):
    long = clinic.frame(level="long", patients=("DEMO-01",))
    first = long[long["days_since_first_visit"] == 0]
    # Demo file (invented): DEMO-01's first visit, fibular right motor, F-waves "absent", persistence 0 %.
    fibular_f = first[(first["nerve"] == "fibular") & first["quantity"].isin(["f_latency", "f_persistence"])]
    assert fibular_f[["quantity", "response_absent"]].values.tolist() == [
        ["f_latency", True],
        ["f_persistence", True],
    ]
    assert pd.isna(fibular_f["value"].iloc[0]) and fibular_f["value"].iloc[1] == 0
    # Demo file (invented): sural right sensory, amplitude 0, no latency — no recordable SNAP.
    sural = first[(first["nerve"] == "sural") & first["response_absent"]]
    assert sorted(sural["quantity"]) == ["amplitude", "onset_latency", "sensory_velocity"]
    assert sural.set_index("quantity")["value"].isna().to_dict() == {
        "amplitude": False,
        "onset_latency": True,
        "sensory_velocity": True,
    }
    # Invented complete block at the popliteal fossa (site 3).
    block = first[(first["nerve"] == "fibular") & (first["site_order"] == 3) & first["response_absent"]]
    assert sorted(block["quantity"]) == ["amplitude", "onset_latency"]
    # Only absences are flagged, and an empty value is never anything else.
    assert long["response_absent"].notna().all()
    assert long.loc[long["value"].isna(), "response_absent"].all()

    nerve = clinic.frame(level="nerve", patients=("DEMO-01",))
    one = nerve[nerve["days_since_first_visit"] == 0].set_index(["nerve", "modality"])
    assert bool(one.loc[("sural", "sensory"), "no_response"]) is True
    assert one.loc[("sural", "sensory"), "distal_amplitude_uv"] == 0
    assert bool(one.loc[("fibular", "motor"), "f_absent"]) is True
    assert one.loc[("fibular", "motor"), "sites_no_response"] == 1
    segment = clinic.frame(level="segment", patients=("DEMO-01",))
    flagged = segment[segment["response_absent"].astype(bool)]
    assert flagged[["days_since_first_visit", "nerve", "site_order"]].values.tolist() == [[0, "fibular", 3]]
    visits = clinic.frame(level="visit", patients=("DEMO-01",))
    first_visit = visits[visits["days_since_first_visit"] == 0].iloc[0]
    with clinic.sessions() as session:
        tests = session.execute(
            select(NerveTest.id, NerveTest.f_absent)
            .join(Visit, Visit.id == NerveTest.visit_id)
            .join(Patient, Patient.id == Visit.patient_id)
            .where(Patient.code == "DEMO-01", Visit.visit_date == dt.date(2023, 2, 14))
        ).all()
        silent_distal = session.scalars(
            select(StimulationSite.nerve_test_id).where(
                StimulationSite.nerve_test_id.in_([t for t, _ in tests]),
                StimulationSite.site_order == 1,
                StimulationSite.latency_ms.is_(None),
            )
        ).all()
    assert first_visit["nerve_tests_f_absent"] == sum(bool(a) for _, a in tests) >= 1
    assert first_visit["nerve_tests_no_response"] == len(silent_distal) >= 1


def test_every_f_wave_absence_of_the_demo_file_is_one_flagged_row(clinic):
    long = clinic.frame(level="long", criteria=())
    absent = long[(long["quantity"] == "f_latency") & long["response_absent"]]
    tests = {
        (r["patient"], r["visit_date"], r["nerve"], r["side"])
        for r in _demo_rows()
        if r["f_latency_ms"] == "absent"
    }
    assert len(absent) == len(tests) > 0


def test_the_dictionary_explains_absent_not_measured_and_not_evaluable(clinic, tmp_path):
    dictionary = _dictionary(clinic.write(tmp_path / "l", "csv", level="long"))
    note = dictionary.loc["(absent, not measured, not evaluable)", "meaning"]
    for words in ("Absent is a finding", "Not measured", "Not evaluable", "no row at the long level"):
        assert words in note
    assert "recorded absence" in dictionary.loc["response_absent", "meaning"]


# -- 3. per-nerve values without a join ----------------------------------------------------------------------


def test_nerve_level_carries_the_block_and_dispersion_the_criteria_used(clinic):
    nerve = clinic.frame(level="nerve", patients=("DEMO-01",), criteria=("efns-pns-2010-cidp",))
    first = nerve[(nerve["days_since_first_visit"] == 0) & (nerve["modality"] == "motor")].set_index("nerve")
    # Demo file (invented), DEMO-01 2023-02-14. By hand: median wrist 4.3 mV → elbow 2.8 mV: (4.3 − 2.8) / 4.3
    # = 34.883721 %; durations 7.8 → 12.7 ms: (12.7 − 7.8) / 7.8 = 62.820513 %.
    median = first.loc["median"]
    assert median["efns2010_cidp__cb__value"] == pytest.approx(100 * 1.5 / 4.3, abs=1e-6)
    assert median["efns2010_cidp__td__value"] == pytest.approx(100 * 4.9 / 7.8, abs=1e-6)
    assert median["efns2010_cidp__cb__segment"] == median["efns2010_cidp__td__segment"] == "wrist → elbow"
    # Fibular: ankle 1.9 mV → below fibular head 1.2 mV: 36.842105 %. The path on to the popliteal fossa
    # crosses the fibular head (an entrapment site) and is not used under the default block-path setting
    # (EFNS/PNS 2010, Van den Bergh PYK et al., Eur J Neurol 2010;17:356–363: block outside entrapment sites).
    fibular = first.loc["fibular"]
    assert fibular["efns2010_cidp__cb__value"] == pytest.approx(100 * 0.7 / 1.9, abs=1e-6)
    assert fibular["efns2010_cidp__cb__segment"] == "ankle → below_fibular_head"
    assert fibular["efns2010_cidp__td__value"] == pytest.approx(100 * 4.0 / 7.7, abs=1e-6)
    # Velocity: 222 mm / (14.00 − 7.05) ms, the forearm segment.
    assert median["efns2010_cidp__cv__value"] == pytest.approx(222 / 6.95, abs=1e-6)
    assert median["efns2010_cidp__cv__segment"] == "wrist → elbow"
    # The same values as the segment level, with no join needed.
    segment = clinic.frame(level="segment", patients=("DEMO-01",), criteria=("efns-pns-2010-cidp",))
    forearm = segment[
        (segment["days_since_first_visit"] == 0)
        & (segment["nerve"] == "median")
        & (segment["site_order"] == 2)
    ].iloc[0]
    assert median["efns2010_cidp__cb__value"] == pytest.approx(forearm["amplitude_reduction_pct"], abs=1e-9)
    # Distal values and F-waves stand beside them (demo file, invented): latency 7.05 ms, F 43.0 ms, 34 %.
    assert (median["distal_latency_ms"], median["f_latency_ms"], median["f_persistence_pct"]) == (
        7.05,
        43.0,
        34.0,
    )
    assert median["distal_duration_ms"] == 7.8 and median["distal_area_mvms"] == 18.6
    # Sensory nerve tests have no segment-judged items: the value columns stay empty there.
    sensory = nerve[nerve["modality"] == "sensory"]
    assert sensory["efns2010_cidp__cb__value"].isna().all()


# -- 4. ordered outcome categories ---------------------------------------------------------------------------


def test_outcomes_are_ordered_categories_with_undecided_apart(clinic, tmp_path):
    result = clinic.write(tmp_path / "v", level="visit")
    frame = pd.read_parquet(result.files[0].path)
    outcome = frame["efns2010_cidp__outcome"]
    assert outcome.dtype == pd.CategoricalDtype(["not_met", "possible", "probable", "definite"], ordered=True)
    assert frame["ean2021_cidp__outcome"].cat.categories.tolist() == ["not_met", "possible_cidp", "cidp"]
    assert frame["ean2021_cidp__motor"].cat.ordered
    # GBS classes are subtypes, not degrees: a category without order.
    assert not frame["hadden1998_gbs__outcome"].cat.ordered
    # Ordered: comparisons work as a statistician expects.
    at_least_probable = frame[outcome >= "probable"]
    assert set(at_least_probable["efns2010_cidp__outcome"]) <= {"probable", "definite"}
    assert len(at_least_probable) == (outcome == "definite").sum() + (outcome == "probable").sum() > 0
    # pyarrow sees the same order.
    field = pq.read_schema(result.files[0].path).field("efns2010_cidp__outcome")
    assert field.type.ordered and pa.types.is_dictionary(field.type)
    # The invented visit INV-77 is undecided: its outcome is empty, the flag says why.
    with clinic.sessions.begin() as session:
        undecided = export_frame(
            session,
            ExportOptions(criteria=SETS, outcomes=(("efns-pns-2010-cidp", "undecided"),)),
            username=USER,
        )
    assert len(undecided) == 1
    assert undecided["efns2010_cidp__outcome"].isna().all()
    assert undecided["efns2010_cidp__undecided"].tolist() == [True]
    assert undecided["efns2010_cidp__undecided_items"].iloc[0] > 0
    decided = frame[frame["efns2010_cidp__outcome"].notna()]
    assert not decided["efns2010_cidp__undecided"].any() and len(decided) == len(frame) - 1
    dictionary = _dictionary(result)
    assert dictionary.loc["efns2010_cidp__outcome", "values"].startswith(
        "not_met < possible < probable < definite"
    )
    assert "undecided" in dictionary.loc["efns2010_cidp__outcome", "meaning"]


# -- 5. the folder explains itself ---------------------------------------------------------------------------


def _repository_names() -> set[str]:
    """Names of files of the tool's own sources and reference data, which an export folder does not hold."""
    package = Path(tracker.__file__).parent
    names = {p.name for p in package.rglob("*") if p.suffix in (".py", ".csv", ".md")}
    return names - {"__init__.py"} | {"README", "DESIGN.md"}


@pytest.mark.parametrize("level", LEVELS)
def test_the_dictionary_names_no_file_of_the_repository(clinic, tmp_path, level):
    result = clinic.write(tmp_path / level, "csv", level=level)
    text = next(f.path for f in result.files if f.role == "dictionary").read_text(encoding="utf-8")
    assert not re.search(r"tracker[/.]\w|\.py\b|README", text), level
    assert [n for n in _repository_names() if n in text] == [], level
    # It names the tables of the folder instead.
    assert (
        f"{result.files[0].path.name}.limits.csv" in text
        and f"{result.files[0].path.name}.criteria.csv" in text
    )


def test_limits_and_criteria_tables_are_written_and_listed_with_checksums(clinic, tmp_path):
    result = clinic.write(tmp_path / "n", level="nerve", outcomes=(("efns-pns-2010-mmn", "definite"),))
    by_role = {f.role: f for f in result.files}
    manifest = json.loads(by_role["manifest"].path.read_text(encoding="utf-8"))
    listed = {f["role"]: f for f in manifest["files"]}
    for role in ("limits", "criteria"):
        assert listed[role]["name"] == by_role[role].path.name
        assert listed[role]["sha256"] == export_files.sha256_of(by_role[role].path)
        assert listed[role]["rows"] == len(pd.read_csv(by_role[role].path, dtype=str))
    limits = pd.read_csv(by_role["limits"].path, dtype={"value": float})
    with clinic.sessions() as session:
        info, stored = resolve(session, None)
    assert set(limits["limit_set"]) == {info.name} and set(limits["limit_set_version"]) == {info.version}
    assert len(limits) == len(stored) == info.rows
    key = ["nerve", "modality", "parameter", "bound", "age_min", "age_max", "height_min_cm", "height_max_cm"]
    merged = limits.merge(stored, on=key, suffixes=("", "_stored"), validate="one_to_one")
    assert (merged["value"] == merged["value_stored"]).all() and (
        merged["source"] == merged["source_stored"]
    ).all()
    motor_amplitude = limits[(limits["parameter"] == "amplitude") & (limits["modality"] == "motor")]
    assert set(motor_amplitude["unit"]) == {"mV"}
    criteria = pd.read_csv(by_role["criteria"].path, dtype=str, keep_default_na=False)
    # Every set evaluated (shown, or used by the outcome filter) with its version and publication.
    versions = {c["id"]: c["version"] for c in manifest["criteria"]}
    assert set(criteria["criteria"]) == set(versions) | {"limb-temperature"}
    for criteria_id, version in versions.items():
        rows = criteria[criteria["criteria"] == criteria_id]
        assert set(rows["criteria_version"]) == {version}
        table = thresholds.load(criteria_id)
        assert len(rows) == len(table.rows)
        assert sorted(zip(rows["item"], rows["nerve"])) == sorted((r.item, r.nerve) for r in table.rows)
    efns = criteria[criteria["criteria"] == "efns-pns-2010-cidp"]
    assert set(efns["criteria_citation"]) == {citations()["efns-pns-2010-cidp"].text()}
    assert set(criteria.loc[criteria["criteria"] == "efns-pns-2010-mmn", "column_prefix"]) == {
        ""
    }  # filter only
    # EFNS/PNS 2010 CIDP (a): distal motor latency ≥ 1.5 × ULN (Van den Bergh PYK et al., Eur J Neurol
    # 2010;17:356–363).
    dml = efns[efns["item"] == "dml"].iloc[0]
    assert (dml["comparator"], dml["reference"], dml["value"]) == ("ge", "uln", "1.5")
    # Limb temperature minimums: palm ≥ 33 °C, external malleolus ≥ 30 °C (EFNS/PNS 2010 good practice point;
    # from memory, not verified — as the table itself says).
    temperature = criteria[criteria["criteria"] == "limb-temperature"].set_index("item")
    assert temperature.loc["upper_limb_minimum", "value"] == "33"
    assert temperature.loc["lower_limb_minimum", "value"] == "30"


def test_reference_tables_are_byte_identical_across_runs(clinic, tmp_path):
    one = clinic.write(tmp_path / "one" / "x", "csv", level="segment")
    two = clinic.write(tmp_path / "two" / "x", "csv", level="segment")
    for a, b in zip(one.files, two.files):
        assert a.path.read_bytes() == b.path.read_bytes(), a.role


# -- 8. the closing summary -------------------------------------------------------------------------------


def test_summary_says_what_was_selected_filtered_and_written(clinic, tmp_path):
    options = {"level": "visit", "patients": ("DEMO-01", "DEMO-02")}
    everything = clinic.frame(**options)
    result = clinic.write(tmp_path / "s", "csv", outcomes=(("efns-pns-2010-cidp", "definite"),), **options)
    kept = pd.read_csv(result.files[0].path, dtype={"export_id": str})
    # Counted from the demo file (invented): DEMO-01 and DEMO-02 have 11 visits.
    assert len(everything) == 11
    definite = everything[everything["efns2010_cidp__outcome"] == "definite"]
    assert 0 < len(kept) == len(definite) < 11
    expected = (
        f"11 visits of 2 patients (2 patients named) → {len(definite)} visits of "
        f"{definite['export_id'].nunique()} patients after the outcome filter "
        f"(efns-pns-2010-cidp = definite) → {len(kept)} rows, one per visit, in 5 files"
    )
    assert result.summary == expected == result.manifest["summary"]
    nerve = clinic.write(tmp_path / "n", "csv", level="segment", patients=("INV-77",))
    # The invented INV-77 visit has two motor nerves with one segment each.
    assert (
        nerve.summary == "1 visit of 1 patient (1 patient named) → 2 rows, one per motor segment, in 5 files"
    )


# -- 6 and 8 through the command line ------------------------------------------------------------------------


@pytest.fixture
def demo_db(db_url, capsys):
    code, _, err = run_cli(capsys, "--db", db_url, "import", *(str(DEMO / n) for n in DEMO_FILES))
    assert code == 0, err
    return db_url


def _cold_verdicts(path: Path) -> pd.Series:
    """The EFNS/PNS 2010 distal-latency verdicts of the motor nerve tests from a cold limb."""
    nerve = pd.read_parquet(path)
    cold = nerve[nerve["cold_limb"].fillna(False).astype(bool) & (nerve["modality"] == "motor")]
    assert len(cold) > 0  # the demo clinic (invented) has cold lower limbs
    return cold["efns2010_cidp__dml"]


def _judged(path: Path) -> set[str]:
    """The cold nerve tests' verdicts that were judged (met or not met); an excluded limb has none."""
    verdicts = set(_cold_verdicts(path))
    assert "not_evaluable" in verdicts
    return verdicts & {"met", "not_met"}


def test_export_takes_the_criteria_settings_as_check_does(demo_db, sessions, tmp_path, capsys):
    def export(folder: str, *options: str) -> dict:
        code, out, err = run_cli(
            capsys, "--db", demo_db, "export", "--level", "nerve", "--format", "parquet",
            "--criteria", "efns-pns-2010-cidp", "--out", f"{tmp_path / folder}/", *options,
        )  # fmt: skip
        assert code == 0, err
        return json.loads((tmp_path / folder / "ncs-export-nerve.parquet.manifest.json").read_text())

    default = export("default")
    assert default["criteria_settings"]["cold_limbs"] == "warn"
    # Project setting (Settings docstring): "exclude" makes a cold limb's findings not evaluable; "warn"
    # judges them. Temperature minimums: EFNS/PNS 2010 good practice point (from memory, not verified).
    assert {"met", "not_met"} & set(_cold_verdicts(tmp_path / "default" / "ncs-export-nerve.parquet"))
    chosen = export(
        "chosen", "--cold-limbs", "exclude", "--sides-together", "--cv-segments", "all_outside_entrapment"
    )
    settings = chosen["criteria_settings"]
    assert (settings["cold_limbs"], settings["sides_are_separate_nerves"], settings["cv_segments"]) == (
        "exclude",
        False,
        "all_outside_entrapment",
    )
    assert "cold_limbs" in chosen["criteria_settings_from"]
    assert _judged(tmp_path / "chosen" / "ncs-export-nerve.parquet") == set()
    # The stored settings apply when no option is given (dashboard → Settings), and an option wins over them.
    with sessions.begin() as session:
        preferences.set_cold_limbs(session, "exclude", username="tester")
        preferences.set_criteria_switch(session, "aan_wrist_exclusion", True, username="tester")
    stored = export("stored")
    assert stored["criteria_settings"]["cold_limbs"] == "exclude"
    assert stored["criteria_settings"]["aan_wrist_exclusion"] is True
    assert _judged(tmp_path / "stored" / "ncs-export-nerve.parquet") == set()
    overridden = export("overridden", "--cold-limbs", "warn", "--no-aan-wrist-exclusion")
    assert overridden["criteria_settings"]["cold_limbs"] == "warn"
    assert overridden["criteria_settings"]["aan_wrist_exclusion"] is False


def test_the_command_ends_with_the_summary_in_words(demo_db, tmp_path, capsys):
    code, out, err = run_cli(
        capsys, "--db", demo_db, "export", "--outcome", "efns-pns-2010-cidp=definite",
        "--diagnosis", "cidp", "--out", f"{tmp_path}/",
    )  # fmt: skip
    assert code == 0, err
    lines = out.strip().splitlines()
    manifest = json.loads((tmp_path / "ncs-export-visit.csv.manifest.json").read_text(encoding="utf-8"))
    rows = len(pd.read_csv(tmp_path / "ncs-export-visit.csv"))
    assert lines[-1] == manifest["summary"] and lines[-2] == tracker.CAUTION
    # The demo clinic (invented): 22 CIDP visits of 4 patients.
    assert lines[-1].startswith("22 visits of 4 patients (diagnosis cidp) → ")
    assert (
        f"after the outcome filter (efns-pns-2010-cidp = definite) → {rows} rows, one per visit" in lines[-1]
    )
    assert manifest["visits_exported"] == rows and manifest["patients_selected"] == 4
    assert not re.search(r"DEMO-\d", out)


def test_limits_table_neutralises_formula_like_text(tmp_path):
    # A limit set's source is typed by a clinic: text a spreadsheet would run is neutralised in the table
    # (formula injection; common practice, no source).
    from tracker.services.export import reference

    frame = pd.DataFrame(
        {
            "nerve": ["median"],
            "modality": ["motor"],
            "parameter": ["amplitude"],
            "bound": ["lln"],
            "value": [4.0],
            "age_min": [None],
            "age_max": [None],
            "height_min_cm": [None],
            "height_max_cm": [None],
            "sex": [None],
            "status": ["local"],
            "source": ['=HYPERLINK("http://example.invalid")'],
        }
    )
    table = reference.limits_table("local", 1, frame)
    assert table["unit"].tolist() == ["mV"] and table["value"].tolist() == ["4"]
    path = tmp_path / "limits.csv"
    with open(path, "w+b") as handle:
        export_files.write_dictionary_csv(handle, table)
    assert "'=HYPERLINK" in path.read_text(encoding="utf-8")


def test_outcome_categories_cover_every_outcome_value():
    # DESIGN.md §5 lists each set's outcome values; the categories are those values without "undecided",
    # which is kept apart (a flag), never silently dropped.
    from tracker.services.export.columns import OUTCOME_CATEGORIES, OUTCOME_VALUES, UNDECIDED

    assert set(OUTCOME_CATEGORIES) == set(OUTCOME_VALUES)
    for criteria_id, values in OUTCOME_VALUES.items():
        categories, _ordered = OUTCOME_CATEGORIES[criteria_id]
        assert set(categories) == set(values) - {UNDECIDED}, criteria_id
