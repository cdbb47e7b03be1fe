"""``ncs-tracker serve`` stops its Streamlit child when it is itself stopped (SIGTERM, SIGHUP):
no dashboard may keep serving patient data after the command that started it has gone. Common
practice for a supervising process, no source."""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import sys
import time
import urllib.request

import pytest

from tracker.db import migrate


def _free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


def _listening(port: int) -> bool:
    with socket.socket() as probe:
        probe.settimeout(1)
        return probe.connect_ex(("127.0.0.1", port)) == 0


@pytest.mark.slow
@pytest.mark.parametrize("signum", [signal.SIGTERM, signal.SIGHUP])
def test_stopping_serve_stops_the_dashboard(tmp_path, signum):
    url = f"sqlite:///{tmp_path / 'empty.sqlite3'}"
    migrate.upgrade(url)
    port = _free_port()
    log = (tmp_path / "serve.log").open("w")
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
        ],
        stdout=log,
        stderr=subprocess.STDOUT,
        start_new_session=True,
    )
    try:
        deadline = time.monotonic() + 60
        while True:
            try:
                with urllib.request.urlopen(f"http://127.0.0.1:{port}/_stcore/health", timeout=2) as answer:
                    if answer.read().strip() == b"ok":
                        break
            except OSError:
                pass
            assert process.poll() is None and time.monotonic() < deadline, (
                tmp_path / "serve.log"
            ).read_text()[-2000:]
            time.sleep(0.3)
        process.send_signal(signum)  # the command only, not its process group
        process.wait(20)
        deadline = time.monotonic() + 15
        while _listening(port) and time.monotonic() < deadline:
            time.sleep(0.2)
        assert not _listening(port), "the dashboard still answers after serve was stopped"
    finally:
        try:
            os.killpg(process.pid, signal.SIGKILL)  # whatever is left of the group, if anything
        except ProcessLookupError:
            pass
        log.close()
