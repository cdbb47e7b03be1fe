"""The dashboard in a real browser: Debian's headless Chromium driven by Playwright (never a downloaded
browser) against ``ncs-tracker serve`` on a free local port.

Skipped with a reason when Chromium is absent; required (fails instead) when the ``CI`` variable is set.
"""

from __future__ import annotations

import os
import re
import shutil
import signal
import socket
import subprocess
import sys
import time
import urllib.request
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import pytest

from dashboard_support import fill_demo
from tracker.db.session import make_engine, make_session_factory
from tracker.services.follow_up import follow_up

pytestmark = pytest.mark.browser
CHROMIUM_FLAGS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--no-first-run",
    "--disable-quic",
]


def chromium_path() -> str:
    path = (
        os.environ.get("NCS_TRACKER_CHROMIUM")
        or shutil.which("chromium")
        or ("/usr/bin/chromium" if Path("/usr/bin/chromium").exists() else None)
    )
    if path is None:
        reason = "Debian's chromium is not installed (apt-get install -y chromium); the browser test needs it"
        if os.environ.get("CI"):
            pytest.fail(reason + " — required in CI")
        pytest.skip(reason)
    return path


def free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


@contextmanager
def serving(folder: Path, url: str, *options: str) -> Iterator[str]:
    """``ncs-tracker serve`` on 127.0.0.1 and a free port, with ``options``; yields the base address. Its
    output (and the Streamlit child's errors) go to ``folder / "serve.log"``."""
    port = free_port()
    log = (folder / "serve.log").open("w")
    process = subprocess.Popen(
        [
            sys.executable,
            "-c",
            "from tracker.cli import main; main()",
            "--db",
            url,
            "serve",
            "--port",
            str(port),
            *options,
        ],
        stdout=log,
        stderr=subprocess.STDOUT,
        start_new_session=True,
    )
    base = f"http://127.0.0.1:{port}"
    try:
        deadline = time.monotonic() + 60
        while True:
            try:
                with urllib.request.urlopen(f"{base}/_stcore/health", timeout=2) as answer:
                    if answer.read().strip() == b"ok":
                        break
            except OSError:
                pass
            if process.poll() is not None or time.monotonic() > deadline:
                log.flush()
                pytest.fail(f"the dashboard did not start: {(folder / 'serve.log').read_text()[-2000:]}")
            time.sleep(0.3)
        yield base
    finally:
        # The server runs streamlit as a child: stop the whole process group.
        try:
            os.killpg(process.pid, signal.SIGTERM)
            process.wait(15)
        except (ProcessLookupError, subprocess.TimeoutExpired):
            os.killpg(process.pid, signal.SIGKILL)
            process.wait(5)
        log.close()


@pytest.fixture(scope="module")
def served(tmp_path_factory):
    """``ncs-tracker serve`` on the invented demo clinic; yields (base address, database URL)."""
    chromium_path()
    folder = tmp_path_factory.mktemp("browser")
    url = f"sqlite:///{folder / 'demo.sqlite3'}"
    fill_demo(url)
    with serving(folder, url) as base:
        yield base, url


def test_follow_up_page_draws_and_hover_shows_the_value(served, tmp_path):
    from playwright.sync_api import sync_playwright

    base, url = served
    engine = make_engine(url)
    with make_session_factory(engine)() as session:
        expected = follow_up(session, "DEMO-04", parameter="cv", strip_criteria=[]).points
    engine.dispose()
    shown_values = {f"{v:.1f}" for v in expected["value"]}  # velocities at clinical precision: 1 decimal

    with sync_playwright() as playwright:
        browser = playwright.chromium.launch(executable_path=chromium_path(), args=CHROMIUM_FLAGS)
        try:
            page = browser.new_page(viewport={"width": 1400, "height": 1800})
            outside: list[str] = []
            page.on(
                "request",
                lambda request: (
                    outside.append(request.url)
                    if not request.url.startswith(("http://127.0.0.1", "data:", "blob:"))
                    else None
                ),
            )
            started = time.perf_counter()
            page.goto(f"{base}/follow-up?patient=DEMO-04")
            page.wait_for_selector(".js-plotly-plot .scatterlayer path.js-line", timeout=60_000)
            drawn = time.perf_counter() - started
            page.get_by_text("DEMO-04", exact=False).first.wait_for(timeout=30_000)
            assert page.get_by_text("must be reviewed by a qualified clinician", exact=False).count() >= 1

            # Hover the first measured point of the trend chart (the second chart; the
            # first is the outcome strip).
            trend = page.locator(".js-plotly-plot").nth(1)
            point = trend.locator(".scatterlayer .trace .points path").first
            point.scroll_into_view_if_needed()
            point.hover(force=True)
            hover = trend.locator(".hoverlayer .hovertext").first
            hover.wait_for(timeout=15_000)
            text = hover.text_content() or ""  # SVG text: no innerText
            numbers = set(re.findall(r"\d+\.\d\b", text))
            assert re.search(r"\d{4}-\d{2}-\d{2}", text), text
            assert "m/s" in text and "limb temperature" in text, text
            assert numbers & shown_values, (text, sorted(shown_values)[:5])

            shot = tmp_path / "follow_up.png"
            page.screenshot(path=str(shot), full_page=True)
            assert shot.stat().st_size > 20_000
            assert not outside, f"the page asked for outside addresses: {outside[:3]}"
            print(f"follow-up page drawn in {drawn:.2f} s; screenshot {shot}")
        finally:
            browser.close()


def test_follow_up_page_shows_the_treatment_response(served, tmp_path):
    from playwright.sync_api import sync_playwright

    from tracker.domain.labels import CLASSIFICATION_LABELS, CLASSIFICATION_SHAPES
    from tracker.services.response import patient_response

    base, url = served
    engine = make_engine(url)
    with make_session_factory(engine)() as session:
        expected = patient_response(session, "DEMO-02")
    engine.dispose()
    assert expected.classifications
    current = next(c for c in reversed(expected.classifications) if c.regimen == expected.current)
    word = f"{CLASSIFICATION_SHAPES[current.classification]} {CLASSIFICATION_LABELS[current.classification]}"

    with sync_playwright() as playwright:
        browser = playwright.chromium.launch(executable_path=chromium_path(), args=CHROMIUM_FLAGS)
        try:
            page = browser.new_page(viewport={"width": 1400, "height": 2400})
            outside: list[str] = []
            page.on(
                "request",
                lambda request: (
                    outside.append(request.url)
                    if not request.url.startswith(("http://127.0.0.1", "data:", "blob:"))
                    else None
                ),
            )
            page.goto(f"{base}/follow-up?patient=DEMO-02")
            page.get_by_text("Treatment response", exact=True).wait_for(timeout=60_000)
            assert page.get_by_text("defers to the treating clinician", exact=False).count() >= 1
            # The running regimen's card: the classification word and shape, then the regimen in words.
            card = page.locator("p").filter(has_text=word).first
            card.wait_for(timeout=30_000)
            assert current.regimen.label() in (card.text_content() or "")
            # The score panels are drawn: one subplot title per scale.
            page.wait_for_function("document.querySelectorAll('.js-plotly-plot').length >= 3", timeout=60_000)
            scores = page.locator(".js-plotly-plot").nth(2)
            titles = scores.locator(".annotation-text").all_text_contents()
            assert sum("higher is" in t for t in titles) == expected.scores["scale"].nunique(), titles
            shot = tmp_path / "follow_up_response.png"
            page.screenshot(path=str(shot), full_page=True)
            assert not outside, f"the page asked for outside addresses: {outside[:3]}"
            print(f"screenshot {shot}")
        finally:
            browser.close()


def test_sign_in_form_then_a_viewer_sees_the_patients_page(tmp_path):
    """``serve --sign-in``: the first page is the sign-in form and shows no patient; a viewer who signs in
    sees the Patients page without New study; the password reaches neither the page nor the server's log."""
    from playwright.sync_api import sync_playwright

    from tracker.db.models import User
    from tracker.services.access.accounts import hash_password

    password = "invented browser pass 3"  # a test account only
    url = f"sqlite:///{tmp_path / 'demo.sqlite3'}"
    fill_demo(url)
    engine = make_engine(url)
    with make_session_factory(engine).begin() as session:
        session.add(
            User(
                username="viewer-invented",
                role="viewer",
                active=True,
                failed_sign_ins=0,
                password_hash=hash_password(password),
            )
        )
    engine.dispose()

    local = ("http://127.0.0.1", "data:", "blob:")
    with serving(tmp_path, url, "--sign-in") as base, sync_playwright() as playwright:
        browser = playwright.chromium.launch(executable_path=chromium_path(), args=CHROMIUM_FLAGS)
        try:
            page = browser.new_page(viewport={"width": 1400, "height": 1200})
            outside: list[str] = []
            page.on("request", lambda r: None if r.url.startswith(local) else outside.append(r.url))
            page.goto(f"{base}/follow-up?patient=DEMO-04")  # a deep link to a patient, before signing in
            page.get_by_role("button", name="Sign in").wait_for(timeout=60_000)
            caution = page.get_by_text("must be reviewed by a qualified clinician", exact=False)
            caution.first.wait_for(timeout=30_000)
            assert "DEMO-" not in page.content()

            page.get_by_role("textbox", name="User name").fill("viewer-invented")
            page.get_by_role("textbox", name="Password").fill(password)
            page.get_by_role("button", name="Sign in").click()
            page.get_by_role("heading", name="Patients").wait_for(timeout=60_000)
            # The table is drawn on a canvas; its cells are kept, hidden, for screen readers.
            cell = page.locator("[role=gridcell]", has_text="DEMO-01")
            cell.first.wait_for(state="attached", timeout=30_000)
            sidebar = page.locator('[data-testid="stSidebar"]')
            sidebar.get_by_text("viewer-invented (viewer)", exact=False).wait_for(timeout=30_000)
            assert sidebar.get_by_text("Follow-up", exact=True).count() >= 1
            assert sidebar.get_by_text("New study", exact=True).count() == 0
            assert password not in page.content()
            assert not outside, f"the page asked for outside addresses: {outside[:3]}"
        finally:
            browser.close()
    assert password not in (tmp_path / "serve.log").read_text()
