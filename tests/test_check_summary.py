"""`ncs-tracker check`: the summary within 120 columns, `--detail`, the JSON shape, the AAN wrist setting.

Both backends. Demo patients and the patient written here are invented. Clinical values are worked out by
hand from demo_data/measurements.csv; each threshold names its source beside the check.
"""

from __future__ import annotations

import csv
import json
import re

import pytest

from conftest import DEMO, ROOT, run_cli

DEMO_FILES = [str(DEMO / n) for n in ("measurements.csv", "treatments.csv", "scores.csv")]
SNAKE = re.compile(r"\b[A-Za-z0-9]+(?:_[A-Za-z0-9]+)+\b")  # below_fibular_head, not_met, aan_wrist_exclusion
FINDING_KEYS = ("parameter", "value", "limit", "threshold", "status", "source")  # DESIGN.md §5
STATUSES = {"met", "not_met", "not_evaluable", "not_applicable"}


def demo_visits() -> dict[str, list[str]]:
    """Patient code → visit dates, from the demo file itself."""
    with open(DEMO / "measurements.csv", encoding="utf-8", newline="") as handle:
        visits: dict[str, set[str]] = {}
        for row in csv.DictReader(handle):
            visits.setdefault(row["patient"], set()).add(row["visit_date"])
    return {code: sorted(dates) for code, dates in sorted(visits.items())}


def cell(patient: str, date: str, nerve: str, modality: str, site_order: int, column: str) -> float:
    with open(DEMO / "measurements.csv", encoding="utf-8", newline="") as handle:
        for row in csv.DictReader(handle):
            if (
                row["patient"],
                row["visit_date"],
                row["nerve"],
                row["side"],
                row["modality"],
                row["site_order"],
            ) == (patient, date, nerve, "right", modality, str(site_order)):
                return float(row[column])
    raise LookupError((patient, date, nerve, modality, site_order, column))


@pytest.fixture
def demo_db(db_url, capsys):
    code, _, err = run_cli(capsys, "--db", db_url, "import", *DEMO_FILES)
    assert code == 0, err
    return db_url


def check(capsys, url: str, *args: str) -> str:
    code, out, err = run_cli(capsys, "--db", url, "check", *args)
    assert code == 0, err
    return out


def check_json(capsys, url: str, *args: str):
    return json.loads(check(capsys, url, *args, "--format", "json"))


def test_the_pattern_catches_identifiers():
    # The width-and-words test below is not vacuous: the pattern finds the identifiers the old output showed.
    for shown in (
        "ankle → below_fibular_head",
        "motor: not_met",
        "(sensory_peak_latency)",
        "setting aan_wrist_exclusion on",
    ):
        assert SNAKE.search(shown), shown
    for fine in ("below fibular head", "EFNS/PNS 2010", "F-wave latency", "DEMO-01", "doi:10.1111/ene.14959"):
        assert not SNAKE.search(fine), fine


def test_text_fits_120_columns_in_words_on_every_demo_patient(demo_db, capsys):
    """Issue 10, items 12–13: every line ≤ 120 columns and no identifier, by default, with `--criteria all`
    (and with `--detail`), on the first and the latest visit of every demo patient."""
    visits = demo_visits()
    assert len(visits) >= 6
    for code, dates in visits.items():
        for date in {dates[0], dates[-1]}:
            for extra in ([], ["--criteria", "all"], ["--criteria", "all", "--detail"]):
                out = check(capsys, demo_db, code, "--visit", date, *extra)
                assert "Outcome:" in out and "qualified clinician" in out
                for line in out.splitlines():
                    assert len(line) <= 120, (code, date, extra, line)
                    assert not SNAKE.search(line), (code, date, extra, line)
    # The default (no --visit) is the latest visit, also within the width.
    out = check(capsys, demo_db, "DEMO-02")
    assert "visit 2025-06-10" in out and max(len(line) for line in out.splitlines()) <= 120


def test_summary_in_words_with_deciding_findings_at_clinical_precision(demo_db, capsys):
    # EFNS/PNS 2010 CIDP (Van den Bergh PYK et al., Eur J Neurol 2010;17:356–363): distal latency
    # ≥ 150 % of ULN in ≥ 2 nerves → definite; median ULN 4.4 ms (Preston & Shapiro appendix, verified
    # in the shipped set).
    out = check(capsys, demo_db, "DEMO-01", "--visit", "2023-02-14", "--criteria", "efns-pns-2010-cidp")
    dml = cell("DEMO-01", "2023-02-14", "median", "motor", 1, "latency_ms")
    assert dml == 7.05 and dml >= 1.5 * 4.4
    said = " ".join(out.split())  # wrapped lines joined
    assert "Outcome: EFNS/PNS 2010 electrodiagnostic category: definite" in said
    assert "Rule: (a) distal latency in ≥ 2 nerves" in said
    assert "Deciding findings:" in said
    assert (
        "median right (motor): distal motor latency 7.05 ms (threshold ≥ 6.60 ms; 150 % of ULN 4.40)" in said
    )
    # Velocity by hand: 222 mm / (14.00 − 7.05) ms = 31.94 m/s, shown at one decimal; ≤ 70 % of LLN 49 = 34.3.
    elbow = cell("DEMO-01", "2023-02-14", "median", "motor", 2, "latency_ms")
    velocity = cell("DEMO-01", "2023-02-14", "median", "motor", 2, "distance_mm") / (elbow - dml)
    assert f"{velocity:.1f}" == "31.9"
    assert (
        "median right (motor): motor conduction velocity, wrist → elbow 31.9 m/s (threshold ≤ 34.3 m/s"
        in said
    )
    assert "Changes: first visit: nothing to compare" in said
    assert "more findings met (--detail lists them all)" in said  # 22 met findings: six shown
    # The per-item trace is not in the summary.
    assert "▲ met" not in out and "verdict" not in out


def test_summary_names_the_outcome_change_and_the_closest_miss(demo_db, capsys):
    out = check(capsys, demo_db, "DEMO-02", "--criteria", "efns-pns-2010-cidp")
    said = " ".join(out.split())
    assert "Since 2024-11-19: outcome: definite → possible" in said
    # The "possible" level keeps its specificity caution
    # (Rajabally et al., J Neurol Neurosurg Psychiatry 2009).
    assert "poor specificity" in said
    # DEMO-06's last visit: the ulnar distal CMAP duration 6.4 ms against the EFNS/PNS 2010 cut-off of 6.7 ms
    # (Van den Bergh PYK et al., Eur J Neurol 2010; values as in Ann Clin Transl Neurol
    # 2021;8:1110–1121, Table 2).
    duration = cell("DEMO-06", "2025-09-30", "ulnar", "motor", 1, "duration_ms")
    out = check(capsys, demo_db, "DEMO-06", "--criteria", "efns-pns-2010-cidp")
    said = " ".join(out.split())
    assert (
        f"Closest miss: ulnar right (motor): distal CMAP duration {duration:.2f} ms, "
        f"{6.7 - duration:.2f} ms below the threshold ≥ 6.70 ms"
    ) in said
    assert "Warnings:" in said and "below the guideline minimum" in said  # DEMO-06 has cold limbs (invented)


def test_all_sets_side_by_side(demo_db, capsys):
    from tracker.criteria import engine
    from tracker.domain.labels import criteria_title

    out = check(capsys, demo_db, "DEMO-04", "--visit", "2024-02-20", "--criteria", "all")
    lines = out.splitlines()
    start = lines.index("Criteria sets side by side (electrodiagnostic outcomes):")
    table = lines[start + 1 : start + 3 + len(engine.available())]
    assert table[0].split()[:2] == ["criteria", "set"]
    for criteria_id in engine.available():
        title = criteria_title(criteria_id)
        assert any(row.strip().startswith(title) for row in table), (title, table)
        assert f"\n{title} (criteria version" in out  # one summary per set follows
    # EFNS/PNS 2010 MMN (J Peripher Nerv Syst 2010;15:295–301): area drop (26.7 − 10.0) / 26.7 = 62.5 % ≥ 50 %
    # over wrist → below elbow → definite block (worked by hand in test_demo_outcomes).
    mmn = next(row for row in table if row.strip().startswith(criteria_title("efns-pns-2010-mmn")))
    assert "definite" in mmn


def test_detail_shows_the_per_item_trace(demo_db, capsys):
    args = ("DEMO-01", "--visit", "2023-02-14", "--criteria", "efns-pns-2010-cidp")
    summary = check(capsys, demo_db, *args)
    detail = check(capsys, demo_db, *args, "--detail")
    payload = check_json(capsys, demo_db, *args)
    assert detail.startswith(summary.split("Deciding findings:")[0])  # the summary comes first
    for nerve in payload["nerves"]:
        assert f"\n    {nerve['nerve']} {nerve['side']} ({nerve['modality']})\n" in detail, nerve["nerve"]
    # One "▲ met" verdict per met finding (the summary shows none), "– not applicable" per excluded item.
    statuses = [f["status"] for n in payload["nerves"] for f in n["findings"]]
    assert detail.count("▲ met") == statuses.count("met") > 0
    assert detail.count("– not applicable") == statuses.count("not_applicable") > 0
    assert "finding" in detail and "normal limit" in detail and "threshold" in detail and "verdict" in detail
    row = next(
        line
        for line in detail.splitlines()
        if line.strip().startswith("distal motor latency  ") and "7.05 ms" in line
    )
    assert re.search(r"7\.05 ms\s+150 % of ULN 4\.40\s+≥ 6\.60 ms\s+▲ met", row), row


@pytest.mark.parametrize("criteria", [["--criteria", "efns-pns-2010-mmn"], []])
def test_json_one_set_is_an_object(demo_db, capsys, criteria):
    payload = check_json(capsys, demo_db, "DEMO-02", *criteria)
    assert isinstance(payload, dict)
    for key in (
        "patient",
        "visit_date",
        "criteria",
        "limits",
        "outcome",
        "nerves",
        "undecided_items",
        "closest_miss",
        "warnings",
        "changes_since_previous",
        "caution",
        "settings",
    ):
        assert key in payload, key
    assert payload["undecided_items"] == []


def test_json_several_sets_are_an_array_of_objects_with_segment_and_closest_miss_objects(demo_db, capsys):
    from tracker.criteria import engine

    payloads = check_json(capsys, demo_db, "DEMO-02", "--criteria", "all")
    assert isinstance(payloads, list) and [p["criteria"] for p in payloads] == engine.available()
    two = check_json(
        capsys, demo_db, "DEMO-02", "--criteria", "aan-1991-cidp", "--criteria", "efns-pns-2010-mmn"
    )
    assert isinstance(two, list) and [p["criteria"] for p in two] == ["aan-1991-cidp", "efns-pns-2010-mmn"]
    segments = 0
    for payload in payloads:
        assert payload["patient"] == "DEMO-02" and payload["visit_date"] == "2025-06-10"
        assert isinstance(payload["undecided_items"], list)
        for nerve in payload["nerves"]:
            for finding in nerve["findings"]:
                assert all(k in finding for k in FINDING_KEYS) and finding["status"] in STATUSES
                segment = finding["segment"]
                assert segment is None or (
                    isinstance(segment, dict) and set(segment) == {"from", "to", "name"}
                )
                if segment:
                    segments += 1
                    assert segment["name"] == f"{segment['from']} → {segment['to']}"
        miss = payload["closest_miss"]
        assert miss is None or isinstance(miss, dict)
    assert segments > 0
    # EFNS/PNS 2010 MMN (J Peripher Nerv Syst 2010;15:295–301): definite block needs ≥ 50 % area reduction;
    # fibular area by hand (13.5 − 12.0) / 13.5 = 11.1 % over ankle → below fibular head: the closest miss.
    mmn = next(p for p in payloads if p["criteria"] == "efns-pns-2010-mmn")
    area = [cell("DEMO-02", "2025-06-10", "fibular", "motor", s, "area_mvms") for s in (1, 2)]
    drop = (area[0] - area[1]) / area[0] * 100
    miss = mmn["closest_miss"]
    assert miss["nerve"] == "fibular" and miss["item"] == "definite_cb" and miss["comparator"] == "ge"
    assert miss["segment"] == {
        "from": "ankle",
        "to": "below_fibular_head",
        "name": "ankle → below_fibular_head",
    }
    assert miss["value"] == pytest.approx(drop, abs=1e-4) and miss["threshold"] == 50.0
    assert miss["margin"] == pytest.approx(50.0 - drop, abs=1e-4) and "11.1 %" in miss["text"]
    # A set that is met has no closest miss.
    assert next(p for p in payloads if p["criteria"] == "hadden-1998-gbs")["closest_miss"] is None


def test_json_not_applicable_is_its_own_status(demo_db, capsys):
    # EAN/PNS 2021 (Van den Bergh PYK et al., Eur J Neurol 2021;28:3556–3583; from memory, not
    # verified): conduction block is not assessed in the tibial nerve — an exclusion, so not
    # applicable (not want of data).
    payload = check_json(capsys, demo_db, "DEMO-01", "--criteria", "ean-pns-2021-cidp")
    tibial = next(
        f for n in payload["nerves"] if n["nerve"] == "tibial" for f in n["findings"] if f["item"] == "cb"
    )
    assert tibial["status"] == "not_applicable" and tibial["reason"]
    assert (
        payload["outcome"] == "not_met" and payload["undecided_items"] == []
    )  # an exclusion leaves nothing undecided


def test_json_and_text_undecided_items(db_url, tmp_path, capsys):
    # Invented patient: ulnar amplitude drop (6.0 − 2.6) / 6.0 = 56.7 % with no negative-peak area
    # recorded. The
    # EFNS/PNS 2010 MMN guideline (J Peripher Nerv Syst 2010;15:295–301) defines block by area reduction, so
    # the missing area could make the set met: undecided, not "not met" (DESIGN.md §5).
    data = tmp_path / "invented.csv"
    data.write_text(
        "patient,visit_date,nerve,side,modality,site_order,site,distance_mm,latency_ms,amplitude_mv,duration_ms,area_mvms,"
        "temperature_c,lff_hz,diagnosis\n"
        "TEST-U1,2024-03-01,ulnar,left,motor,1,wrist,70,3.00,6.0,6.4,,33.5,2,mmn\n"
        "TEST-U1,2024-03-01,ulnar,left,motor,2,below_elbow,235,7.47,2.6,7.0,,33.5,2,mmn\n"
        "TEST-U1,2024-03-01,median,left,motor,1,wrist,70,3.60,8.4,5.2,24.1,33.5,2,mmn\n"
        "TEST-U1,2024-03-01,median,left,motor,2,elbow,247,8.06,8.0,5.2,23.0,33.5,2,mmn\n",
        encoding="utf-8",
    )
    code, _, err = run_cli(capsys, "--db", db_url, "import", str(data))
    assert code == 0, err
    payload = check_json(capsys, db_url, "TEST-U1", "--criteria", "efns-pns-2010-mmn")
    assert isinstance(payload, dict) and payload["outcome"] == "undecided"
    items = payload["undecided_items"]
    assert items and {i["item"] for i in items} >= {"definite_cb"}
    assert all(
        i["segment"] == {"from": "wrist", "to": "below_elbow", "name": "wrist → below_elbow"} for i in items
    )
    out = check(capsys, db_url, "TEST-U1", "--criteria", "efns-pns-2010-mmn")
    said = " ".join(out.split())
    assert "undecided (data missing that could make them met)" in said
    assert "Undecided: data missing that could make the set met:" in said
    assert (
        "ulnar left (motor): definite conduction block: conduction block (negative-peak area reduction), "
        "wrist → below elbow" in said
    )
    assert not any(SNAKE.search(line) or len(line) > 120 for line in out.splitlines())


def test_aan_wrist_exclusion_option(demo_db, capsys):
    # DEMO-06's last visit: the clinician marked neuropathy at the wrist on the right median (invented data).
    # AAN 1991 research criteria (Neurology 1991;41:617–618; citation from memory, not verified):
    # distal latency > 125 % of ULN; median 5.69 ms > 1.25 × 4.4 = 5.5 ms. The AAN text has no wrist
    # exclusion, so the default
    # counts it; the option (a project rule) removes it. The trace says which applied.
    dml = cell("DEMO-06", "2025-09-30", "median", "motor", 1, "latency_ms")
    assert dml > 1.25 * 4.4

    def median(payload):
        return next(
            f
            for n in payload["nerves"]
            if (n["nerve"], n["modality"]) == ("median", "motor")
            for f in n["findings"]
            if f["item"] == "dml"
        )

    default = check_json(capsys, demo_db, "DEMO-06", "--criteria", "aan-1991-cidp")
    off = check_json(capsys, demo_db, "DEMO-06", "--criteria", "aan-1991-cidp", "--no-aan-wrist-exclusion")
    on = check_json(capsys, demo_db, "DEMO-06", "--criteria", "aan-1991-cidp", "--aan-wrist-exclusion")
    assert median(default) == median(off)
    assert (
        median(off)["status"] == "met"
        and "counted" in median(off)["reason"]
        and "off" in median(off)["reason"]
    )
    assert (
        median(on)["status"] == "not_applicable"
        and "not counted" in median(on)["reason"]
        and "on" in median(on)["reason"]
    )
    assert (
        default["settings"]["aan_wrist_exclusion"] is False and on["settings"]["aan_wrist_exclusion"] is True
    )
    assert on["items_met"] <= off["items_met"]
    # The text says so in words.
    text_on = " ".join(
        check(
            capsys, demo_db, "DEMO-06", "--criteria", "aan-1991-cidp", "--aan-wrist-exclusion", "--detail"
        ).split()
    )
    assert "AAN wrist exclusion: on" in text_on and "setting AAN wrist exclusion on" in text_on
    text_off = " ".join(check(capsys, demo_db, "DEMO-06", "--criteria", "aan-1991-cidp").split())
    assert "AAN wrist exclusion: off" in text_off and "latency counted" in text_off


def test_aan_wrist_exclusion_stored_switch_applies_and_the_option_wins(demo_db, sessions, capsys):
    # The clinic's stored switch (dashboard → Settings) is the default of `check`; the option overrides it.
    from tracker.services import preferences

    with sessions.begin() as session:
        preferences.set_criteria_switch(session, "aan_wrist_exclusion", True, username="test")

    def status(*extra):
        payload = check_json(capsys, demo_db, "DEMO-06", "--criteria", "aan-1991-cidp", *extra)
        median = next(
            f
            for n in payload["nerves"]
            if (n["nerve"], n["modality"]) == ("median", "motor")
            for f in n["findings"]
            if f["item"] == "dml"
        )
        return median["status"], payload["settings"]["aan_wrist_exclusion"]

    assert status() == ("not_applicable", True)
    assert status("--no-aan-wrist-exclusion") == ("met", False)


def test_limits_import_help_cites_only_what_the_repository_holds(capsys):
    """Issue 10: `limits import --help` cited DESIGN.md §4.3, a file the repository does not hold."""
    from tracker.domain.vocabulary import LIMIT_PARAMETERS

    code, out, _ = run_cli(capsys, "limits", "import", "--help")
    assert code == 0
    text = " ".join(out.split())
    assert "§" not in text and "DESIGN" not in text
    for name in re.findall(r"[\w./-]+\.(?:md|csv|py|toml|txt)\b", text):
        assert (ROOT / name).exists(), name
    headings = re.findall(r'README \("([^"]+)"\)', text)
    assert headings
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    for heading in headings:
        assert re.search(rf"^#+ {re.escape(heading)}$", readme, re.M), heading
    for parameter in LIMIT_PARAMETERS:  # the help lists every parameter the importer accepts
        assert parameter in text, parameter
