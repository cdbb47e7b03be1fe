"""The ``ncs-tracker`` command line (DESIGN.md §5). Thin: parse, call a service, print.

Exit codes: 0 success, 1 bad input or a refused action (message on stderr), 2 usage error.
"""

from __future__ import annotations

import datetime as dt
import sys
from pathlib import Path

import click
from sqlalchemy import Engine

from tracker import CAUTION, __version__
from tracker.config import ENV_DB, ENV_USER, acting_user, resolve_database_url, sqlite_url, user_data_dir
from tracker.errors import SchemaNotReady, TrackerError


class Context:
    """What every command needs: the database URL (resolved lazily) and the acting user."""

    def __init__(self, db: str | None, user: str | None, debug: bool):
        self._db = db
        self.user = acting_user(user)
        self.debug = debug
        self._engine: Engine | None = None

    @property
    def url(self) -> str:
        url, is_default = resolve_database_url(self._db)
        if is_default:
            click.echo(f"Database: {url.removeprefix('sqlite:///')} (default; choose another with --db or {ENV_DB})", err=True)
        return url

    def engine(self, *, require_schema: bool = True) -> Engine:
        from tracker.db.migrate import require_current_schema
        from tracker.db.session import make_engine

        if self._engine is None:
            url = self.url
            missing_file = _missing_sqlite_file(url)
            if require_schema and missing_file:
                raise SchemaNotReady(f"There is no database file at {missing_file}; run: ncs-tracker db upgrade")
            self._engine = make_engine(url)
        if require_schema:
            require_current_schema(self._engine)
        return self._engine

    def close(self) -> None:
        if self._engine is not None:
            self._engine.dispose()
            self._engine = None

    def session_factory(self):
        from tracker.db.session import make_session_factory

        return make_session_factory(self.engine())


pass_context = click.make_pass_decorator(Context)


def _missing_sqlite_file(url: str) -> str | None:
    """The path of an SQLite database file that does not exist yet (connecting would create it empty)."""
    from sqlalchemy.engine import make_url

    parsed = make_url(url)
    if parsed.get_backend_name() != "sqlite" or parsed.database in (None, "", ":memory:"):
        return None
    return None if Path(parsed.database).exists() else parsed.database


@click.group(context_settings={"help_option_names": ["-h", "--help"], "max_content_width": 100})
@click.option("--db", metavar="URL", help=f"SQLAlchemy database URL (also ${ENV_DB}); default: an SQLite file in the user data folder.")
@click.option("--user", metavar="NAME", help=f"Name recorded in the audit trail (also ${ENV_USER}; default: your login).")
@click.option("--debug", is_flag=True, help="Show Python tracebacks (for developers; may show data).")
@click.version_option(__version__, prog_name="ncs-tracker")
@click.pass_context
def cli(ctx: click.Context, db: str | None, user: str | None, debug: bool) -> None:
    """Follow-up database for serial nerve conduction studies in demyelinating neuropathies.

    Decision support only: results must be reviewed by a qualified clinician; local laboratory normal
    values, local rules and licensed practice prevail.
    """
    ctx.obj = Context(db, user, debug)
    ctx.call_on_close(ctx.obj.close)


@cli.group()
def db() -> None:
    """Create, migrate and inspect the database schema."""


@db.command("upgrade")
@pass_context
def db_upgrade(context: Context) -> None:
    """Create the schema, or migrate it to the current version."""
    from tracker.db import migrate

    url = context.url
    migrate.upgrade(url)
    click.echo(f"Schema is at revision {migrate.head_revision()} (current).")


@db.command("status")
@pass_context
def db_status(context: Context) -> None:
    """Say whether the schema is missing, outdated or current."""
    from tracker.db import migrate

    engine = context.engine(require_schema=False)
    current = migrate.current_revision(engine)
    head = migrate.head_revision()
    state = "no schema" if current is None else ("current" if current == head else "outdated")
    click.echo(f"Schema revision: {current or '(none)'}; latest: {head}; state: {state}")


@cli.command("import")
@click.argument("files", nargs=-1, required=True, type=click.Path(path_type=Path, dir_okay=False))
@click.option("--dry-run", is_flag=True, help="Check the files and report what would change; write nothing.")
@click.option("--replace", is_flag=True, help="Replace stored values that the files change (earlier values are kept in history).")
@click.option("--allow-unusual", is_flag=True, help="Accept conduction velocities outside 10–100 m/s (the override is recorded).")
@pass_context
def import_command(context: Context, files: tuple[Path, ...], dry_run: bool, replace: bool, allow_unusual: bool) -> None:
    """Import measurements, treatments or scores (CSV or .xlsx; DESIGN.md §4.1–4.2).

    All files are imported in one transaction: if any file has a problem, nothing is written.
    """
    from tracker.services.importing import import_file

    sessions = context.session_factory()
    with sessions.begin() as session:
        for path in files:
            click.echo(f"Checking {path.name} …", err=True)
            report = import_file(session, path, username=context.user, dry_run=dry_run, replace=replace, allow_unusual=allow_unusual)
            click.echo(report.summary())
            for problem in report.unusual:
                click.echo(f"  accepted: {problem}")


@cli.command("show")
@click.argument("patient")
@click.option("--visit", "visit_date", metavar="YYYY-MM-DD", help="Only this visit.")
@pass_context
def show_command(context: Context, patient: str, visit_date: str | None) -> None:
    """Print a patient's visits with per-nerve values and derived segments."""
    from tracker.services.records import patient_record
    from tracker.text_report import patient_lines

    day = _parse_date(visit_date) if visit_date else None
    with context.session_factory()() as session:
        record = patient_record(session, patient, visit_date=day)
    click.echo("\n".join(patient_lines(record)))


@cli.command("demo")
@click.option("--path", "db_path", type=click.Path(path_type=Path, dir_okay=False), help="Where to build the demo database (default: the user data folder).")
@click.option("--port", type=int, help="Port of the dashboard. The dashboard is not built yet: accepted, and ignored for now.")
@pass_context
def demo_command(context: Context, db_path: Path | None, port: int | None) -> None:
    """Build a fresh demo database from the invented clinic in demo_data/ and print every patient."""
    from tracker.services.demo import build_demo_database
    from tracker.services.records import patient_codes, patient_record
    from tracker.text_report import patient_lines

    if port is not None:
        click.echo("Note: the dashboard is not built yet; --port is ignored and the demo is printed instead.", err=True)
    path = db_path or user_data_dir() / "demo.sqlite3"
    url = sqlite_url(path)
    engine, reports = build_demo_database(path, username=context.user)
    for report in reports:
        click.echo(report.summary(), err=True)
    from tracker.db.session import make_session_factory

    with make_session_factory(engine)() as session:
        for code in patient_codes(session):
            click.echo("\n".join(patient_lines(patient_record(session, code))[:-1]))
            click.echo("=" * 100)
    engine.dispose()
    click.echo(CAUTION)
    click.echo(f"Demo database (invented patients): {path}\nExplore it with: ncs-tracker --db {url} show DEMO-01")


def _parse_date(text: str) -> dt.date:
    try:
        return dt.date.fromisoformat(text)
    except ValueError:
        raise click.BadParameter(f"expected a date as YYYY-MM-DD, got {text!r}") from None


def main(argv: list[str] | None = None) -> None:
    """Console entry point: domain errors become one clean message and exit code 1, never a traceback."""
    debug = "--debug" in (argv if argv is not None else sys.argv[1:])
    try:
        cli.main(args=argv, prog_name="ncs-tracker", standalone_mode=False)
    except click.exceptions.Abort:
        click.echo("Aborted.", err=True)
        sys.exit(1)
    except click.ClickException as error:
        error.show()
        sys.exit(error.exit_code)
    except TrackerError as error:
        if debug:
            raise
        click.echo(f"Error: {error}", err=True)
        sys.exit(error.exit_code)
    except Exception as error:  # a bug, or an environment problem: no traceback (it may hold patient data)
        if debug:
            raise
        click.echo(
            f"Error: an unexpected {type(error).__name__} stopped the command; nothing further was written. "
            "Run again with --debug to see the details.",
            err=True,
        )
        sys.exit(1)
    sys.exit(0)
