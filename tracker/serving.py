"""Run the Streamlit dashboard as a child process: bound to one address, usage statistics and outside
lookups off, no error details in the browser, our theme; the database URL and the sign-in requirement pass
through the environment.

Without sign-in the dashboard acts as the login that started it, which is right only for one person on their
own machine: on any address other than loopback it refuses to start unless sign-in is on.
"""

from __future__ import annotations

import ipaddress
import os
import signal
import socket
import subprocess
import sys
from collections.abc import Callable
from pathlib import Path

from tracker import CAUTION
from tracker.config import ENV_DB, ENV_SIGN_IN
from tracker.dashboard import style
from tracker.errors import TrackerError
from tracker.services import input_limits

APP = Path(__file__).resolve().parent / "dashboard" / "app.py"


def free_port(host: str, wanted: int, tries: int = 50) -> int:
    """``wanted`` if nothing listens there, else the next free port."""
    family = socket.AF_INET6 if ":" in host else socket.AF_INET  # "::1" cannot be probed as IPv4
    for port in range(wanted, wanted + tries):
        with socket.socket(family, socket.SOCK_STREAM) as probe:
            probe.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
            try:
                probe.bind((host, port))
            except OSError:
                continue
            return port
    raise TrackerError(
        f"No free port between {wanted} and {wanted + tries - 1} on {host}; choose one with --port."
    )


def streamlit_command(host: str, port: int) -> list[str]:
    return [
        sys.executable,
        "-m",
        "tracker.dashboard.launch",
        "run",
        str(APP),
        "--server.address",
        host,
        "--server.port",
        str(port),
        "--server.headless",
        "true",
        "--browser.gatherUsageStats",
        "false",
        "--client.showErrorDetails",
        "none",
        "--client.toolbarMode",
        "minimal",
        "--server.fileWatcherType",
        "none",
        "--server.runOnSave",
        "false",
        # Uploads larger than an import accepts are refused by the browser side, not held in memory first.
        "--server.maxUploadSize",
        str(max(1, input_limits.from_environment().file_bytes // input_limits.MB)),
        "--theme.base",
        "light",
        "--theme.primaryColor",
        style.ACCENT,
        "--theme.textColor",
        style.INK,
        "--theme.secondaryBackgroundColor",
        style.PAPER,
    ]


def is_loopback(host: str) -> bool:
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def check_exposure(host: str, *, sign_in: bool) -> None:
    """Refuse to serve patient data beyond this machine without sign-in."""
    if not sign_in and not is_loopback(host):
        raise TrackerError(
            f"Refusing to serve on {host} without sign-in: anyone who can reach that address would see every "
            "patient. Add --sign-in (accounts with passwords: 'ncs-tracker users init', 'users add'), or "
            "serve on 127.0.0.1 for yourself only."
        )


def run_dashboard(url: str, *, host: str, port: int, sign_in: bool, announce: Callable[[str], None]) -> None:
    """Start the dashboard and wait until it stops. Ctrl+C, SIGTERM and SIGHUP stop the Streamlit child too,
    so that no dashboard keeps serving patient data after ``serve`` itself was stopped."""
    check_exposure(host, sign_in=sign_in)
    port = free_port(host, port)
    environment = {k: v for k, v in os.environ.items() if k != ENV_SIGN_IN}
    environment.update({ENV_DB: url, "STREAMLIT_BROWSER_GATHER_USAGE_STATS": "false"})
    if sign_in:
        environment[ENV_SIGN_IN] = "required"
    process = subprocess.Popen(streamlit_command(host, port), env=environment, stdout=subprocess.DEVNULL)
    shown_host = "127.0.0.1" if host in ("127.0.0.1", "localhost") else f"[{host}]" if ":" in host else host

    def stop(signum, _frame) -> None:
        raise _Stopped(signum)

    previous = {sig: signal.signal(sig, stop) for sig in (signal.SIGTERM, signal.SIGHUP)}
    try:
        announce(f"Dashboard: http://{shown_host}:{port}  (press Ctrl+C to stop)")
        announce(CAUTION)
        code = process.wait()
    except (KeyboardInterrupt, _Stopped):
        _stop_child(process)
        return
    finally:
        for sig, handler in previous.items():
            signal.signal(sig, handler)
        if process.poll() is None:  # any other way out (an error while announcing): never leave it serving
            _stop_child(process)
    if code != 0:
        raise TrackerError(f"The dashboard stopped with exit code {code}.")


class _Stopped(Exception):
    """``serve`` received SIGTERM or SIGHUP."""


def _stop_child(process: subprocess.Popen) -> None:
    process.terminate()
    try:
        process.wait(10)
    except subprocess.TimeoutExpired:
        process.kill()
        process.wait()
