"""`ncs-tracker report`: the printable follow-up report (PDF and self-contained HTML), on both backends.

Expected words come from the services in the test's own session (the demo clinic is invented and its scores
may change); the criteria check names its published source beside the assertion.
"""

from __future__ import annotations

import base64
import datetime as dt
import html
import io
import re
import stat
from pathlib import Path

import pypdf
import pytest
from sqlalchemy import select

from conftest import DEMO, run_cli
from tracker import CAUTION
from tracker.db.models import Patient, PatientIdentity
from tracker.domain.labels import CLASSIFICATION_LABELS
from tracker.services.records import patient_record
from tracker.services.response import patient_response

DEMO_FILES = [str(DEMO / n) for n in ("measurements.csv", "treatments.csv", "scores.csv")]
FIXED_EPOCH = "1767225600"  # 2026-01-01 00:00 UTC


@pytest.fixture
def demo_db(db_url, capsys):
    code, _, err = run_cli(capsys, "--db", db_url, "import", *DEMO_FILES)
    assert code == 0, err
    return db_url


@pytest.fixture
def reports(tmp_path) -> Path:
    """A folder of its own for report files (the SQLite database lives in tmp_path)."""
    folder = tmp_path / "reports"
    folder.mkdir()
    return folder


def flat(text: str) -> str:
    """Whitespace collapsed: text extracted from a PDF breaks lines where the layout wrapped them."""
    return re.sub(r"\s+", " ", text).strip()


def pdf_text(path: Path) -> str:
    reader = pypdf.PdfReader(str(path))
    return flat(" ".join(page.extract_text() for page in reader.pages))


def html_text(data: bytes) -> str:
    body = data.decode("utf-8")
    body = re.sub(r"<style>.*?</style>", " ", body, flags=re.S)
    body = re.sub(r"<[^>]+>", " ", body)
    return flat(html.unescape(body))


def test_pdf_report_names_code_caution_outcome_and_classification(demo_db, sessions, reports, capsys):
    with sessions() as session:
        latest = max(v.visit_date for v in patient_record(session, "DEMO-01").visits)
        response = patient_response(session, "DEMO-01", visit_date=latest)
        expected = {CLASSIFICATION_LABELS[c.classification].upper() for c in response.classifications}
        rule_set = response.rule_set
    assert expected, "DEMO-01 (invented) has a treatment before the latest visit"
    out = reports / "demo01.pdf"
    code, stdout, err = run_cli(capsys, "--db", demo_db, "report", "DEMO-01", "--out", str(out))
    assert code == 0, err
    assert "DEMO-01" in stdout and CAUTION in stdout
    data = out.read_bytes()
    assert data.startswith(b"%PDF-")
    assert stat.S_IMODE(out.stat().st_mode) == 0o600
    text = pdf_text(out)
    assert f"Follow-up report — DEMO-01, visit {latest.isoformat()}" in text
    assert flat(CAUTION) in text
    for word in expected:
        assert word in text
    assert rule_set.id in text and f"version {rule_set.version}" in text
    assert "Outcome:" in text and "Limb temperatures" in text and "Changes that count" in text
    # No stray temporary file is left beside the report.
    assert sorted(p.name for p in reports.iterdir()) == ["demo01.pdf"]


def test_report_shows_the_deciding_findings_of_a_chosen_criteria_set(demo_db, reports, capsys):
    out = reports / "baseline.html"
    code, _, err = run_cli(
        capsys,
        "--db",
        demo_db,
        "report",
        "DEMO-01",
        "--visit",
        "2023-02-14",
        "--criteria",
        "efns-pns-2010-cidp",
        "--out",
        str(out),
    )
    assert code == 0, err
    text = html_text(out.read_bytes())
    # EFNS/PNS 2010 CIDP guideline (Van den Bergh PYK et al., Eur J Neurol 2010;17:356–363):
    # distal latency ≥ 150 % of the ULN in ≥ 2 nerves is "definite"; median ULN 4.4 ms (Preston
    # & Shapiro appendix) gives 6.6 ms, and the invented demo cell of that visit is 7.05 ms
    # (hand-checked in tests/test_demo_outcomes.py).
    assert "Outcome: DEFINITE" in text
    assert "Rule: (a) distal latency in ≥ 2 nerves" in text
    assert re.search(r"median right motor distal latency 7\.05 ms 150 % of ULN 4\.4 ≥ 6\.6 ms ● met", text), (
        text[:3000]
    )
    assert "Van den Bergh" in text


def test_report_lists_the_visit_temperatures_and_less_certain_reasons(demo_db, sessions, reports, capsys):
    with sessions() as session:
        visit = patient_record(session, "DEMO-01").visits[-1]
        response = patient_response(session, "DEMO-01", visit_date=visit.visit_date)
    counted = response.nerve_changes[response.nerve_changes["verdict"].isin(["improved", "worsened"])]
    out = reports / "latest.html"
    assert run_cli(capsys, "--db", demo_db, "report", "DEMO-01", "--out", str(out))[0] == 0
    text = html_text(out.read_bytes())
    for nerve in visit.nerves:
        if nerve.temperature_c is not None:
            shown = f"{nerve.temperature_c:.1f}".rstrip("0").rstrip(".")
            assert f"{nerve.nerve} {nerve.side} {nerve.modality} {shown} °C" in text
    reasons = {r for r in counted["less_certain"] if r}
    assert reasons, "the invented demo has a limb-temperature difference at DEMO-01's latest visit"
    for reason in reasons:
        assert flat(reason) in text


def test_html_report_is_self_contained(demo_db, reports, capsys):
    out = reports / "report.html"
    code, _, err = run_cli(capsys, "--db", demo_db, "report", "DEMO-04", "--out", str(out))
    assert code == 0, err
    assert stat.S_IMODE(out.stat().st_mode) == 0o600
    body = out.read_text(encoding="utf-8")
    assert body.startswith("<!DOCTYPE html>")
    assert "http://" not in body and "https://" not in body
    assert "<script" not in body.lower() and "@import" not in body and "url(" not in body
    sources = re.findall(r'\b(?:src|href)="([^"]*)"', body)
    assert sources and all(s.startswith("data:image/png;base64,") for s in sources)
    assert base64.b64decode(sources[0].split(",", 1)[1]).startswith(b"\x89PNG\r\n\x1a\n")
    text = html_text(body.encode())
    assert "DEMO-04" in text and CAUTION in text


def test_unknown_patient_visit_or_file_type_exit_1_and_write_nothing(demo_db, reports, capsys):
    cases = [
        (["DEMO-01", "--visit", "2001-01-01"], "report.pdf", "has no visit on 2001-01-01"),
        (["NOBODY-99"], "report.pdf", "No patient with code"),
        (["DEMO-01"], "report.docx", "Unsupported report file type '.docx'"),
        (["DEMO-01"], "missing-folder/report.pdf", "does not exist"),
    ]
    for args, name, message in cases:
        code, _, err = run_cli(capsys, "--db", demo_db, "report", *args, "--out", str(reports / name))
        assert code == 1, (args, err)
        assert message in err and len(err.strip().splitlines()) == 1 and "Traceback" not in err
    assert list(reports.iterdir()) == []


def test_existing_file_is_kept_unless_overwrite(demo_db, reports, capsys):
    out = reports / "report.pdf"
    out.write_bytes(b"earlier")
    code, _, err = run_cli(capsys, "--db", demo_db, "report", "DEMO-02", "--out", str(out))
    assert code == 1 and "already exists" in err and "--overwrite" in err
    assert out.read_bytes() == b"earlier"
    out.chmod(0o644)
    code, _, err = run_cli(capsys, "--db", demo_db, "report", "DEMO-02", "--out", str(out), "--overwrite")
    assert code == 0, err
    assert out.read_bytes().startswith(b"%PDF-") and stat.S_IMODE(out.stat().st_mode) == 0o600


@pytest.mark.parametrize("suffix", ["pdf", "html"])
def test_same_input_and_stamp_give_the_same_bytes(demo_db, reports, capsys, monkeypatch, suffix):
    monkeypatch.setenv("SOURCE_DATE_EPOCH", FIXED_EPOCH)
    first, second = reports / f"a.{suffix}", reports / f"b.{suffix}"
    for path in (first, second):
        code, _, err = run_cli(capsys, "--db", demo_db, "report", "DEMO-03", "--out", str(path))
        assert code == 0, err
    assert first.read_bytes() == second.read_bytes()
    if suffix == "pdf":
        info = pypdf.PdfReader(str(first)).metadata
        assert info["/CreationDate"] == info["/ModDate"] == "D:20260101000000+00'00'"
        assert "Produced 2026-01-01 00:00 UTC" in pdf_text(first)
    else:
        assert "produced 2026-01-01 00:00 UTC" in html_text(first.read_bytes())


def test_only_the_stamp_differs_between_two_moments(demo_db, sessions):
    from tracker import report

    with sessions.begin() as session:
        content = report.build(session, "DEMO-02")
    one = dt.datetime(2026, 1, 1, 8, 0, tzinfo=dt.timezone.utc)
    two = dt.datetime(2026, 3, 4, 9, 30, tzinfo=dt.timezone.utc)
    html_one, html_two = (
        report.render(content, "html", created=one),
        report.render(content, "html", created=two),
    )
    assert html_one != html_two
    assert html_one.replace(b"2026-01-01 08:00", b"STAMP") == html_two.replace(b"2026-03-04 09:30", b"STAMP")
    pdf_one, pdf_two = report.render(content, "pdf", created=one), report.render(content, "pdf", created=two)
    assert pdf_one != pdf_two
    texts = [
        flat(" ".join(p.extract_text() for p in pypdf.PdfReader(io.BytesIO(b)).pages))
        for b in (pdf_one, pdf_two)
    ]
    assert texts[0].replace("2026-01-01 08:00", "STAMP") == texts[1].replace("2026-03-04 09:30", "STAMP")


def test_figure_png_is_deterministic_and_unstamped(demo_db, sessions):
    from tracker import report
    from tracker.report.figure import png

    with sessions.begin() as session:
        content = report.build(session, "DEMO-01")
    image = png(content.figure)
    assert image == png(content.figure)
    assert image.startswith(b"\x89PNG") and b"Software" not in image and b"matplotlib" not in image
    assert content.figure.panels and content.figure.series
    assert {s.panel for s in content.figure.series} <= set(content.figure.panels)
    # Only what was known at the visit is drawn.
    assert all(d <= content.visit_date for s in content.figure.series for d in s.dates)


def test_identifiers_stay_out_of_the_report(demo_db, sessions):
    from tracker import report

    # Invented identifiers, attached to an invented demo patient for this test only.
    invented = {
        "record_number": "MRN-INVENTED-5521",
        "full_name": "Ottoline Quarrington-Vey",
        "birth_date": dt.date(1957, 8, 19),
    }
    with sessions.begin() as session:
        patient = session.scalar(select(Patient).where(Patient.code == "DEMO-02"))
        session.add(PatientIdentity(patient_id=patient.id, **invented))
    with sessions.begin() as session:
        content = report.build(session, "DEMO-02")
    stamp = dt.datetime(2026, 1, 1, tzinfo=dt.timezone.utc)
    text = html_text(report.render(content, "html", created=stamp))
    pdf = flat(
        " ".join(
            p.extract_text()
            for p in pypdf.PdfReader(io.BytesIO(report.render(content, "pdf", created=stamp))).pages
        )
    )
    for shown in (text, pdf):
        assert "DEMO-02" in shown
        for value in ("MRN-INVENTED-5521", "Ottoline", "Quarrington", "1957-08-19", "19.08.1957"):
            assert value not in shown


# ------------------------------------------------------------------------------- dashboard: Visit review

APP = str(Path(__file__).resolve().parent.parent / "tracker" / "dashboard" / "app.py")


@pytest.fixture
def dashboard_db(db_url):
    import streamlit as st

    from dashboard_support import fill_demo

    fill_demo(db_url)  # the invented demo clinic with its saved evaluations
    st.cache_data.clear()
    st.cache_resource.clear()
    yield db_url
    st.cache_data.clear()
    st.cache_resource.clear()


def test_visit_review_offers_the_pdf_of_the_chosen_visit(dashboard_db, monkeypatch):
    from streamlit.testing.v1 import AppTest

    monkeypatch.setenv("NCS_TRACKER_DB", dashboard_db)
    at = AppTest.from_file(APP, default_timeout=120)
    at.session_state["ncs_patient"] = "DEMO-01"
    at.run()
    at.switch_page("views/visit_review.py")
    at.run()
    at.selectbox(key="review_visit").select(dt.date(2023, 2, 14)).run()
    assert not at.exception and not at.error
    [button] = [b for b in at.get("download_button") if b.proto.id.endswith("review_report_download")]
    assert "PDF" in button.proto.label and button.proto.url.endswith(".pdf")
    first = button.proto.url
    at.selectbox(key="review_visit").select(dt.date(2023, 5, 16)).run()
    [button] = [b for b in at.get("download_button") if b.proto.id.endswith("review_report_download")]
    assert button.proto.url.endswith(".pdf") and button.proto.url != first  # another visit, another file


def test_dashboard_pdf_is_the_command_line_pdf_and_saves_nothing(
    dashboard_db, engine, reports, capsys, monkeypatch
):
    from conftest import fingerprint
    from tracker.dashboard import reads

    monkeypatch.setenv("NCS_TRACKER_DB", dashboard_db)
    monkeypatch.setenv("SOURCE_DATE_EPOCH", FIXED_EPOCH)
    before = fingerprint(engine)
    served = reads.report_pdf(
        dashboard_db, "DEMO-01", dt.date(2023, 2, 14), ("efns-pns-2010-cidp",), None, "warn"
    )
    assert fingerprint(engine) == before
    out = reports / "cli.pdf"
    code, _, err = run_cli(
        capsys,
        "--db",
        dashboard_db,
        "report",
        "DEMO-01",
        "--visit",
        "2023-02-14",
        "--criteria",
        "efns-pns-2010-cidp",
        "--out",
        str(out),
    )
    assert code == 0, err
    assert served == out.read_bytes()
