"""Settings: which database to use, and who is acting.

Setting — environment variable — default:

- database URL — ``NCS_TRACKER_DB`` — SQLite file ``ncs-tracker.sqlite3`` in the user data folder;
- acting user (audit trail) — ``NCS_TRACKER_USER`` may only restate it — the login: operating-system account
  (SQLite), database login (PostgreSQL);
- dashboard sign-in — ``NCS_TRACKER_SIGN_IN=required`` (set by ``serve --sign-in``) — off on loopback.
"""

from __future__ import annotations

import getpass
import os
from pathlib import Path

ENV_DB = "NCS_TRACKER_DB"
ENV_USER = "NCS_TRACKER_USER"
# Set to "required" by ``serve --sign-in`` for the dashboard process.
ENV_SIGN_IN = "NCS_TRACKER_SIGN_IN"


def user_data_dir() -> Path:
    """The per-user data folder (``$XDG_DATA_HOME/ncs-tracker`` or ``~/.local/share/ncs-tracker``)."""
    base = os.environ.get("XDG_DATA_HOME") or str(Path.home() / ".local" / "share")
    return Path(base) / "ncs-tracker"


def default_database_path() -> Path:
    return user_data_dir() / "ncs-tracker.sqlite3"


def sqlite_url(path: Path) -> str:
    return f"sqlite:///{path.resolve()}"


def resolve_database_url(explicit: str | None = None) -> tuple[str, bool]:
    """Return ``(url, is_default)``: the explicit URL, else ``NCS_TRACKER_DB``, else the default file.

    The default file's folder is created so that SQLite can open it.
    """
    url = explicit or os.environ.get(ENV_DB)
    if url:
        return url, False
    path = default_database_path()
    path.parent.mkdir(parents=True, exist_ok=True)
    return sqlite_url(path), True


def acting_user(explicit: str | None = None) -> str:
    """Name recorded in the audit trail for writes made by this process."""
    if explicit:
        return explicit
    env = os.environ.get(ENV_USER)
    if env:
        return env
    try:
        return getpass.getuser()
    except Exception:  # no login name (containers): still record something honest
        return "unknown"
