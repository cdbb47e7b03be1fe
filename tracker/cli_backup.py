"""``ncs-tracker backup FILE`` and ``ncs-tracker restore FILE`` (DESIGN.md §5); thin: the work is in
:mod:`tracker.services.access.backup`.

Both act as the login (the operating-system account on SQLite, the database login on PostgreSQL); a
``--user`` naming someone else is refused, as for every privileged action.
"""

from __future__ import annotations

import os
from pathlib import Path

import click
from sqlalchemy.engine import make_url

from tracker.cli_context import Context, pass_context
from tracker.config import ENV_USER
from tracker.errors import SchemaNotReady, TrackerError


@click.command("backup")
@click.argument("file", type=click.Path(path_type=Path, dir_okay=False))
@click.option(
    "--secret-out",
    "secret_out",
    type=click.Path(path_type=Path, dir_okay=False),
    metavar="PATH",
    help="Where to write the export secret (default: FILE.secret). Keep it apart from the backups.",
)
@click.option(
    "--no-secret",
    is_flag=True,
    help="Write no secret file: it was kept from an earlier backup (the secret does not change).",
)
@pass_context
def backup_command(context: Context, file: Path, secret_out: Path | None, no_secret: bool) -> None:
    """Back up the whole database to FILE (readable by you only), with the export secret in a separate file.

    SQLite is copied with its online backup API (safe while the database is in use); PostgreSQL through
    pg_dump, which must be on PATH. FILE must not exist yet.
    """
    from tracker.services.access import backup as service

    if no_secret and secret_out is not None:
        raise click.UsageError("--no-secret and --secret-out exclude each other.")
    url = context.url
    result = service.backup(
        url,
        file,
        username=_authorised(context, url, "backup"),
        secret_path=secret_out,
        write_secret=not no_secret,
    )
    click.echo(
        f"Backup written: {result.path} ({result.size:,} bytes, sha256 {result.sha256[:16]}…), "
        "readable by you only."
    )
    click.echo(f"  Schema revision {result.schema_revision}; {service.describe_rows(result.tables)}.")
    if result.secret == "apart":
        click.echo(
            f"Export secret written apart: {result.secret_path} (readable by you only). Move it to a "
            "place other than the backups: with an export it links export ids to patient codes. "
            "Restore needs it to keep the export ids."
        )
    elif result.secret == "not_written":
        click.echo(
            "Export secret not written (--no-secret): restore with the secret file kept from an earlier "
            "backup of this database, or exports made after the restore get new export ids."
        )
    else:
        click.echo(
            "This database has no export secret yet (no export was made): there is nothing to keep apart."
        )
    if not result.audited:
        click.echo(
            "Note: not recorded in the audit trail, because the schema is outdated; run "
            "'ncs-tracker db upgrade' after this backup.",
            err=True,
        )
    click.echo("The backup holds identified patient data: keep it as carefully as the database itself.")


@click.command("restore")
@click.argument("file", type=click.Path(path_type=Path, dir_okay=False))
@click.option(
    "--secret",
    "secret_file",
    type=click.Path(path_type=Path, dir_okay=False),
    metavar="PATH",
    help="The secret file written with the backup (FILE.secret), so that exports keep their ids.",
)
@click.option(
    "--force",
    is_flag=True,
    help="Replace a database that holds rows (without it, restore refuses and says what would be lost).",
)
@pass_context
def restore_command(context: Context, file: Path, secret_file: Path | None, force: bool) -> None:
    """Replace the database by the backup in FILE: all or nothing.

    An older schema is migrated after the restore; a backup from a newer ncs-tracker is refused. Without
    --secret the restored database gets a new export secret, so export ids differ from earlier exports.
    """
    from tracker.services.access import backup as service

    url = context.url
    result = service.restore(
        url, file, username=_authorised(context, url, "restore"), secret_file=secret_file, force=force
    )
    click.echo(
        f"Restored {file} (made {result.created_at}) into {_shown(url)}: "
        f"{service.describe_rows(result.tables)}."
    )
    if result.migrated_to is not None:
        click.echo(f"  Schema migrated from revision {result.schema_revision} to {result.migrated_to}.")
    if result.replaced:
        click.echo(f"  Replaced what the database held before: {service.describe_rows(result.replaced)}.")
    if result.secret == "from_file":
        click.echo(
            f"Export secret taken from {secret_file}: export ids and shifted dates match earlier exports."
        )
    elif result.secret == "new":
        click.echo(
            "Warning: no --secret given, so the restored database has a new export secret: export ids "
            "and shifted dates of exports made from now on differ from earlier exports of the same "
            "patients. To keep them, restore again with --force --secret FILE.secret.",
            err=True,
        )


def _authorised(context: Context, url: str, permission: str) -> str:
    """The acting login, allowed ``permission`` by the target database's accounts (an administrator, with
    the password, once accounts exist). A database without a current schema has no accounts to ask: a new
    or emptied target (restore), or one to be upgraded after its backup; then the login acts as itself."""
    try:
        return context.acting(permission).name
    except SchemaNotReady:
        context.close()
        return _acting_login(url)


def _acting_login(url: str) -> str:
    """The login that acts; a ``--user`` or ``NCS_TRACKER_USER`` naming another person is refused."""
    from tracker.services.access.backup import login_name

    root = click.get_current_context().find_root()
    stated = root.params.get("user") or os.environ.get(ENV_USER)
    name = login_name(url)
    if stated and stated != name:
        raise TrackerError(
            f"--user/{ENV_USER} cannot choose who acts: backup and restore are recorded as the "
            f"login {name!r}. Run the command as that person's own login."
        )
    return name


def _shown(url: str) -> str:
    """The database for people: an SQLite file's path, else the URL without its password."""
    parsed = make_url(url)
    if parsed.get_backend_name() == "sqlite":
        return str(parsed.database)
    return parsed.render_as_string(hide_password=True)
