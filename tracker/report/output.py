"""Writing a report file: the format from the file name, atomically, readable by its owner only."""

from __future__ import annotations

import datetime as dt
import os
import tempfile
from pathlib import Path

from tracker.errors import TrackerError

FORMATS = {".pdf": "pdf", ".html": "html", ".htm": "html"}


def format_of(path: Path) -> str:
    """``pdf`` or ``html`` from the file's extension; anything else is refused."""
    chosen = FORMATS.get(path.suffix.lower())
    if chosen is None:
        raise TrackerError(
            f"Unsupported report file type {path.suffix or '(none)'!r} for {path.name}; use a name ending in "
            ".pdf or .html."
        )
    return chosen


def creation_stamp() -> dt.datetime:
    """Now (UTC), or the moment ``SOURCE_DATE_EPOCH`` names (reproducible-builds
    convention) when it is set."""
    epoch = os.environ.get("SOURCE_DATE_EPOCH", "").strip()
    if epoch:
        try:
            return dt.datetime.fromtimestamp(int(epoch), tz=dt.timezone.utc)
        except (ValueError, OverflowError, OSError):
            raise TrackerError(
                f"SOURCE_DATE_EPOCH must be whole seconds since 1970-01-01, got {epoch!r}"
            ) from None
    return dt.datetime.now(dt.timezone.utc).replace(microsecond=0)


def refuse_existing(path: Path, overwrite: bool) -> None:
    if path.exists() and not overwrite:
        raise TrackerError(f"{path} already exists; choose another --out or add --overwrite.")
    if not path.parent.is_dir():
        raise TrackerError(f"The folder {path.parent} does not exist.")


def write_private(path: Path, data: bytes, *, overwrite: bool) -> None:
    """Write ``data`` to ``path`` with mode 0600: a temporary file in the same folder, then a rename (an
    existing file is replaced only with ``overwrite``; otherwise a file that appeared meanwhile is kept)."""
    refuse_existing(path, overwrite)
    handle, temporary = tempfile.mkstemp(
        prefix=f".{path.name}.", suffix=".partial", dir=path.parent
    )  # mode 0600
    try:
        with os.fdopen(handle, "wb") as stream:
            stream.write(data)
            stream.flush()
            os.fsync(stream.fileno())
        os.chmod(temporary, 0o600)
        if overwrite:
            os.replace(temporary, path)
        else:
            try:
                os.link(temporary, path)  # fails if the name was taken meanwhile: never clobbers
            except FileExistsError:
                raise TrackerError(
                    f"{path} already exists; choose another --out or add --overwrite."
                ) from None
            os.unlink(temporary)
    finally:
        if os.path.exists(temporary):
            os.unlink(temporary)
