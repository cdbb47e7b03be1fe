"""Research export, visit level: the regimen running on the visit day, its response by the
default rule set as judged on that day, and the adjusted INCAT and weaker-hand grip at the
visit with their changes — on both backends.

Every patient, date and value here is invented for these tests (files written below and
imported through the ordinary importer). Expected values are worked out by hand from the
published definitions named beside each check.
"""

from __future__ import annotations

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
from sqlalchemy import select

from conftest import BACKENDS, new_database
from tracker.db import migrate
from tracker.db.models import Patient, User
from tracker.db.session import make_engine, make_session_factory
from tracker.response.rules import DEFAULT_RULES, rule_sets
from tracker.services import preferences
from tracker.services.access.permissions import Actor
from tracker.services.export import deidentify, export_frame, write_export
from tracker.services.export.response import score_at
from tracker.services.export.tables import ExportOptions
from tracker.services.importing import import_file

USER = "response-export-tester"
COORDINATOR = "coordinator-invented"
COLUMN = "response_" + DEFAULT_RULES.replace("-", "_")

# Invented patients. INV-STRETCH: IVIg 2 g/kg induction, then 1 g/kg every 21 days, then the interval
# stretched to 35 days; the adjusted INCAT rises by one point after the stretch. INV-NOBASE: a corticosteroid
# started long before any score (no baseline for the regimen).
VISITS = {
    "INV-STRETCH": ["2024-01-10", "2024-04-10", "2024-05-29", "2024-08-20", "2024-09-15"],
    "INV-NOBASE": ["2024-06-03", "2024-09-02"],
}
TREATMENTS = """patient,therapy,start_date,end_date,dose,dose_unit,interval_days,note
INV-STRETCH,ivig,2024-01-15,2024-01-19,2,g/kg,,invented induction course
INV-STRETCH,ivig,2024-02-05,2024-05-31,1,g/kg,21,invented maintenance
INV-STRETCH,ivig,2024-06-01,,1,g/kg,35,invented stretched interval
INV-NOBASE,corticosteroid,2024-01-02,,40,mg,1,invented
"""
# INCAT arm and leg grades and Vigorimeter grip (kPa) per score day; INV-STRETCH's fourth visit is scored four
# days before the study, its fifth visit not at all.
SCORES = {
    ("INV-STRETCH", "2024-01-10"): {
        "incat_arm": 2,
        "incat_leg": 2,
        "grip_kpa_left": 45,
        "grip_kpa_right": 48,
    },
    ("INV-STRETCH", "2024-04-10"): {
        "incat_arm": 1,
        "incat_leg": 1,
        "grip_kpa_left": 52,
        "grip_kpa_right": 50,
    },
    ("INV-STRETCH", "2024-05-29"): {
        "incat_arm": 0,
        "incat_leg": 1,
        "grip_kpa_left": 60,
        "grip_kpa_right": 50,
    },
    ("INV-STRETCH", "2024-08-16"): {
        "incat_arm": 2,
        "incat_leg": 1,
        "grip_kpa_left": 55,
        "grip_kpa_right": 40,
    },
    ("INV-NOBASE", "2024-06-03"): {"incat_arm": 1, "incat_leg": 2},
    ("INV-NOBASE", "2024-09-02"): {"incat_arm": 1, "incat_leg": 2},
}
# Byte renderings of every real date above, for the scans below.
REAL_DATES = sorted(
    {d for days in VISITS.values() for d in days}
    | {d for _, d in SCORES}
    | {"2024-01-15", "2024-01-19", "2024-02-05", "2024-05-31", "2024-06-01", "2024-01-02"}
)


def _measurements() -> str:
    """One median motor nerve test per visit (invented, plausible values)."""
    lines = [
        "patient,visit_date,nerve,side,modality,site_order,site,distance_mm,latency_ms,amplitude_mv,sex,birth_year,diagnosis"
    ]
    for code, days in VISITS.items():
        for day in days:
            lines.append(f"{code},{day},median,right,motor,1,wrist,70,5.1,6.2,female,1958,cidp")
            lines.append(f"{code},{day},median,right,motor,2,elbow,230,10.4,5.6,female,1958,cidp")
    return "\n".join(lines) + "\n"


def _scores() -> str:
    lines = ["patient,date,scale,value"]
    for (code, day), values in SCORES.items():
        lines += [f"{code},{day},{scale},{value}" for scale, value in values.items()]
    return "\n".join(lines) + "\n"


class Clinic:
    def __init__(self, url: str):
        self.engine = make_engine(url)
        self.sessions = make_session_factory(self.engine)

    def frame(self, **options) -> pd.DataFrame:
        options.setdefault("criteria", ("efns-pns-2010-cidp",))
        with self.sessions.begin() as session:
            return export_frame(session, ExportOptions(level="visit", **options), username=USER)

    def write(self, out: Path, file_format: str, **options):
        options.setdefault("criteria", ("efns-pns-2010-cidp",))
        with self.sessions.begin() as session:
            return write_export(
                session,
                ExportOptions(level="visit", **options),
                file_format=file_format,
                out=out,
                username=USER,
            )

    def rows(self, code: str, **options) -> pd.DataFrame:
        """The export rows of one patient, indexed by the real visit date (read
        back through the export id)."""
        frame = self.frame(**options)
        with self.sessions() as session:
            secret = bytes.fromhex(preferences.get(session, preferences.EXPORT_SECRET_KEY))
        mine = frame[frame["export_id"] == deidentify.export_id(secret, code)].sort_values(
            "days_since_first_visit"
        )
        first = dt.date.fromisoformat(VISITS[code][0])
        mine.index = [first + dt.timedelta(days=int(d)) for d in mine["days_since_first_visit"]]
        return mine


@pytest.fixture(scope="module", params=BACKENDS)
def clinic(request, tmp_path_factory):
    folder = tmp_path_factory.mktemp(f"response_export_{request.param}")
    files = {"measurements.csv": _measurements(), "treatments.csv": TREATMENTS, "scores.csv": _scores()}
    for name, text in files.items():
        (folder / name).write_text(text, encoding="utf-8")
    for url in new_database(request.param, folder):
        migrate.upgrade(url)
        found = Clinic(url)
        with found.sessions.begin() as session:
            for name in files:
                import_file(session, folder / name, username=USER)
        yield found
        found.engine.dispose()


def _day(text: str) -> dt.date:
    return dt.date.fromisoformat(text)


def test_stretched_interval_with_a_one_point_rise_is_worsened_at_the_next_visit(clinic):
    rows = clinic.rows("INV-STRETCH")
    after = rows.loc[_day("2024-08-20")]
    # Regimen: the stretched interval (a change of interval starts a new regimen), running since 2024-06-01.
    assert (
        after["regimen_therapy"],
        after["regimen_dose"],
        after["regimen_dose_unit"],
        after["regimen_interval_days"],
    ) == ("ivig", 1.0, "g/kg", 35)
    assert not after["regimen_induction"] and after["regimens_running"] == 1
    assert (
        after["regimen_days_since_start"] == (_day("2024-08-20") - _day("2024-06-01")).days == 80
    )  # 30 + 31 + 19
    assert after["regimen_start_days_since_first_visit"] == (_day("2024-06-01") - _day("2024-01-10")).days
    # Adjusted INCAT = leg + max(arm − 1, 0) (ICE, Hughes RAC et al. Lancet Neurol 2008;7:136–144):
    # 2024-05-29 arm 0, leg 1 → 1 (the regimen baseline: the latest score on or before the start);
    # 2024-08-16 arm 2, leg 1 → 2, four days before the study.
    assert (after["adjusted_incat_at_visit"], after["adjusted_incat_offset_days"]) == (2.0, -4)
    assert after["adjusted_incat_change_from_baseline"] == 1.0
    assert after["adjusted_incat_baseline_offset_days"] == (_day("2024-05-29") - _day("2024-08-20")).days
    # A rise of ≥ 1 point is the minimal important change (ICE) and a relapse (PATH, van Schaik IN et al.
    # Lancet Neurol 2018;17:35–46): the trial-aincat rule set's "worsened".
    assert bool(after["adjusted_incat_change_from_baseline_meets_mic"]) is True
    assert after[COLUMN] == "worsened"
    assert (
        after["adjusted_incat_change_from_previous"],
        bool(after["adjusted_incat_change_from_previous_meets_mic"]),
    ) == (1.0, True)
    # Weaker hand's grip 50 → 40 kPa: a fall of 10 kPa exceeds the > 8 kPa minimal important change (Vanhoutte
    # EK et al. Eur J Neurol 2013;20:748–755).
    assert (after["grip_kpa_weaker_at_visit"], after["grip_kpa_weaker_change_from_baseline"]) == (40.0, -10.0)
    assert bool(after["grip_kpa_weaker_change_from_baseline_meets_mic"]) is True


def test_earlier_visits_of_the_same_patient(clinic):
    rows = clinic.rows("INV-STRETCH")
    before = rows.loc[_day("2024-01-10")]
    # Before any treatment: no regimen, no response, no change — empty, not 0 and not stable.
    assert before["regimens_running"] == 0
    for name in (
        "regimen_therapy",
        "regimen_interval_days",
        "regimen_days_since_start",
        COLUMN,
        "adjusted_incat_change_from_baseline",
        "adjusted_incat_change_from_previous",
        "adjusted_incat_change_from_previous_meets_mic",
    ):
        assert pd.isna(before[name]), name
    assert before["adjusted_incat_at_visit"] == 3.0  # arm 2, leg 2 → 2 + (2 − 1) (ICE)
    improved = rows.loc[_day("2024-04-10")]
    # Maintenance after the induction course: the regimen starts with the induction (its baseline lies before
    # it, as in ICE); 3 → 1 is a fall of 2 points, an improvement by the ≥ 1 point rule (ICE).
    assert (improved["regimen_interval_days"], bool(improved["regimen_induction"])) == (21, True)
    assert improved["regimen_start_days_since_first_visit"] == 5
    assert (improved["adjusted_incat_change_from_baseline"], improved[COLUMN]) == (-2.0, "improved")
    # Grip of the weaker hand 45 → 50 kPa: + 5, within the > 8 kPa minimal important change (Vanhoutte 2013).
    assert improved["grip_kpa_weaker_change_from_previous"] == 5.0
    assert bool(improved["grip_kpa_weaker_change_from_previous_meets_mic"]) is False
    same = rows.loc[_day("2024-05-29")]
    # Arm 1 → 0 with the leg grade unchanged: INCAT falls by one, the adjusted
    # INCAT does not (ICE's adjustment).
    assert (same["adjusted_incat_at_visit"], same["adjusted_incat_change_from_previous"]) == (1.0, 0.0)
    assert bool(same["adjusted_incat_change_from_previous_meets_mic"]) is False
    assert same[COLUMN] == "improved"  # still 2 points below the regimen's baseline


def test_a_visit_without_scores_is_empty_not_stable(clinic):
    rows = clinic.rows("INV-STRETCH")
    unscored = rows.loc[_day("2024-09-15")]
    # The regimen runs (the stretched interval) but nothing was scored since the previous visit:
    # the score taken before that visit is not reused here (project rule, documented in the
    # dictionary; common practice, no source).
    assert unscored["regimen_interval_days"] == 35
    for name in (
        "adjusted_incat_at_visit",
        "adjusted_incat_offset_days",
        "adjusted_incat_change_from_baseline",
        "adjusted_incat_change_from_baseline_meets_mic",
        "adjusted_incat_change_from_previous",
        "adjusted_incat_change_from_previous_meets_mic",
        "grip_kpa_weaker_at_visit",
        COLUMN,
    ):
        assert pd.isna(unscored[name]), name
    assert unscored[COLUMN] != "stable"


def test_no_baseline_is_not_assessable(clinic):
    rows = clinic.rows("INV-NOBASE")
    # Corticosteroid from 2024-01-02, first score 2024-06-03: none within the look-back
    # before the start nor in the days after it, so the rule set cannot judge the regimen
    # (not_assessable, never stable for want of data).
    assert rows[COLUMN].tolist() == ["not_assessable", "not_assessable"]
    assert rows["adjusted_incat_change_from_baseline"].isna().all()
    # Adjusted INCAT 1 + 1 = 2 at both visits (ICE formula): no change from the previous visit.
    assert rows["adjusted_incat_at_visit"].tolist() == [2.0, 2.0]
    assert rows["adjusted_incat_change_from_previous"].tolist()[1] == 0.0


def test_score_at_the_visit_rule():
    # Project rule (common practice, no source): the score of the visit day, else the latest within 30 days
    # before it and after the previous visit. Invented points.
    points = [(dt.date(2024, 1, 1), 3.0), (dt.date(2024, 3, 1), 2.0)]
    assert score_at(points, dt.date(2024, 3, 1)) == points[1]
    assert score_at(points, dt.date(2024, 3, 31)) == points[1]  # 30 days after the score
    assert score_at(points, dt.date(2024, 4, 1)) is None  # 31 days
    assert score_at(points, dt.date(2024, 2, 29)) is None  # the earlier score is 59 days old
    assert (
        score_at(points, dt.date(2024, 3, 10), previous_visit=dt.date(2024, 3, 1)) is None
    )  # already that visit's
    assert score_at(points, dt.date(2024, 3, 10), previous_visit=dt.date(2024, 2, 20)) == points[1]


def test_shifted_regimen_start_moves_with_the_visit_dates(clinic):
    rows = clinic.rows("INV-STRETCH")
    treated = rows[rows["regimen_therapy"].notna()]
    assert len(treated) == 4
    for real_visit, row in treated.iterrows():
        # visit_date_shifted − regimen_start_date_shifted = days on the regimen, as with the real dates.
        assert (row["visit_date_shifted"] - row["regimen_start_date_shifted"]).days == row[
            "regimen_days_since_start"
        ]
        shift = (row["visit_date_shifted"] - real_visit).days
        assert shift != 0
        real_start = real_visit - dt.timedelta(days=int(row["regimen_days_since_start"]))
        assert row["regimen_start_date_shifted"] == real_start + dt.timedelta(days=shift)
    relative = clinic.rows("INV-STRETCH", dates="relative")
    assert "regimen_start_date_shifted" not in relative and "regimen_start_date" not in relative
    assert relative["regimen_days_since_start"].tolist() == rows["regimen_days_since_start"].tolist()


def test_identified_export_gives_the_real_regimen_start(clinic):
    with clinic.sessions.begin() as session:
        session.add(User(username=COORDINATOR, role="coordinator"))
        session.flush()
        coordinator = Actor(
            COORDINATOR, "coordinator", "os-login", authenticated=True
        )  # as after her password
        frame = export_frame(
            session,
            ExportOptions(
                level="visit", criteria=("efns-pns-2010-cidp",), identified=True, patients=("INV-STRETCH",)
            ),
            username=COORDINATOR,
            actor=coordinator,
        )
    starts = dict(zip(frame["visit_date"], frame["regimen_start_date"]))
    assert starts[_day("2024-08-20")] == _day("2024-06-01")  # treatments file above (invented)
    assert starts[_day("2024-04-10")] == _day("2024-01-15")  # the induction's start
    assert pd.isna(starts[_day("2024-01-10")])


@pytest.mark.parametrize("file_format", ["csv", "parquet", "xlsx"])
def test_every_format_carries_the_columns_and_the_dictionary_explains_them(clinic, tmp_path, file_format):
    result = clinic.write(tmp_path / "out", file_format)
    data = result.files[0].path
    new = [
        c
        for c in clinic.frame().columns
        if c.startswith(("regimen", "response_", "adjusted_incat_", "grip_kpa_weaker_"))
    ]
    assert len(new) >= 25 and COLUMN in new
    if file_format == "csv":
        table = pd.read_csv(data, dtype={"export_id": str})
        dictionary = pd.read_csv(
            io.StringIO(result.files[1].path.read_text(encoding="utf-8")), keep_default_na=False
        )
    elif file_format == "parquet":
        table = pq.read_table(data).to_pandas()
        dictionary = pd.read_csv(result.files[1].path, keep_default_na=False)
        types = {f.name: f.type for f in pq.read_schema(data)}
        assert (
            types["regimen_days_since_start"] == pa.int32()
            and types["adjusted_incat_offset_days"] == pa.int32()
        )
        assert (
            types[COLUMN] == pa.string()
            and types["adjusted_incat_change_from_baseline_meets_mic"] == pa.bool_()
        )
        assert (
            types["regimen_start_date_shifted"] == pa.date32()
            and types["adjusted_incat_at_visit"] == pa.float64()
        )
    else:
        book = openpyxl.load_workbook(data)
        sheet = list(book["data"].iter_rows(values_only=True))
        table = pd.DataFrame(sheet[1:], columns=sheet[0])
        rows = list(book["dictionary"].iter_rows(values_only=True))
        dictionary = pd.DataFrame(rows[1:], columns=rows[0]).fillna("")
    assert set(new) <= set(table.columns)
    assert set(table[COLUMN].dropna()) == {"improved", "worsened", "not_assessable"}
    described = dictionary.set_index("column")
    for name in new:
        assert described.loc[name, "meaning"], name
        assert described.loc[name, "type"], name
    for name in ("regimen_days_since_start", "regimen_interval_days", "adjusted_incat_offset_days"):
        assert described.loc[name, "unit"] == "days"
    assert described.loc["adjusted_incat_at_visit", "unit"] == "points"
    assert described.loc["adjusted_incat_change_from_baseline", "unit"] == "points"
    assert described.loc["grip_kpa_weaker_change_from_baseline", "unit"] == "kPa"
    mic = described.loc["adjusted_incat_change_from_baseline_meets_mic", "derivation"]
    assert "≥ 1 point" in mic and "Hughes" in mic  # ICE, Hughes RAC et al. Lancet Neurol 2008
    version = rule_sets()[DEFAULT_RULES].version
    assert f"{DEFAULT_RULES} version {version}" in described.loc[COLUMN, "depends_on"]
    assert "improved, stable, worsened or not_assessable" in described.loc[COLUMN, "meaning"]
    manifest = json.loads(result.files[-1].path.read_text(encoding="utf-8"))
    (entry,) = manifest["response"]["rule_sets"]
    assert (entry["id"], entry["version"], entry["column"]) == (DEFAULT_RULES, version, COLUMN)
    assert manifest["response"]["settings"]["baseline_lookback_days"] == 90


def _file_texts(path: Path) -> list[bytes]:
    """The bytes of a file, plus what compression hides: xlsx members decompressed, Parquet values decoded."""
    texts = [path.read_bytes()]
    if path.suffix == ".xlsx":
        with zipfile.ZipFile(path) as archive:
            texts += [archive.read(name) for name in archive.namelist()]
    if path.suffix == ".parquet":
        table = pq.read_table(path)
        texts.append(str(table.schema.metadata).encode())
        texts.append("\n".join(str(v) for column in table.columns for v in column.to_pylist()).encode())
    return texts


@pytest.mark.parametrize("file_format", ["csv", "parquet", "xlsx"])
def test_no_code_and_no_real_date_in_any_file(clinic, tmp_path, file_format):
    with clinic.sessions() as session:
        codes = list(session.scalars(select(Patient.code)))
    assert sorted(codes) == sorted(VISITS)
    renderings = [c.encode() for c in codes]
    # With --dates relative no date is written at all: not one real date of a visit, a score or a treatment.
    # (Shifted dates may by chance equal some other real date; that each is moved is checked above.)
    for text in REAL_DATES:
        day = _day(text)
        renderings += [
            s.encode()
            for s in (text, day.strftime("%d/%m/%Y"), day.strftime("%m/%d/%Y"), day.strftime("%d.%m.%Y"))
        ]
    result = clinic.write(tmp_path / "scan", file_format, dates="relative")
    assert result.rows == sum(len(days) for days in VISITS.values())
    for written in result.files:
        for blob in _file_texts(written.path):
            assert [r for r in renderings if r.lower() in blob.lower()] == [], written.path.name


def test_chunks_do_not_change_the_response_columns(clinic, tmp_path):
    # Chunks of 2 visits split INV-STRETCH's five visits over three chunks: the regimen, the previous scored
    # visit and the baseline still come from all of the patient's visits.
    small = clinic.write(tmp_path / "small", "csv", chunk_visits=2)
    whole = clinic.write(tmp_path / "whole", "csv", chunk_visits=1000)
    assert small.rows == whole.rows == 7
    assert small.files[0].path.read_bytes() == whole.files[0].path.read_bytes()
