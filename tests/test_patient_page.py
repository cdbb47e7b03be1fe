"""The paged patient list (Patients page) is the whole list cut by the database: same
rows, same order, same counts and outcomes as :func:`tracker.services.cohort.patient_list`,
on both backends (demo clinic, invented)."""

from __future__ import annotations

import pytest

from conftest import DEMO, run_cli
from tracker.db.session import make_engine, make_session_factory
from tracker.services.cohort import patient_list, patient_page


@pytest.fixture
def demo_url(db_url, capsys) -> str:
    files = [str(DEMO / n) for n in ("measurements.csv", "treatments.csv", "scores.csv")]
    assert run_cli(capsys, "--db", db_url, "import", *files)[0] == 0
    # Evaluate the first visits only, so that the latest outcome mixes saved outcomes and "not evaluated".
    assert run_cli(capsys, "--db", db_url, "check", "DEMO-02", "--criteria", "all")[0] == 0
    assert run_cli(capsys, "--db", db_url, "check", "DEMO-04", "--criteria", "all")[0] == 0
    return db_url


def _text(frame):
    """Rows as text; a missing value is missing however pandas holds it (None or NaN)."""
    frame = frame.drop(
        columns=["latest_criteria"], errors="ignore"
    )  # the page also names the set that judged
    return [["" if v is None or v != v else str(v) for v in row] for row in frame.itertuples(index=False)]


@pytest.mark.parametrize("criteria", ["efns-pns-2010-cidp", "ean-pns-2021-cidp", "efns-pns-2010-mmn"])
def test_pages_join_up_to_the_whole_list(demo_url, criteria):
    engine = make_engine(demo_url)
    try:
        with make_session_factory(engine)() as session:
            for search, diagnosis in (("", None), ("demo-0", None), ("", "cidp"), ("05", None)):
                whole = patient_list(session, criteria=criteria, search=search, diagnosis=diagnosis)
                first = patient_page(
                    session, criteria=criteria, search=search, diagnosis=diagnosis, page=1, page_rows=2
                )
                assert first.total == len(whole) and first.outcomes == sorted(set(whole["latest_outcome"]))
                rows = []
                for page in range(1, -(-len(whole) // 2) + 1):
                    rows += _text(
                        patient_page(
                            session,
                            criteria=criteria,
                            search=search,
                            diagnosis=diagnosis,
                            page=page,
                            page_rows=2,
                        ).rows
                    )
                assert rows == _text(whole)
                for outcome in first.outcomes:
                    chosen = patient_page(
                        session,
                        criteria=criteria,
                        search=search,
                        diagnosis=diagnosis,
                        outcome=outcome,
                        page_rows=50,
                    )
                    assert _text(chosen.rows) == _text(whole[whole["latest_outcome"] == outcome])
                    assert chosen.total == int((whole["latest_outcome"] == outcome).sum())
            # Saved outcomes exist for the two checked patients, and the rest are
            # "not evaluated", never normal.
            everyone = patient_page(session, criteria=criteria, page_rows=50).rows.set_index("patient")[
                "latest_outcome"
            ]
            assert everyone["DEMO-01"] == "not evaluated" and everyone["DEMO-02"] != "not evaluated"
    finally:
        engine.dispose()


def test_by_diagnosis_judges_each_patient_by_the_set_of_its_diagnosis(demo_url):
    """The outcome column "by diagnosis" uses the mapping of check and evaluate (MMN → the MMN set,
    CIDP → EAN/PNS 2021, GBS → Hadden 1998): each row equals the whole list of that patient's own set."""
    from tracker.services.evaluation import default_criteria

    engine = make_engine(demo_url)
    try:
        with make_session_factory(engine)() as session:
            page = patient_page(session, criteria=None, page_rows=50).rows.set_index("patient")
            assert page.loc["DEMO-04", "latest_criteria"] == "efns-pns-2010-mmn"  # DEMO-04: MMN (invented)
            assert page.loc["DEMO-02", "latest_criteria"] == "ean-pns-2021-cidp"
            for code, row in page.iterrows():
                wanted = default_criteria(row["diagnosis"])
                assert row["latest_criteria"] == wanted
                own = patient_list(session, criteria=wanted, search=code).set_index("patient")
                assert row["latest_outcome"] == own.loc[code, "latest_outcome"]
    finally:
        engine.dispose()


def test_patient_without_visits_and_outcome_pages(demo_url):
    """A patient with no visit yet is listed as "no visits" (0 visits, no dates) and counted, as in the whole
    list; with an outcome chosen, pages of one row join up to that outcome's rows (invented patient)."""
    from tracker.db.models import Patient

    engine = make_engine(demo_url)
    try:
        with make_session_factory(engine).begin() as session:
            session.add(Patient(code="DEMO-00", diagnosis="mmn"))
        with make_session_factory(engine)() as session:
            whole = patient_list(session, criteria="efns-pns-2010-mmn")
            first = patient_page(session, criteria=None, page_rows=1)
            assert first.total == len(whole) == 7 and "no visits" in first.outcomes
            assert list(first.rows["patient"]) == ["DEMO-00"]
            row = first.rows.iloc[0]
            assert row["visits"] == 0 and row["latest_outcome"] == "no visits"
            assert row["first_visit"] is None and row["last_visit"] is None
            assert row["latest_criteria"] == "efns-pns-2010-mmn"  # the patient's own diagnosis, no visit's
            for outcome in first.outcomes:
                wanted = whole[whole["latest_outcome"] == outcome] if outcome == "no visits" else None
                chosen = patient_page(session, criteria=None, outcome=outcome, page_rows=50)
                rows = []
                for page in range(1, chosen.total + 1):
                    rows += _text(
                        patient_page(session, criteria=None, outcome=outcome, page=page, page_rows=1).rows
                    )
                assert rows == _text(chosen.rows) and len(rows) == chosen.total
                if wanted is not None:
                    assert _text(chosen.rows) == _text(wanted)
    finally:
        engine.dispose()


def test_each_latest_outcome_is_read_from_the_covering_index_on_sqlite(demo_url):
    """SQLite without statistics (no ANALYZE) would look the evaluation up by the unique index and read its
    row (about 1 kB with its compressed trace) for ``outcome``; the list names the covering index, so both
    of its queries that read saved evaluations end in the index (EXPLAIN QUERY PLAN: "COVERING INDEX
    <name>")."""
    from sqlalchemy import event

    from tracker.db.models import EVALUATION_OUTCOME_INDEX

    engine = make_engine(demo_url)
    if engine.dialect.name != "sqlite":
        engine.dispose()
        pytest.skip("INDEXED BY is SQLite's; PostgreSQL's plan depends on table sizes and statistics")
    statements: list[tuple[str, tuple]] = []

    def keep(connection, cursor, statement, parameters, context, executemany) -> None:  # noqa: ANN001
        statements.append((statement, parameters))

    event.listen(engine, "before_cursor_execute", keep)
    try:
        with make_session_factory(engine)() as session:
            page = patient_page(session, criteria=None, page_rows=2)
        event.remove(engine, "before_cursor_execute", keep)
        assert page.total == 6 and len(page.rows) == 2
        reading = [(s, p) for s, p in statements if "evaluations" in s]
        assert len(reading) == 2  # the count per outcome, then the page's rows
        with engine.connect() as connection:
            for statement, parameters in reading:
                plan = connection.exec_driver_sql("EXPLAIN QUERY PLAN " + statement, parameters).all()
                steps = [row[-1] for row in plan if "evaluation" in row[-1]]
                assert steps, plan
                assert all(f"USING COVERING INDEX {EVALUATION_OUTCOME_INDEX} " in s for s in steps), steps
    finally:
        engine.dispose()
