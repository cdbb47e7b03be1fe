"""Backup and restore of a whole database, with the export secret kept apart.

A backup is one file, a tar archive (mode 0600) of two members:

- ``manifest.json``: what the backup holds (backend, schema revision, rows per table, the payload's size and
  SHA-256, a check value of the export secret, never the secret itself);
- the payload: on SQLite ``database.sqlite3``, a copy made with SQLite's online backup API (one read
  transaction, so a database in use is copied consistently, with the writes still in its WAL file); on
  PostgreSQL ``database.pgdump``, made by ``pg_dump`` (custom format) in one snapshot.

The export secret (``app_settings``, key :data:`tracker.services.preferences.EXPORT_SECRET_KEY`) keys the
pseudonymous export ids and date shifts: whoever holds it and an export can link export ids to patient codes.
It is therefore not in the backup (deleted from the SQLite copy with ``secure_delete`` and ``VACUUM``;
excluded from the dump on PostgreSQL) but written to a separate secret file (mode 0600).

Restore checks the archive (checksum, format, schema revision: older is migrated, newer refused), refuses
to replace a database holding rows unless forced (saying what would be lost), and is all-or-nothing: SQLite
restores into a staging copy that is migrated and checked first, then copied into the target in one write
transaction (the backup API again); PostgreSQL clears the schema, replays the dump, migrates and records
the restore in one transaction. Without the secret file the restored database gets a new secret, so export
ids made from now on differ from earlier exports.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import hmac
import io
import json
import os
import re
import secrets
import shutil
import sqlite3
import subprocess
import tarfile
import tempfile
from collections.abc import Iterable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from alembic import command
from alembic.script import ScriptDirectory
from sqlalchemy import Connection, text
from sqlalchemy.engine import make_url
from sqlalchemy.orm import Session

from tracker import __version__
from tracker.config import sqlite_url
from tracker.db import migrate
from tracker.db.models import Base
from tracker.db.session import (
    create_private_file,
    is_sqlite,
    make_engine,
    make_session_factory,
    normalise_url,
)
from tracker.domain.labels import words
from tracker.errors import TrackerError
from tracker.services import preferences
from tracker.services.access.accounts import os_login
from tracker.services.access.audit import record

BACKUP_KIND = "ncs-tracker backup"
SECRET_KIND = "ncs-tracker export secret"
# Version of the archive layout; a restore refuses a larger one (made by a newer ncs-tracker).
BACKUP_FORMAT = 1
SECRET_FORMAT = 1
MANIFEST = "manifest.json"
PAYLOADS = {"sqlite": "database.sqlite3", "postgresql": "database.pgdump"}
# The manifest is small (rows per table, a few settings); anything larger is not ours.
MANIFEST_MAX_BYTES = 4 * 1024 * 1024
SECRET_FILE_MAX_BYTES = 64 * 1024
# Label of the secret's check value: HMAC-SHA256 of this text under the secret. It tells whether a secret
# file belongs to a backup without revealing anything about the secret (256 random bits).
SECRET_CHECK_LABEL = b"ncs-tracker export secret check"
# How long a PostgreSQL restore waits for other sessions to release the tables before giving up.
PG_LOCK_TIMEOUT = "30s"
COPY_CHUNK_BYTES = 1024 * 1024
_COPY_START = re.compile(rb"^COPY .+ FROM stdin;\r?\n$")
# psql meta-commands that pg_restore writes around a script (protection against psql command injection);
# they mean nothing to the server, and this module interprets no meta-command at all.
_PSQL_GUARDS = (b"\\restrict ", b"\\unrestrict ")


class RestoreRefused(TrackerError):
    """A restore that would lose data or cannot be trusted; nothing was changed."""


class BackupRefused(TrackerError):
    """A backup that cannot be made; nothing was written."""


@dataclass(frozen=True)
class BackupResult:
    """What ``backup`` wrote. ``secret`` is ``"apart"`` (secret file written), ``"not_written"`` (asked not
    to) or ``"none"`` (the database has no export secret yet: no export was made)."""

    path: Path
    size: int
    sha256: str
    backend: str
    schema_revision: str
    tables: dict[str, int]
    secret: str
    secret_path: Path | None
    audited: bool


@dataclass(frozen=True)
class RestoreResult:
    """What ``restore`` did. ``secret`` is ``"from_file"``, ``"new"`` (the backup's database had a secret and
    no secret file was given) or ``"none"`` (the backup's database had none). ``replaced``: the rows the
    target held before (empty when it held none)."""

    backend: str
    created_at: str
    schema_revision: str
    migrated_to: str | None
    tables: dict[str, int]
    secret: str
    replaced: dict[str, int] = field(default_factory=dict)


# --- identity -------------------------------------------------------------------------------------------


def login_name(url: str) -> str:
    """Who acts: the database login on PostgreSQL (``current_user``), the operating-system account on SQLite
    (as :func:`tracker.services.access.accounts.system_identity` says it)."""
    if is_sqlite(url):
        return os_login()
    engine = make_engine(url)
    try:
        with engine.connect() as connection:
            return connection.execute(text("SELECT current_user")).scalar_one()
    except Exception as error:
        raise TrackerError(
            f"Cannot open the database: {type(error).__name__}. Check --db / NCS_TRACKER_DB."
        ) from None
    finally:
        engine.dispose()


# --- backup ---------------------------------------------------------------------------------------------


def secret_check(secret_hex: str) -> str:
    """A 16-hex-digit check value of the export secret (HMAC-SHA256 of a fixed label): matches a secret file
    to its backup without giving the secret away."""
    return hmac.new(bytes.fromhex(secret_hex), SECRET_CHECK_LABEL, hashlib.sha256).hexdigest()[:16]


def default_secret_path(path: Path) -> Path:
    """Where the secret goes unless told otherwise: ``FILE.secret`` beside the backup."""
    return path.with_name(path.name + ".secret")


def backup(
    url: str, path: Path, *, username: str, secret_path: Path | None = None, write_secret: bool = True
) -> BackupResult:
    """Write a backup of the database at ``url`` to ``path`` (which must not exist), and the export secret to
    ``secret_path`` (default ``FILE.secret``) unless ``write_secret`` is false.

    Both files are created with mode 0600 under a temporary name and moved into place only when complete;
    on any failure neither is left behind. The backup is recorded in the audit trail when the schema is
    current (an outdated schema is backed up as it is, before ``db upgrade``).
    """
    url = normalise_url(url)
    backend = "sqlite" if is_sqlite(url) else "postgresql"
    path = Path(path)
    secret_path = Path(secret_path) if secret_path is not None else default_secret_path(path)
    if path.is_dir():
        raise BackupRefused(
            f"{path} is a folder; give the backup file's name (for example {path / 'ncs.ncsbak'})."
        )
    if write_secret and secret_path.resolve() == path.resolve():
        raise BackupRefused("The secret file and the backup must be different files.")
    reserved: list[Path] = []
    work = None
    try:
        _reserve(path, "backup", reserved)
        if write_secret:
            _reserve(secret_path, "secret file", reserved)
        work = Path(tempfile.mkdtemp(dir=path.parent, prefix=".ncs-backup-"))  # mode 0700
        payload = work / PAYLOADS[backend]
        if backend == "sqlite":
            info = _sqlite_payload(url, payload)
        else:
            info = _pg_payload(url, payload, work)
        secret_hex = info.pop("secret_value")
        size, digest = _file_digest(payload)
        state = "none" if secret_hex is None else ("apart" if write_secret else "not_written")
        manifest = {
            "kind": BACKUP_KIND,
            "format": BACKUP_FORMAT,
            "created_at": dt.datetime.now(dt.UTC).isoformat(timespec="seconds"),
            "tool_version": __version__,
            "backend": backend,
            "schema_revision": info["revision"],
            "payload": {"name": payload.name, "size": size, "sha256": digest},
            "tables": info["tables"],
            "settings": info.get("settings"),
            "export_secret": None
            if secret_hex is None
            else {
                "check": secret_check(secret_hex),
                "row": info["secret_row"],
                "kept": state,
            },
        }
        archive = work / "backup.tar"
        _write_archive(archive, manifest, payload)
        secret_file = None
        if write_secret and secret_hex is not None:
            # Beside its final name (which may be on another medium), so that the move is a rename.
            secret_file = secret_path.with_name(f".{secret_path.name}.{secrets.token_hex(4)}.tmp")
            reserved.append(secret_file)
            _write_secret_file(secret_file, secret_hex, manifest)
        # Recorded before the files take their names: a backup never exists without its audit event.
        audited = _record_backup(url, username, path, manifest, state)
        # Everything is complete: move into place (the reserved names are ours, created exclusively).
        if secret_file is not None:
            os.replace(secret_file, secret_path)
        elif write_secret:
            secret_path.unlink()  # nothing to keep apart: no export was ever made from this database
        os.replace(archive, path)
        _sync_folder(path.parent)
        _sync_folder(secret_path.parent)
        reserved.clear()
    finally:
        for leftover in reserved:
            leftover.unlink(missing_ok=True)
        if work is not None:
            shutil.rmtree(work, ignore_errors=True)
    total_size, total_digest = _file_digest(path)
    return BackupResult(
        path=path,
        size=total_size,
        sha256=total_digest,
        backend=backend,
        schema_revision=info["revision"],
        tables=info["tables"],
        secret=state,
        secret_path=secret_path if state == "apart" else None,
        audited=audited,
    )


def _reserve(path: Path, what: str, reserved: list[Path]) -> None:
    """Claim ``path`` by creating it empty (0600, exclusively): refuse when it exists."""
    if path.exists() or path.is_symlink():
        raise BackupRefused(f"The {what} {path} exists already; choose another name (nothing was written).")
    if not path.parent.is_dir():
        raise BackupRefused(f"The folder {path.parent} does not exist (nothing was written).")
    if not create_private_file(path):
        raise BackupRefused(f"Cannot create the {what} {path} (nothing was written).")
    reserved.append(path)


def _sqlite_payload(url: str, payload: Path) -> dict[str, Any]:
    """Copy the SQLite database into ``payload`` and take the export secret out of the copy."""
    source_path = _sqlite_path(url)
    if not source_path.is_file():
        raise BackupRefused(f"There is no database file at {source_path}; nothing to back up.")
    # mode=rw: never create an empty database where the named file is missing.
    source = sqlite3.connect(
        f"{source_path.resolve().as_uri()}?mode=rw", uri=True, isolation_level=None, timeout=30
    )
    _new_private_file(payload)
    copy = sqlite3.connect(payload, isolation_level=None)
    try:
        # All pages in one step: one read transaction on the source, so the copy is one consistent state,
        # committed writes still in the WAL file included, uncommitted ones not.
        source.backup(copy)
    finally:
        source.close()
    try:
        copy.execute("PRAGMA journal_mode=DELETE")  # the copy is one self-contained file
        tables = _sqlite_tables(copy)
        if "alembic_version" not in tables:
            raise BackupRefused("This database has no ncs-tracker schema; nothing to back up.")
        revision = copy.execute("SELECT version_num FROM alembic_version").fetchone()[0]
        secret_value, secret_row = None, None
        if "app_settings" in tables:
            cursor = copy.execute(
                "SELECT * FROM app_settings WHERE key = ?", (preferences.EXPORT_SECRET_KEY,)
            )
            row = cursor.fetchone()
            if row is not None:
                secret_row = dict(zip([c[0] for c in cursor.description], row, strict=True))
                secret_value = secret_row.pop("value")
                # secure_delete overwrites the freed bytes; VACUUM then rebuilds the file without free pages.
                copy.execute("PRAGMA secure_delete=ON")
                copy.execute("DELETE FROM app_settings WHERE key = ?", (preferences.EXPORT_SECRET_KEY,))
                copy.execute("VACUUM")
        _sqlite_integrity(copy, "the copy")
        counts = _sqlite_counts(copy)
    finally:
        copy.close()
    return {"revision": revision, "tables": counts, "secret_value": secret_value, "secret_row": secret_row}


def _pg_payload(url: str, payload: Path, work: Path) -> dict[str, Any]:
    """Dump the PostgreSQL database into ``payload`` with ``pg_dump`` inside one exported snapshot; the
    settings (without the secret) and the counts are read in the same snapshot."""
    pg_dump = _tool("pg_dump")
    engine = make_engine(url)
    try:
        with engine.connect() as base:
            connection = base.execution_options(isolation_level="REPEATABLE READ", postgresql_readonly=True)
            with connection.begin():
                snapshot = connection.execute(text("SELECT pg_export_snapshot()")).scalar_one()
                schema = connection.execute(text("SELECT current_schema()")).scalar_one()
                tables = _pg_tables(connection)
                if "alembic_version" not in tables:
                    raise BackupRefused("This database has no ncs-tracker schema; nothing to back up.")
                revision = connection.execute(text("SELECT version_num FROM alembic_version")).scalar_one()
                counts = {name: _pg_count(connection, name) for name in tables}
                settings: list[dict[str, Any]] = []
                secret_value, secret_row = None, None
                if "app_settings" in tables:
                    rows = connection.execute(
                        text("SELECT row_to_json(s)::text FROM app_settings s ORDER BY key")
                    )
                    for (row_json,) in rows:
                        row = json.loads(row_json)
                        if row.get("key") == preferences.EXPORT_SECRET_KEY:
                            secret_value, secret_row = row.pop("value"), row
                        else:
                            settings.append(row)
                    counts["app_settings"] = len(settings)
                # app_settings' rows travel in the manifest (without the secret): the dump has none of them.
                args = [
                    pg_dump,
                    "--format=custom",
                    f"--snapshot={snapshot}",
                    f"--file={payload}",
                    f'--exclude-table-data="{schema}"."app_settings"',
                    "--no-password",
                ]
                _run_pg_tool(args, url, work, "pg_dump")
    except TrackerError:
        raise
    except Exception as error:
        raise BackupRefused(
            f"Cannot read the database: {type(error).__name__}. Check --db / NCS_TRACKER_DB."
        ) from None
    finally:
        engine.dispose()
    return {
        "revision": revision,
        "tables": counts,
        "settings": settings,
        "secret_value": secret_value,
        "secret_row": secret_row,
    }


def _write_archive(archive: Path, manifest: dict[str, Any], payload: Path) -> None:
    _new_private_file(archive)
    data = json.dumps(manifest, indent=2, sort_keys=True).encode("utf-8")
    now = int(dt.datetime.now(dt.UTC).timestamp())
    with archive.open("r+b") as raw:
        with tarfile.open(fileobj=raw, mode="w", format=tarfile.PAX_FORMAT) as tar:
            tar.addfile(_member(MANIFEST, len(data), now), io.BytesIO(data))
            with payload.open("rb") as stream:
                tar.addfile(_member(payload.name, payload.stat().st_size, now), stream)
        raw.flush()
        os.fsync(raw.fileno())


def _member(name: str, size: int, mtime: int) -> tarfile.TarInfo:
    info = tarfile.TarInfo(name)
    info.size, info.mode, info.mtime = size, 0o600, mtime
    return info


def _write_secret_file(path: Path, secret_hex: str, manifest: dict[str, Any]) -> None:
    content = {
        "kind": SECRET_KIND,
        "format": SECRET_FORMAT,
        "secret": secret_hex,
        "check": secret_check(secret_hex),
        "backup_created_at": manifest["created_at"],
        "note": "The export secret of one ncs-tracker database: with it, export ids and shifted dates can be "
        "linked to patient codes. Keep it apart from the backups, readable by the administrator only; "
        "give it to 'ncs-tracker restore --secret' so that exports keep their ids.",
    }
    _new_private_file(path)
    with path.open("r+b") as stream:
        stream.write((json.dumps(content, indent=2) + "\n").encode("utf-8"))
        stream.flush()
        os.fsync(stream.fileno())


def _record_backup(url: str, username: str, path: Path, manifest: dict[str, Any], secret_state: str) -> bool:
    """Record the backup in the audit trail; only on a current schema (an outdated one is backed up as is)."""
    engine = make_engine(url)
    try:
        if migrate.current_revision(engine) != migrate.head_revision():
            return False
        with make_session_factory(engine).begin() as session:
            record(
                session,
                username=username,
                action="backup",
                entity="database",
                after={
                    "file": str(path.resolve()),
                    "schema_revision": manifest["schema_revision"],
                    "rows": sum(manifest["tables"].values()),
                    "export_secret": _SECRET_WORDS[secret_state],
                },
            )
        return True
    except Exception as error:
        raise BackupRefused(
            f"The backup could not be recorded in the audit trail ({_describe(error)}); "
            "nothing was written. Try again."
        ) from None
    finally:
        engine.dispose()


_SECRET_WORDS = {
    "apart": "written to a separate file",
    "not_written": "not written (kept from an earlier backup)",
    "none": "none yet",
    "from_file": "taken from the secret file",
    "new": "new (export ids differ from earlier exports)",
}


# --- reading a backup -----------------------------------------------------------------------------------


def read_manifest(path: Path) -> dict[str, Any]:
    """The checked manifest of the backup at ``path`` (:class:`RestoreRefused` when it is not one)."""
    with _open_archive(path) as (manifest, _tar, _member_info):
        return manifest


@contextmanager
def _open_archive(path: Path) -> Iterator[tuple[dict[str, Any], tarfile.TarFile, tarfile.TarInfo]]:
    path = Path(path)
    if not path.is_file():
        raise RestoreRefused(f"There is no backup file at {path}.")
    not_ours = f"{path} is not an ncs-tracker backup"
    try:
        tar = tarfile.open(path, mode="r:")
    except (tarfile.TarError, OSError):
        raise RestoreRefused(f"{not_ours} (not an archive made by 'ncs-tracker backup').") from None
    with tar:
        try:
            members = {member.name: member for member in tar.getmembers()}
        except (tarfile.TarError, OSError):
            raise RestoreRefused(f"{not_ours} or it is damaged (the archive cannot be read).") from None
        info = members.get(MANIFEST)
        if info is None or not info.isreg() or info.size > MANIFEST_MAX_BYTES:
            raise RestoreRefused(f"{not_ours} (it has no manifest).")
        try:
            manifest = json.loads(tar.extractfile(info).read())
        except (ValueError, tarfile.TarError, OSError):
            raise RestoreRefused(f"{not_ours} or it is damaged (the manifest cannot be read).") from None
        _check_manifest(manifest, not_ours)
        payload = members.get(manifest["payload"]["name"])
        if payload is None or not payload.isreg() or set(members) != {MANIFEST, payload.name}:
            raise RestoreRefused(f"{not_ours} or it is damaged (its members are not the expected two).")
        if payload.size != manifest["payload"]["size"]:
            raise RestoreRefused(f"The backup {path} is damaged: the database copy has the wrong size.")
        yield manifest, tar, payload


def _check_manifest(manifest: Any, not_ours: str) -> None:
    if not isinstance(manifest, dict) or manifest.get("kind") != BACKUP_KIND:
        raise RestoreRefused(f"{not_ours} (its manifest is not one).")
    if not isinstance(manifest.get("format"), int) or manifest["format"] > BACKUP_FORMAT:
        raise RestoreRefused(
            f"This backup was written by a newer ncs-tracker (backup format {manifest.get('format')}); "
            "upgrade ncs-tracker to restore it."
        )
    try:
        secret = manifest.get("export_secret")
        complete = (
            manifest["backend"] in PAYLOADS
            and manifest["payload"]["name"] == PAYLOADS[manifest["backend"]]
            and isinstance(manifest["payload"]["size"], int)
            and isinstance(manifest["payload"]["sha256"], str)
            and isinstance(manifest["schema_revision"], str)
            and isinstance(manifest["created_at"], str)
            and all(isinstance(k, str) and isinstance(v, int) for k, v in manifest["tables"].items())
            and (secret is None or (isinstance(secret["check"], str) and isinstance(secret["row"], dict)))
            and isinstance(manifest.get("settings") or [], list)
        )
    except (KeyError, TypeError, AttributeError):
        complete = False
    if not complete:
        raise RestoreRefused(f"{not_ours} or it is damaged (its manifest is incomplete).")


def _extract_payload(
    tar: tarfile.TarFile, member: tarfile.TarInfo, manifest: dict[str, Any], out: Path
) -> None:
    """Copy the payload to ``out`` (0600), checking its SHA-256 against the manifest."""
    _new_private_file(out)
    digest = hashlib.sha256()
    source = tar.extractfile(member)
    with out.open("r+b") as stream:
        while chunk := source.read(COPY_CHUNK_BYTES):
            digest.update(chunk)
            stream.write(chunk)
    if digest.hexdigest() != manifest["payload"]["sha256"]:
        raise RestoreRefused(
            "The backup is damaged: the database copy does not match its checksum. "
            "Nothing was changed; use another backup."
        )


def read_secret_file(path: Path) -> str:
    """The export secret (64 hex digits) of a secret file written by :func:`backup`."""
    path = Path(path)
    if not path.is_file():
        raise RestoreRefused(f"There is no secret file at {path}.")
    if path.stat().st_size > SECRET_FILE_MAX_BYTES:
        raise RestoreRefused(f"{path} is not an ncs-tracker secret file (too large).")
    try:
        content = json.loads(path.read_bytes())
    except ValueError:
        content = None
    secret_hex = content.get("secret") if isinstance(content, dict) else None
    if not (
        isinstance(content, dict)
        and content.get("kind") == SECRET_KIND
        and isinstance(secret_hex, str)
        and re.fullmatch(r"[0-9a-f]{64}", secret_hex)
        and content.get("check") == secret_check(secret_hex)
    ):
        raise RestoreRefused(f"{path} is not an ncs-tracker secret file, or it is damaged.")
    return secret_hex


# --- restore --------------------------------------------------------------------------------------------


def restore(
    url: str, path: Path, *, username: str, secret_file: Path | None = None, force: bool = False
) -> RestoreResult:
    """Replace the database at ``url`` by the backup at ``path``; all-or-nothing.

    Refused (:class:`RestoreRefused`, nothing changed) when the archive is not a backup or is damaged, was
    made on the other backend, has a newer schema revision than this ncs-tracker knows, when the secret file
    belongs to another database, or when the target holds rows and ``force`` is false.
    """
    url = normalise_url(url)
    backend = "sqlite" if is_sqlite(url) else "postgresql"
    with _open_archive(path) as (manifest, tar, member):
        if manifest["backend"] != backend:
            held, other = (
                ("an SQLite", "an SQLite database (--db sqlite:///PATH)")
                if manifest["backend"] == "sqlite"
                else ("a PostgreSQL", "a PostgreSQL database (--db postgresql://…)")
            )
            raise RestoreRefused(
                f"This backup holds {held} database; restore it into {other}. Nothing was changed."
            )
        revision = manifest["schema_revision"]
        migrate_to = _migration_target(revision)
        secret_hex = None
        if secret_file is not None:
            secret_hex = read_secret_file(secret_file)
            expected = manifest.get("export_secret")
            if expected is None:
                raise RestoreRefused(
                    f"The secret file {secret_file} does not belong to this backup: the backed-up "
                    "database had no export secret. Restore without --secret."
                )
            if expected["check"] != secret_check(secret_hex):
                raise RestoreRefused(
                    f"The secret file {secret_file} belongs to another database than this "
                    "backup. Nothing was changed."
                )
        plan = _Plan(
            manifest=manifest, secret_hex=secret_hex, migrate_to=migrate_to, username=username, force=force
        )
        if backend == "sqlite":
            replaced = _restore_sqlite(url, tar, member, plan)
        else:
            replaced = _restore_pg(url, tar, member, plan)
    return RestoreResult(
        backend=backend,
        created_at=manifest["created_at"],
        schema_revision=revision,
        migrated_to=migrate_to,
        tables=manifest["tables"],
        secret=plan.secret_state,
        replaced=replaced,
    )


@dataclass
class _Plan:
    manifest: dict[str, Any]
    secret_hex: str | None
    migrate_to: str | None
    username: str
    force: bool

    @property
    def secret_state(self) -> str:
        if self.manifest.get("export_secret") is None:
            return "none"
        return "from_file" if self.secret_hex is not None else "new"


def _migration_target(revision: str) -> str | None:
    """``None`` when ``revision`` is current, the head revision when it is older; refuse a newer one."""
    script = ScriptDirectory.from_config(migrate.alembic_config("sqlite://"))
    head = script.get_current_head()
    if revision == head:
        return None
    if revision not in {rev.revision for rev in script.walk_revisions()}:
        raise RestoreRefused(
            f"This backup was made by a newer ncs-tracker (schema revision {revision}; this "
            f"version knows up to {head}). Upgrade ncs-tracker, then restore. Nothing was changed."
        )
    return head


def describe_rows(counts: dict[str, int]) -> str:
    """``patients 6, visits 29, app settings 1``: the tables holding rows, in words, in the schema's order."""
    order = {table.name: number for number, table in enumerate(Base.metadata.sorted_tables)}
    names = sorted(
        (name for name, n in counts.items() if n and name != "alembic_version"),
        key=lambda name: (order.get(name, len(order)), name),
    )
    return ", ".join(f"{words(name)} {counts[name]:,}" for name in names) if names else "no rows"


def _refuse_if_not_empty(counts: dict[str, int], has_secret: bool, force: bool) -> dict[str, int]:
    held = {name: n for name, n in counts.items() if n and name != "alembic_version"}
    if held and not force:
        lost = describe_rows(held)
        if has_secret:
            lost += (
                ", and its export secret (export ids of its earlier exports could no longer be reproduced)"
            )
        raise RestoreRefused(
            f"Restore refused: the target database is not empty. Restoring would replace {lost}. "
            "Back it up first (ncs-tracker backup FILE), then give --force to replace it. "
            "Nothing was changed."
        )
    return held


def _restore_sqlite(url: str, tar: tarfile.TarFile, member: tarfile.TarInfo, plan: _Plan) -> dict[str, int]:
    target = _sqlite_path(url)
    if not target.parent.is_dir():
        raise RestoreRefused(f"The folder {target.parent} does not exist. Nothing was changed.")
    _check_sqlite_target(target, plan.force)  # early: refuse before the work below
    with tempfile.TemporaryDirectory(dir=target.parent, prefix=".ncs-restore-") as folder:  # mode 0700
        staging = Path(folder) / "staging.sqlite3"
        _extract_payload(tar, member, plan.manifest, staging)
        connection = sqlite3.connect(staging, isolation_level=None)
        try:
            _sqlite_integrity(connection, "the backup's database copy")
            _verify_loaded(
                plan.manifest,
                connection.execute("SELECT version_num FROM alembic_version").fetchone()[0],
                _sqlite_counts(connection),
            )
            secret = plan.manifest.get("export_secret")
            if plan.secret_hex is not None:
                row = dict(secret["row"], value=plan.secret_hex)
                columns = ", ".join(f'"{name}"' for name in row)
                connection.execute(
                    f"INSERT INTO app_settings ({columns}) VALUES ({', '.join('?' * len(row))})",
                    tuple(row.values()),
                )
        finally:
            connection.close()
        if plan.migrate_to is not None:
            migrate.upgrade(sqlite_url(staging))
        engine = make_engine(sqlite_url(staging))
        try:
            with make_session_factory(engine).begin() as session:
                _finish(session, plan)
        finally:
            engine.dispose()
        staged = sqlite3.connect(staging, isolation_level=None)
        try:
            staged.execute("PRAGMA journal_mode=DELETE")  # fold the staging WAL in before copying
            if staged.execute("PRAGMA foreign_key_check").fetchall():
                raise RestoreRefused(
                    "The backup's data break foreign keys; nothing was changed. Use another backup."
                )
            final_counts = _sqlite_counts(staged)
            created = create_private_file(target)  # a new database file starts owner-only
            destination = sqlite3.connect(target, isolation_level=None, timeout=30)
            copied = False
            try:
                replaced = _check_sqlite_connection(destination, plan.force)  # again, just before writing
                # One step: the whole copy is one write transaction on the target (all or nothing).
                staged.backup(destination)
                copied = True
                if _sqlite_counts(destination) != final_counts:
                    raise TrackerError(
                        "The restored database does not hold the rows of the backup; check it "
                        "with 'ncs-tracker db status' and restore again."
                    )
            finally:
                destination.close()
                if created and not copied:
                    target.unlink(missing_ok=True)
        finally:
            staged.close()
    return replaced


def _check_sqlite_target(target: Path, force: bool) -> dict[str, int]:
    if not target.exists() or target.stat().st_size == 0:
        return {}
    connection = sqlite3.connect(
        f"{target.resolve().as_uri()}?mode=rw", uri=True, isolation_level=None, timeout=30
    )
    try:
        return _check_sqlite_connection(connection, force)
    finally:
        connection.close()


def _check_sqlite_connection(connection: sqlite3.Connection, force: bool) -> dict[str, int]:
    try:
        counts = _sqlite_counts(connection)
        has_secret = (
            "app_settings" in counts
            and connection.execute(
                "SELECT 1 FROM app_settings WHERE key = ?", (preferences.EXPORT_SECRET_KEY,)
            ).fetchone()
            is not None
        )
    except sqlite3.DatabaseError:
        raise RestoreRefused(
            "The target file is not an SQLite database; choose another --db. Nothing was changed."
        ) from None
    return _refuse_if_not_empty(counts, has_secret, force)


def _restore_pg(url: str, tar: tarfile.TarFile, member: tarfile.TarInfo, plan: _Plan) -> dict[str, int]:
    pg_restore = _tool("pg_restore")
    engine = make_engine(url)
    try:
        with tempfile.TemporaryDirectory(prefix="ncs-restore-") as folder:  # mode 0700
            work = Path(folder)
            payload = work / member.name
            _extract_payload(tar, member, plan.manifest, payload)
            with engine.connect() as connection, connection.begin():
                connection.execute(text(f"SET LOCAL lock_timeout = '{PG_LOCK_TIMEOUT}'"))
                replaced = _pg_lock_and_check(connection, plan.force)
                _pg_clear_schema(connection)
                search_path = connection.execute(text("SELECT current_setting('search_path')")).scalar_one()
                _replay_dump(connection, [pg_restore, "--no-owner", "--file=-", str(payload)], url, work)
                # The dump's script empties search_path for the session; put it back for what follows.
                connection.execute(
                    text("SELECT pg_catalog.set_config('search_path', :path, false)"), {"path": search_path}
                )
                settings = plan.manifest.get("settings") or []
                if settings:
                    connection.execute(
                        text(
                            "INSERT INTO app_settings SELECT * FROM "
                            "json_populate_recordset(NULL::app_settings, CAST(:rows AS json))"
                        ),
                        {"rows": json.dumps(settings)},
                    )
                tables = _pg_tables(connection)
                revision = connection.execute(text("SELECT version_num FROM alembic_version")).scalar_one()
                _verify_loaded(
                    plan.manifest, revision, {name: _pg_count(connection, name) for name in tables}
                )
                if plan.secret_hex is not None:
                    row = dict(plan.manifest["export_secret"]["row"], value=plan.secret_hex)
                    connection.execute(
                        text(
                            "INSERT INTO app_settings SELECT * FROM "
                            "json_populate_record(NULL::app_settings, CAST(:row AS json))"
                        ),
                        {"row": json.dumps(row)},
                    )
                if plan.migrate_to is not None:
                    config = migrate.alembic_config(url)
                    config.attributes["connection"] = connection  # migrations join this transaction
                    command.upgrade(config, plan.migrate_to)
                with Session(bind=connection, join_transaction_mode="create_savepoint") as session:
                    _finish(session, plan)
                    session.commit()  # releases the savepoint; the outer transaction commits below
    except TrackerError:
        raise
    except Exception as error:
        raise RestoreRefused(
            f"The restore failed ({_describe(error)}); the transaction was rolled back and "
            "nothing was changed."
        ) from None
    finally:
        engine.dispose()
    return replaced


def _pg_lock_and_check(connection: Connection, force: bool) -> dict[str, int]:
    """Lock every table of the schema (nobody writes while the restore runs) and count its rows."""
    tables = _pg_tables(connection)
    if tables:
        names = ", ".join(_pg_name(name) for name in tables)
        try:
            connection.execute(text(f"LOCK TABLE {names} IN ACCESS EXCLUSIVE MODE"))
        except Exception as error:
            if getattr(getattr(error, "orig", None), "sqlstate", None) == "55P03":  # lock_not_available
                raise RestoreRefused(
                    f"Another process kept the database busy for {PG_LOCK_TIMEOUT}; stop it "
                    "(serve, import, evaluate) and try again. Nothing was changed."
                ) from None
            raise
    counts = {name: _pg_count(connection, name) for name in tables}
    has_secret = (
        "app_settings" in counts
        and connection.execute(
            text("SELECT 1 FROM app_settings WHERE key = :k"), {"k": preferences.EXPORT_SECRET_KEY}
        ).first()
        is not None
    )
    return _refuse_if_not_empty(counts, has_secret, force)


def _pg_clear_schema(connection: Connection) -> None:
    """Drop the tables, views, sequences, functions and types of the current schema (not those of extensions),
    so that the dump recreates the schema exactly as it was; inside the restore's transaction."""
    not_extension = "NOT EXISTS (SELECT 1 FROM pg_depend d WHERE d.objid = {oid} AND d.deptype = 'e')"
    relations = connection.execute(
        text(
            "SELECT c.relname, c.relkind FROM pg_class c JOIN pg_namespace n ON n.oid = c.relnamespace "
            "WHERE n.nspname = current_schema() AND c.relkind IN ('v', 'm', 'r', 'p', 'f', 'S') AND "
            + not_extension.format(oid="c.oid")
            + " ORDER BY c.relkind DESC"
        )
    ).all()
    kinds = {
        "v": "VIEW",
        "m": "MATERIALIZED VIEW",
        "r": "TABLE",
        "p": "TABLE",
        "f": "FOREIGN TABLE",
        "S": "SEQUENCE",
    }
    for name, kind in relations:
        connection.execute(text(f"DROP {kinds[kind]} IF EXISTS {_pg_name(name)} CASCADE"))
    routines = connection.execute(
        text(
            "SELECT p.oid::regprocedure::text, p.prokind FROM pg_proc p "
            "WHERE p.pronamespace = current_schema()::regnamespace AND p.prokind IN ('f', 'p', 'a') AND "
            + not_extension.format(oid="p.oid")
        )
    ).all()
    for signature, kind in routines:
        word = {"f": "FUNCTION", "p": "PROCEDURE", "a": "AGGREGATE"}[kind]
        connection.execute(text(f"DROP {word} IF EXISTS {signature} CASCADE"))
    types = connection.execute(
        text(
            "SELECT t.oid::regtype::text, t.typtype FROM pg_type t "
            "LEFT JOIN pg_class c ON c.oid = t.typrelid "
            "WHERE t.typnamespace = current_schema()::regnamespace AND (t.typtype IN ('e', 'd', 'r') "
            "OR (t.typtype = 'c' AND c.relkind = 'c')) AND " + not_extension.format(oid="t.oid")
        )
    ).all()
    for name, kind in types:
        connection.execute(text(f"DROP {'DOMAIN' if kind == 'd' else 'TYPE'} IF EXISTS {name} CASCADE"))


def _replay_dump(connection: Connection, args: list[str], url: str, work: Path) -> None:
    """Run ``pg_restore`` to a script and execute it in the caller's transaction (its ``COPY`` blocks through
    psycopg's copy support): the dump's schema and data become part of one all-or-nothing restore."""
    errors = work / "pg_restore.err"
    with errors.open("wb") as err:
        process = subprocess.Popen(
            args, stdout=subprocess.PIPE, stderr=err, stdin=subprocess.DEVNULL, env=_libpq_env(url)
        )
        try:
            cursor = connection.connection.dbapi_connection.cursor()
            try:
                _apply_script(cursor, process.stdout)
            finally:
                cursor.close()
        finally:
            process.stdout.close()
            code = process.wait()
    if code != 0:
        raise RestoreRefused(f"pg_restore could not read the backup: {_tail(errors)}. Nothing was changed.")


def _apply_script(cursor: Any, lines: Iterable[bytes]) -> None:
    """Execute a ``pg_restore`` script: SQL between ``COPY … FROM stdin;`` blocks in one round trip each (no
    parameters, so several statements per call), each block's rows through ``cursor.copy``."""
    pending: list[bytes] = []

    def flush() -> None:
        sql = b"".join(pending)
        pending.clear()
        if any(line.strip() and not line.lstrip().startswith(b"--") for line in sql.splitlines()):
            cursor.execute(sql)

    stream = iter(lines)
    for line in stream:
        if line.startswith(b"\\"):
            if line.startswith(_PSQL_GUARDS):
                continue
            raise RestoreRefused(
                "The backup's dump holds a client command this restore does not run; nothing was changed."
            )
        if _COPY_START.match(line):
            flush()
            with cursor.copy(line.rstrip(b"\r\n").rstrip(b";")) as copy:
                buffer: list[bytes] = []
                size = 0
                for data in stream:
                    if data.rstrip(b"\r\n") == b"\\.":
                        break
                    buffer.append(data)
                    size += len(data)
                    if size >= COPY_CHUNK_BYTES:
                        copy.write(b"".join(buffer))
                        buffer.clear()
                        size = 0
                else:
                    raise RestoreRefused(
                        "The backup's dump ends inside a table's data; it is damaged. Nothing was changed."
                    )
                if buffer:
                    copy.write(b"".join(buffer))
            continue
        pending.append(line)
    flush()


def _verify_loaded(manifest: dict[str, Any], revision: str, counts: dict[str, int]) -> None:
    """The loaded data are what the manifest says: same schema revision, same tables, same rows per table."""
    if revision != manifest["schema_revision"]:
        raise RestoreRefused(
            "The backup is damaged: its database copy and its manifest name different schema "
            "revisions. Nothing was changed."
        )
    if counts != manifest["tables"]:
        differ = sorted(
            set(counts) ^ set(manifest["tables"])
            | {name for name in counts if counts[name] != manifest["tables"].get(name)}
        )
        raise RestoreRefused(
            f"The backup is damaged: the rows of {', '.join(words(n) for n in differ)} differ "
            "from its manifest. Nothing was changed."
        )


def _finish(session: Session, plan: _Plan) -> None:
    """After the data and the migrations: a new export secret when none was given, and the audit event."""
    if plan.secret_state == "new":
        preferences.put(
            session, preferences.EXPORT_SECRET_KEY, secrets.token_hex(32), username=plan.username, secret=True
        )
    record(
        session,
        username=plan.username,
        action="restore",
        entity="database",
        after={
            "backup_created_at": plan.manifest["created_at"],
            "schema_revision": plan.manifest["schema_revision"],
            "migrated_to": plan.migrate_to,
            "rows": sum(plan.manifest["tables"].values()),
            "export_secret": _SECRET_WORDS[plan.secret_state],
        },
    )
    session.flush()


# --- helpers --------------------------------------------------------------------------------------------


def _new_private_file(path: Path) -> None:
    """Create ``path`` empty, mode 0600, exclusively (a working file of this module: it must be new)."""
    if not create_private_file(path):
        raise TrackerError(f"Cannot create the working file {path}; nothing was changed.")


def _sqlite_path(url: str) -> Path:
    parsed = make_url(url)
    if parsed.database in (None, "", ":memory:"):
        raise TrackerError(
            "An in-memory SQLite database cannot be backed up or restored; give a file (--db)."
        )
    return Path(parsed.database)


def _sqlite_tables(connection: sqlite3.Connection) -> list[str]:
    rows = connection.execute(
        "SELECT name FROM sqlite_master WHERE type = 'table' AND name NOT LIKE 'sqlite_%' ORDER BY name"
    )
    return [name for (name,) in rows]


def _sqlite_counts(connection: sqlite3.Connection) -> dict[str, int]:
    return {
        name: connection.execute(f'SELECT count(*) FROM "{name}"').fetchone()[0]
        for name in _sqlite_tables(connection)
    }


def _sqlite_integrity(connection: sqlite3.Connection, what: str) -> None:
    result = connection.execute("PRAGMA integrity_check").fetchall()
    if result != [("ok",)]:
        raise TrackerError(f"SQLite's integrity check failed on {what}; nothing was changed.")


def _pg_tables(connection: Connection) -> list[str]:
    rows = connection.execute(
        text("SELECT tablename FROM pg_tables WHERE schemaname = current_schema() ORDER BY tablename")
    )
    return [name for (name,) in rows]


def _pg_name(name: str) -> str:
    return '"' + name.replace('"', '""') + '"'


def _pg_count(connection: Connection, name: str) -> int:
    return connection.execute(text(f"SELECT count(*) FROM {_pg_name(name)}")).scalar_one()


def _tool(name: str) -> str:
    found = shutil.which(name)
    if found is None:
        raise TrackerError(
            f"A PostgreSQL backup or restore needs {name} (the PostgreSQL client tools), "
            "which is not on PATH. "
            "Install them (Debian and Ubuntu: apt-get install postgresql-client; the version must be the "
            "server's or newer) and try again. Nothing was written."
        )
    return found


def _libpq_conninfo(url: str) -> str:
    """The connection details of an SQLAlchemy URL as a libpq connection string, without the password (which
    goes through the environment: a command line is visible to every user of the machine)."""
    parsed = make_url(url)
    params: dict[str, str] = {}
    for key, value in parsed.query.items():
        params[key] = value if isinstance(value, str) else value[-1]
    for key, value in (
        ("host", parsed.host),
        ("port", parsed.port),
        ("user", parsed.username),
        ("dbname", parsed.database),
    ):
        if value not in (None, ""):
            params[key] = str(value)
    params.pop("password", None)

    def quoted(value: str) -> str:
        return "'" + value.replace("\\", "\\\\").replace("'", "\\'") + "'"

    return " ".join(f"{key}={quoted(value)}" for key, value in params.items())


def _libpq_env(url: str) -> dict[str, str]:
    env = dict(os.environ)
    password = make_url(url).password
    if password:
        env["PGPASSWORD"] = str(password)
    return env


def _run_pg_tool(args: list[str], url: str, work: Path, name: str) -> None:
    errors = work / f"{name}.err"
    with errors.open("wb") as err:
        code = subprocess.run(
            [*args, f"--dbname={_libpq_conninfo(url)}"],
            stdin=subprocess.DEVNULL,
            stdout=subprocess.DEVNULL,
            stderr=err,
            env=_libpq_env(url),
        ).returncode
    if code != 0:
        raise BackupRefused(f"{name} failed: {_tail(errors)}. Nothing was written.")


def _tail(path: Path) -> str:
    lines = [
        line.strip()
        for line in path.read_text(encoding="utf-8", errors="replace").splitlines()
        if line.strip()
    ]
    return " / ".join(lines[-3:]) if lines else "no message"


def _describe(error: Exception) -> str:
    """The kind of a database error and its SQLSTATE code, never its text (which may quote a row's values)."""
    original = getattr(error, "orig", None) or error
    code = getattr(original, "sqlstate", None)
    return f"{type(original).__name__}" + (f", SQLSTATE {code}" if code else "")


def _file_digest(path: Path) -> tuple[int, str]:
    digest = hashlib.sha256()
    size = 0
    with path.open("rb") as stream:
        while chunk := stream.read(COPY_CHUNK_BYTES):
            digest.update(chunk)
            size += len(chunk)
    return size, digest.hexdigest()


def _sync_folder(folder: Path) -> None:
    """Make the new names durable (a crash right after the backup keeps both files)."""
    try:
        descriptor = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(descriptor)
    except OSError:
        pass
    finally:
        os.close(descriptor)
