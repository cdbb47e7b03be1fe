"""Settings kept in the database apply to the command line as well as to the dashboard."""

from __future__ import annotations

import json

from conftest import run_cli
from dashboard_support import fill_demo
from tracker.db.session import make_engine, make_session_factory
from tracker.services import preferences


def test_stored_settings_are_the_cli_defaults(tmp_path, capsys):
    url = f"sqlite:///{tmp_path / 'prefs.sqlite3'}"
    fill_demo(url)
    # DEMO-06's last visit has limbs colder than the guideline minimum (invented data): their findings depend
    # on the temperature policy.
    code, out, _ = run_cli(capsys, "--db", url, "check", "DEMO-06", "--format", "json")
    assert code == 0
    before = json.loads(out)
    assert before["criteria"] == "ean-pns-2021-cidp"  # by diagnosis (CIDP) when nothing is stored
    cold_nerves = {tuple(message.split(":")[0].split()) for message in before["warnings"]}
    assert cold_nerves
    engine = make_engine(url)
    with make_session_factory(engine).begin() as session:
        preferences.set_default_criteria(session, "efns-pns-2010-cidp", username="test")
        preferences.set_cold_limbs(session, "exclude", username="test")
    engine.dispose()
    code, out, _ = run_cli(capsys, "--db", url, "check", "DEMO-06", "--format", "json")
    after = json.loads(out)
    assert after["criteria"] == "efns-pns-2010-cidp"
    cold = [
        f
        for n in after["nerves"]
        if (n["nerve"], n["side"], n["modality"]) in cold_nerves
        for f in n["findings"]
    ]
    # Cold limb excluded is want of usable data (not evaluable); items that do not apply to the nerve anyway
    # (exclusion, pattern) stay not applicable (DESIGN.md §5).
    assert cold and all(f["status"] in ("not_evaluable", "not_applicable") for f in cold)
    assert all("cold limb" in f["reason"] for f in cold if f["status"] == "not_evaluable"), [
        f for f in cold if f["status"] == "not_evaluable" and "cold limb" not in f["reason"]
    ]
    assert any(f["status"] == "not_evaluable" for f in cold)
    # An explicit option still wins over the stored setting.
    code, out, _ = run_cli(
        capsys, "--db", url, "check", "DEMO-06", "--format", "json", "--cold-limbs", "warn"
    )
    warned = [
        f
        for n in json.loads(out)["nerves"]
        if (n["nerve"], n["side"], n["modality"]) in cold_nerves
        for f in n["findings"]
    ]
    assert any(f["status"] != "not_evaluable" for f in warned)


def test_unknown_settings_are_refused(tmp_path):
    import pytest

    from tracker.db import migrate
    from tracker.errors import TrackerError

    url = f"sqlite:///{tmp_path / 'p.sqlite3'}"
    migrate.upgrade(url)
    engine = make_engine(url)
    with make_session_factory(engine).begin() as session:
        with pytest.raises(TrackerError, match="Unknown criteria set"):
            preferences.set_default_criteria(session, "efns-2010", username="test")
        with pytest.raises(TrackerError, match="Unknown temperature policy"):
            preferences.set_cold_limbs(session, "correct", username="test")
    engine.dispose()
