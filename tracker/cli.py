"""The ``ncs-tracker`` command line (DESIGN.md §5). Thin: parse, call a service, print.

Exit codes: 0 success, 1 bad input or a refused action (message on stderr), 2 usage error.
"""

from __future__ import annotations

import datetime as dt
import sys
from pathlib import Path

import click

from tracker import CAUTION, __version__
from tracker.cli_context import Context, pass_context
from tracker.config import ENV_DB, ENV_USER, sqlite_url, user_data_dir
from tracker.domain.vocabulary import DIAGNOSES, PHENOTYPES, USER_ROLES
from tracker.errors import TrackerError
from tracker.services.access.permissions import NotPermitted


@click.group(context_settings={"help_option_names": ["-h", "--help"], "max_content_width": 100})
@click.option(
    "--db",
    metavar="URL",
    help=f"SQLAlchemy database URL (also ${ENV_DB}); default: an SQLite file in the user data folder.",
)
@click.option(
    "--user",
    metavar="NAME",
    help=f"Your login, to make sure of it (also ${ENV_USER}); a different name is refused: commands act as "
    "the operating-system account (SQLite) or the database login (PostgreSQL).",
)
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
@click.option(
    "--replace",
    is_flag=True,
    help="Replace stored values that the files change (earlier values are kept in history).",
)
@click.option(
    "--force",
    is_flag=True,
    help="With --replace: replace a visit even when it changed after the file's visit_version (or "
    "while this import ran); recorded in the audit trail.",
)
@click.option(
    "--allow-unusual",
    is_flag=True,
    help="Accept conduction velocities outside 10–100 m/s (the override is recorded).",
)
@pass_context
def import_command(
    context: Context, files: tuple[Path, ...], dry_run: bool, replace: bool, force: bool, allow_unusual: bool
) -> None:
    """Import measurements, treatments, scores or patients (UTF-8 CSV, or the first sheet of an .xlsx).

    The kind of file is recognised from its header: a 'nerve' column for measurements, 'therapy' for
    treatments, 'scale' for scores. The columns and the accepted nerve and site names are listed in the
    README ("File formats"); demo_data/ holds a complete example of each kind.

    All files are imported in one transaction: if any file has a problem, every problem is listed (row as a
    spreadsheet shows it, column, what was expected), nothing is written and the exit code is 1. Warnings
    (a visit of a single nerve, a visit date that may have day and month swapped) are printed and the import
    goes ahead.

    A replaced visit must still be the version the file was made from (its optional visit_version column,
    else the version this import read first); otherwise it is refused, naming the visit, unless --force.
    """
    from tracker.services.importing import import_file

    if force and not replace:
        raise click.UsageError("--force only applies with --replace.")
    username = context.acting("read" if dry_run else "write_clinical").name
    sessions = context.session_factory()
    with sessions.begin() as session:
        for path in files:
            click.echo(f"Checking {path.name} …", err=True)
            report = import_file(
                session,
                path,
                username=username,
                dry_run=dry_run,
                replace=replace,
                force=force,
                allow_unusual=allow_unusual,
            )
            click.echo(report.summary())
            for problem in report.unusual:
                click.echo(f"  accepted: {problem}")
            for warning in report.warnings:
                click.echo(f"  warning: {warning}", err=True)


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


@cli.command("check")
@click.argument("patient")
@click.option("--visit", "visit_date", metavar="YYYY-MM-DD", help="The visit to check (default: the latest).")
@click.option(
    "--criteria",
    "criteria",
    metavar="ID",
    multiple=True,
    help=(
        "Criteria set id (repeatable), or 'all' for every set side by side. Default: by the visit's "
        "diagnosis."
    ),
)
@click.option(
    "--limits", "limits_name", metavar="NAME", help="Normal-limit set (default: the one marked default)."
)
@click.option("--format", "output", type=click.Choice(["text", "json"]), default="text", show_default=True)
@click.option(
    "--cold-limbs",
    type=click.Choice(["warn", "exclude"]),
    help="Limbs colder than the guideline minimum: keep the values and warn, or exclude the nerve "
    "(default: the database's setting, else warn).",
)
@click.option(
    "--sides-separate/--sides-together",
    default=True,
    show_default=True,
    help="Whether left and right of one nerve count as two nerves.",
)
@click.option(
    "--cv-segments",
    type=click.Choice(["standard", "all_outside_entrapment"]),
    default="standard",
    show_default=True,
    help="Segments used for conduction velocity.",
)
@click.option(
    "--aan-wrist-exclusion/--no-aan-wrist-exclusion",
    default=None,
    help="AAN 1991: a wrist-entrapment mark removes the median distal latency from item 3 (a project "
    "rule). Default: the database's setting, off unless changed on the Settings page — the "
    "publication's reading, which has no such exclusion.",
)
@click.option("--detail", is_flag=True, help="Text: add the per-item trace of every nerve to the summary.")
@pass_context
def check_command(
    context: Context,
    patient: str,
    visit_date: str | None,
    criteria: tuple[str, ...],
    limits_name: str | None,
    output: str,
    cold_limbs: str | None,
    sides_separate: bool,
    cv_segments: str,
    aan_wrist_exclusion: bool | None,
    detail: bool,
) -> None:
    """Check a visit against published electrodiagnostic criteria, nerve by nerve.

    Text: a summary per criteria set (outcome in words, deciding findings, warnings, closest miss, changes
    since the previous visit) within 120 columns; --detail adds the per-item trace. JSON: the full trace.
    """
    import json

    from tracker.check_report import json_payload, text
    from tracker.criteria import engine
    from tracker.services import preferences
    from tracker.services.evaluation import check_visit

    chosen = engine.available() if "all" in criteria else list(criteria) or None
    day = _parse_date(visit_date) if visit_date else None
    username = context.user  # the evaluations are saved and audited under the acting login
    with context.session_factory().begin() as session:
        # Unless asked otherwise, the clinic's settings (dashboard → Settings) apply here too.
        stored_default = preferences.default_criteria(session) if chosen is None else None
        if stored_default:
            chosen = [stored_default]
        # The stored criteria switches too; an option given here takes precedence.
        settings = preferences.criteria_settings(
            session,
            cold_limbs=cold_limbs,
            sides_are_separate_nerves=sides_separate,
            cv_segments=cv_segments,
            aan_wrist_exclusion=aan_wrist_exclusion,
        )
        result = check_visit(
            session,
            patient,
            visit_date=day,
            criteria=chosen,
            limits_name=limits_name,
            settings=settings,
            username=username,
        )
    if output == "json":
        click.echo(json.dumps(json_payload(result, settings=settings), indent=2, ensure_ascii=False))
    else:
        click.echo(text(result, detail=detail, settings=settings))


@cli.command("response")
@click.argument("patient")
@click.option(
    "--visit",
    "visit_date",
    metavar="YYYY-MM-DD",
    help="Judge as on this visit (default: the latest visit or score).",
)
@click.option(
    "--rules",
    "rules_id",
    metavar="ID",
    help="Response rule set (default: trial-aincat; 'ncs-tracker response --list-rules').",
)
@click.option(
    "--rules-file",
    "rules_files",
    multiple=True,
    type=click.Path(path_type=Path, dir_okay=False, exists=True),
    help="A clinic's own rule sets (CSV, columns as tracker/reference/response_rules.csv); repeatable.",
)
@click.option(
    "--reproducibility",
    "reproducibility_file",
    type=click.Path(path_type=Path, dir_okay=False, exists=True),
    help="A laboratory's own between-session variability (CSV, as tracker/reference/reproducibility.csv).",
)
@click.option(
    "--window",
    type=click.Choice(["regimen", "all"]),
    default="regimen",
    show_default=True,
    help="Trend window: the current regimen, or all follow-up.",
)
@click.option("--all-changes", is_flag=True, help="List every change, not only those beyond their threshold.")
@click.option("--list-rules", is_flag=True, help="List the rule sets and exit.")
@click.option("--format", "output", type=click.Choice(["text", "json"]), default="text", show_default=True)
@pass_context
def response_command(
    context: Context,
    patient: str,
    visit_date: str | None,
    rules_id: str | None,
    rules_files: tuple[Path, ...],
    reproducibility_file: Path | None,
    window: str,
    all_changes: bool,
    list_rules: bool,
    output: str,
) -> None:
    """Is the patient better, stable or worse on each treatment regimen — and why
    (changes against published thresholds)."""
    import json

    from tracker.response.rules import rule_sets

    if list_rules:
        for rule_set in rule_sets(rules_files).values():
            click.echo(f"{rule_set.id} (version {rule_set.version}, {rule_set.origin}): {rule_set.title}")
        return
    from tracker.response_report import text
    from tracker.services.response import patient_response, response_json, save_assessments

    day = _parse_date(visit_date) if visit_date else None
    with context.session_factory().begin() as session:
        result = patient_response(
            session,
            patient,
            visit_date=day,
            rules_id=rules_id,
            rules_files=rules_files,
            reproducibility_file=reproducibility_file,
            window=window,
        )
        # What was shown is kept (rule set, version, visits compared, evidence), as check keeps evaluations.
        save_assessments(session, result, username=context.user)
    if output == "json":
        click.echo(json.dumps(response_json(result), indent=2, ensure_ascii=False))
    else:
        click.echo(text(result, all_changes=all_changes))


@cli.command("report")
@click.argument("patient")
@click.option(
    "--visit", "visit_date", metavar="YYYY-MM-DD", help="The visit to report (default: the latest)."
)
@click.option(
    "--out",
    "out",
    required=True,
    type=click.Path(path_type=Path, dir_okay=False),
    metavar="FILE.pdf|FILE.html",
    help="Where to write the report; the extension chooses PDF or a self-contained HTML page.",
)
@click.option(
    "--criteria",
    "criteria",
    metavar="ID",
    multiple=True,
    help="Criteria set id (repeatable). Default: the clinic's default set, else by the visit's diagnosis.",
)
@click.option(
    "--limits", "limits_name", metavar="NAME", help="Normal-limit set (default: the one marked default)."
)
@click.option("--overwrite", is_flag=True, help="Replace an existing file.")
@pass_context
def report_command(
    context: Context,
    patient: str,
    visit_date: str | None,
    out: Path,
    criteria: tuple[str, ...],
    limits_name: str | None,
    overwrite: bool,
) -> None:
    """Write the printable follow-up report of one visit: criteria outcome,
    treatment response, changes, trend.

    The file holds patient data: it is created readable by you only (mode 0600).
    """
    from tracker import report

    file_format = report.format_of(out)
    report.output.refuse_existing(out, overwrite)
    day = _parse_date(visit_date) if visit_date else None
    username = context.user
    with context.session_factory().begin() as session:
        content = report.build(
            session,
            patient,
            visit_date=day,
            criteria=list(criteria) or None,
            limits_name=limits_name,
            username=username,
        )
    report.write_private(out, report.render(content, file_format), overwrite=overwrite)
    click.echo(
        f"Report of {content.patient}, visit {content.visit_date.isoformat()}: {out} ({file_format.upper()})"
    )
    click.echo(CAUTION)


@cli.command("annotate")
@click.argument("patient")
@click.option("--visit", "visit_date", metavar="YYYY-MM-DD", required=True, help="The visit to annotate.")
@click.option("--phenotype", type=click.Choice(PHENOTYPES), help="CIDP phenotype at this visit.")
@click.option(
    "--wrist-entrapment",
    "wrist",
    multiple=True,
    metavar="SIDE=yes|no",
    help=(
        "Median distal latency explained by neuropathy at the wrist on that side (repeatable), e.g. "
        "right=yes."
    ),
)
@pass_context
def annotate_command(
    context: Context, patient: str, visit_date: str, phenotype: str | None, wrist: tuple[str, ...]
) -> None:
    """Record clinician inputs the criteria need (phenotype, wrist entrapment); earlier values are kept."""
    from tracker.domain.vocabulary import YES_NO
    from tracker.services.visits import set_clinician_inputs

    entrapment = {}
    for item in wrist:
        side, _, answer = item.partition("=")
        if answer.strip().lower() not in YES_NO or side.strip().lower() not in ("left", "right"):
            raise click.BadParameter(
                f"expected SIDE=yes|no such as right=yes, got {item!r}", param_hint="--wrist-entrapment"
            )
        entrapment[side.strip().lower()] = YES_NO[answer.strip().lower()]
    username = context.acting("write_clinical").name
    with context.session_factory().begin() as session:
        changes = set_clinician_inputs(
            session,
            patient,
            _parse_date(visit_date),
            username=username,
            phenotype=phenotype,
            wrist_entrapment=entrapment,
        )
    click.echo("\n".join(changes) if changes else "Nothing changed.")


@cli.command("evaluate")
@click.option(
    "--limits", "limits_name", metavar="NAME", help="Normal-limit set (default: the one marked default)."
)
@click.option(
    "--chunk-visits",
    type=click.IntRange(min=1),
    metavar="N",
    help="Visits evaluated and saved per transaction (default 1000): other writers get the "
    "database between chunks, and an interrupted run keeps the chunks it finished.",
)
@pass_context
def evaluate_command(context: Context, limits_name: str | None, chunk_visits: int | None) -> None:
    """Recompute the saved evaluations of every visit whose data, limits or criteria changed.

    Works through the visits in chunks, each saved in its own transaction; run it again after an
    interruption and it continues (evaluations already current are skipped).
    """
    from tracker.criteria.model import Settings
    from tracker.services import preferences
    from tracker.services.evaluation import CHUNK_VISITS, refresh_evaluations

    username = context.acting("write_clinical").name
    chunk = chunk_visits or CHUNK_VISITS

    def progress(done: int, total: int) -> None:
        if total > chunk:  # a one-chunk run needs no progress line
            click.echo(f"  {done:,} of {total:,} visits evaluated", err=True)

    with context.session_factory()() as session:
        settings = Settings(cold_limbs=preferences.cold_limbs(session))
        counts = refresh_evaluations(
            session,
            limits_name=limits_name,
            settings=settings,
            username=username,
            chunk_visits=chunk,
            commit_chunks=True,
            progress=progress,
        )
    click.echo(
        f"{counts['visits']} visits: {counts['recomputed']} evaluations recomputed, "
        f"{counts['unchanged']} unchanged."
    )
    if counts["changed_meanwhile"]:
        click.echo(
            f"{counts['changed_meanwhile']} visits changed again and again while they were evaluated; "
            "run evaluate again for them.",
            err=True,
        )


@cli.group()
def limits() -> None:
    """Normal-limit sets: list, import a laboratory's own, choose the default."""


@limits.command("list")
@pass_context
def limits_list(context: Context) -> None:
    """List the normal-limit sets."""
    from tracker.services.limit_sets import list_limit_sets

    with context.session_factory().begin() as session:
        sets = list_limit_sets(session)
    for s in sets:
        click.echo(
            f"{'*' if s.is_default else ' '} {s.name} v{s.version}: {s.rows} rows — {s.description or ''}"
        )
    click.echo("(* = used when --limits is not given)")


@limits.command("import")
@click.argument("file", type=click.Path(path_type=Path, dir_okay=False))
@click.option("--name", required=True, help="Name of the set; an existing name gets a new version.")
@click.option("--description", help="What these limits are (population, technique).")
@pass_context
def limits_import(context: Context, file: Path, name: str, description: str | None) -> None:
    """Import a laboratory's normal limits from a UTF-8 CSV file with a header row.

    Columns: nerve, modality, parameter (distal_latency_ms, cv_ms, amplitude, f_latency_ms,
    distal_duration_ms, peak_latency_ms), bound (uln or lln), value; optional age_min, age_max,
    height_min_cm, height_max_cm, sex, source. The README ("Checking a visit against published criteria")
    describes them. Every problem is listed and nothing is written when any row is wrong.
    """
    from tracker.services.limit_sets import import_limit_set

    username = context.acting("limits").name
    with context.session_factory().begin() as session:
        info = import_limit_set(session, file, name=name, username=username, description=description)
    click.echo(f"Imported {info.rows} limits as {info.name} v{info.version}.")


@limits.command("default")
@click.argument("name")
@pass_context
def limits_default(context: Context, name: str) -> None:
    """Use the latest version of NAME when --limits is not given."""
    from tracker.services.limit_sets import set_default

    username = context.acting("limits").name
    with context.session_factory().begin() as session:
        info = set_default(session, name, username=username)
    click.echo(f"Default normal limits: {info.name} v{info.version}.")


@cli.group()
def users() -> None:
    """Accounts and roles (viewer, clinician, coordinator, admin); see the README, "Accounts and sign-in".

    The first administrator is created with 'users init' on an empty users table; afterwards only an
    administrator, with their password, adds accounts or changes roles, and nobody changes their own.
    """


def _new_password(prompt: str) -> str:
    from tracker.cli_prompt import read_password

    return read_password(prompt, confirm=True)


@users.command("init")
@click.argument("username", required=False)
@click.option("--name", "display_name", help="The person's name as shown to colleagues (optional).")
@pass_context
def users_init(context: Context, username: str | None, display_name: str | None) -> None:
    """Create the first administrator (only on an empty users table): your own login, with a password.

    USERNAME defaults to the login that commands on this database act as (the operating-system account
    on SQLite, the database login on PostgreSQL).
    """
    from tracker.services.access import accounts

    with context.session_factory().begin() as session:
        identity, _via = accounts.system_identity(session)
        if accounts.accounts_exist(session):
            raise NotPermitted(
                "The users table is not empty: accounts are added by an administrator "
                "(ncs-tracker users add NAME --role ROLE)."
            )
        password = _new_password(f"New password for {username or identity}")
        user = accounts.init_first_admin(
            session, username or identity, password, identity=identity, display_name=display_name
        )
    click.echo(f"User {user.username}: role admin (first administrator; single-user mode ended).")


@users.command("list")
@pass_context
def users_list(context: Context) -> None:
    """The accounts of this database with their roles (administrators only)."""
    from tracker.services.access.accounts import list_users

    context.acting("manage_users")
    with context.session_factory()() as session:
        rows = list_users(session)
    for u in rows:
        state = "active" if u.active else "inactive"
        password = "password set" if u.has_password else "no password"
        click.echo(f"{u.username:<24} {u.role:<12} {state:<9} {password:<13} {u.display_name or ''}".rstrip())


@users.command("add")
@click.argument("username")
@click.option("--role", required=True, type=click.Choice(USER_ROLES), help="What the user may do.")
@click.option("--name", "display_name", help="The person's name as shown to colleagues (optional).")
@click.option(
    "--no-password",
    is_flag=True,
    help="Create the account without a password (it cannot sign in to the dashboard or take "
    "privileged actions until an administrator sets one with 'users password').",
)
@pass_context
def users_add(
    context: Context, username: str, role: str, display_name: str | None, no_password: bool
) -> None:
    """Add an account, or change another account's role (administrators only; audited)."""
    from tracker.services.access import accounts

    acting = context.acting("manage_users")
    with context.session_factory()() as session:
        exists = any(u.username == username for u in accounts.list_users(session))
    password = None if no_password or exists else _new_password(f"Initial password for {username}")
    with context.session_factory().begin() as session:
        user, outcome = accounts.set_user(
            session, username, role=role, display_name=display_name, acting=acting, password=password
        )
    click.echo(f"User {user.username}: role {user.role} ({outcome}).")


@users.command("password")
@click.argument("username", required=False)
@pass_context
def users_password(context: Context, username: str | None) -> None:
    """Change your own password, or (administrators) set another account's password and lift its lock-out."""
    from tracker.services.access import accounts

    own = context.acting("read").name
    permission = "manage_users" if username and username != own else "change_own_password"
    acting = context.acting(permission)
    password = _new_password(f"New password for {username or own}")
    with context.session_factory().begin() as session:
        accounts.set_password(session, username or own, password, acting=acting)
    click.echo(f"Password of {username or own} changed.")


@users.command("deactivate")
@click.argument("username")
@pass_context
def users_deactivate(context: Context, username: str) -> None:
    """Withdraw an account's rights (administrators only); the name stays in the audit trail."""
    from tracker.services.access.accounts import deactivate_user

    acting = context.acting("manage_users")
    with context.session_factory().begin() as session:
        user = deactivate_user(session, username, acting=acting)
    click.echo(f"User {user.username}: inactive.")


@cli.command("demo")
@click.option(
    "--path",
    "db_path",
    type=click.Path(path_type=Path, dir_okay=False),
    help="Where to build the demo database (default: the user data folder).",
)
@click.option(
    "--port",
    type=int,
    default=8501,
    show_default=True,
    help="Port of the dashboard (the next free one if taken).",
)
@click.option(
    "--host",
    default="127.0.0.1",
    show_default=True,
    help="Address to listen on (only this machine by default).",
)
@click.option(
    "--no-serve",
    is_flag=True,
    help="Build the demo database and print the patients, without starting the dashboard.",
)
@pass_context
def demo_command(context: Context, db_path: Path | None, port: int, host: str, no_serve: bool) -> None:
    """Build a fresh demo database from the invented clinic in demo_data/ and open the dashboard on it."""
    from tracker.db.session import make_session_factory
    from tracker.services.access.accounts import os_login
    from tracker.services.demo import build_demo_database
    from tracker.services.evaluation import refresh_evaluations
    from tracker.services.records import patient_codes, patient_record
    from tracker.text_report import patient_lines

    path = db_path or user_data_dir() / "demo.sqlite3"
    url = sqlite_url(path)
    engine, reports = build_demo_database(path, username=os_login())
    for report in reports:
        click.echo(report.summary(), err=True)
    with make_session_factory(engine).begin() as session:
        counts = refresh_evaluations(session, username=os_login())
    click.echo(f"Evaluated {counts['visits']} visits against every criteria set.", err=True)
    codes: list[str] = []
    if no_serve:
        with make_session_factory(engine)() as session:
            codes = patient_codes(session)
            for code in codes:
                click.echo("\n".join(patient_lines(patient_record(session, code))[:-1]))
                click.echo("=" * 100)
    engine.dispose()
    click.echo(f"Demo database (invented patients): {path}")
    if no_serve:
        import shlex

        click.echo(CAUTION)
        # The demo database is not the default one: every command needs --db (or the environment variable).
        first = shlex.quote(codes[0] if codes else "DEMO-01")
        db_option = f"--db {shlex.quote(url)}"
        click.echo("The demo database is not your default database; name it in each command:")
        click.echo(f"  ncs-tracker {db_option} show {first}")
        click.echo(f"  ncs-tracker {db_option} check {first}")
        click.echo(f"  ncs-tracker {db_option} serve")
        click.echo(f"or set it once for this shell (POSIX shells): export {ENV_DB}={shlex.quote(url)}")
        return
    _serve(url, host=host, port=port)


@cli.command("serve")
@click.option(
    "--port",
    type=int,
    default=8501,
    show_default=True,
    help="Port of the dashboard (the next free one if taken).",
)
@click.option(
    "--host",
    default="127.0.0.1",
    show_default=True,
    help="Address to listen on (only this machine by default).",
)
@click.option(
    "--sign-in",
    "sign_in",
    is_flag=True,
    help="Ask every visitor to sign in with an account (required on any address but 127.0.0.1).",
)
@pass_context
def serve_command(context: Context, port: int, host: str, sign_in: bool) -> None:
    """Start the dashboard on the chosen database; runs until stopped (Ctrl+C).

    Without --sign-in the dashboard acts as your login (one person on this machine); with it, visitors sign
    in with their own accounts and see what their roles allow.
    """
    from tracker.services.access.accounts import list_users
    from tracker.serving import check_exposure

    check_exposure(host, sign_in=sign_in)
    context.engine()  # refuse early, with one line, when the schema is missing or outdated
    if sign_in:
        with context.session_factory()() as session:
            if not any(u.active and u.has_password for u in list_users(session)):
                raise TrackerError(
                    "Sign-in needs at least one active account with a password: "
                    "ncs-tracker users init (first administrator), then users add."
                )
    url = context.url
    context.close()
    _serve(url, host=host, port=port, sign_in=sign_in)


def _serve(url: str, *, host: str, port: int, sign_in: bool = False) -> None:
    from tracker.serving import run_dashboard

    run_dashboard(url, host=host, port=port, sign_in=sign_in, announce=lambda line: click.echo(line))


@cli.command("export")
@click.option(
    "--level",
    type=click.Choice(["visit", "nerve", "segment", "long"]),
    default="visit",
    show_default=True,
    help="One row per visit, per nerve test, per segment, or per measured or derived quantity.",
)
@click.option(
    "--format",
    "file_format",
    type=click.Choice(["csv", "parquet", "xlsx", "fhir"]),
    default="csv",
    show_default=True,
    help=(
        "Tables (csv, parquet, xlsx) or FHIR R4 NDJSON resources in the --out folder (fhir; --level ignored)."
    ),
)
@click.option(
    "--out",
    type=click.Path(),
    metavar="PATH",
    help="A folder (files named ncs-export-LEVEL.*) or a file stem. Default: the current folder.",
)
@click.option(
    "--diagnosis",
    "diagnoses",
    multiple=True,
    type=click.Choice(DIAGNOSES),
    help="Only visits with this working diagnosis (repeatable).",
)
@click.option("--from", "date_from", metavar="YYYY-MM-DD", help="Only visits on or after this date.")
@click.option("--to", "date_to", metavar="YYYY-MM-DD", help="Only visits on or before this date.")
@click.option(
    "--criteria",
    "criteria",
    metavar="ID",
    multiple=True,
    help="Criteria set whose verdicts to include (repeatable; default: all).",
)
@click.option(
    "--outcome",
    "outcomes",
    metavar="ID=VALUE",
    multiple=True,
    help=(
        "Only visits where criteria set ID has this outcome (repeatable; values of one set are alternatives)."
    ),
)
@click.option("--patients", metavar="CODE,...", help="Only these patients (comma-separated clinic codes).")
@click.option(
    "--dates",
    type=click.Choice(["shifted", "relative"]),
    default="shifted",
    show_default=True,
    help="Dates moved by a secret per-patient shift, or only days since the patient's first visit.",
)
@click.option(
    "--limits", "limits_name", metavar="NAME", help="Normal-limit set (default: the one marked default)."
)
@click.option(
    "--identified",
    is_flag=True,
    help=(
        "Include codes, names, record numbers, birth dates and real dates (role coordinator or admin only; "
        "audited)."
    ),
)
@click.option("--overwrite", is_flag=True, help="Replace files of an earlier export at the same place.")
@click.option(
    "--chunk-visits",
    type=click.IntRange(min=1),
    metavar="N",
    help=(
        "Visits read, evaluated and written at a time (default 1000): fewer use less memory, more run faster."
    ),
)
# The criteria settings, as check takes them (unset: the database's settings, else the defaults).
@click.option(
    "--cold-limbs",
    type=click.Choice(["warn", "exclude"]),
    help="Limbs colder than the guideline minimum: keep the values and warn, or exclude the nerve "
    "(default: the database's setting, else warn).",
)
@click.option(
    "--sides-separate/--sides-together",
    default=None,
    help="Whether left and right of one nerve count as two nerves (default: separate).",
)
@click.option(
    "--cv-segments",
    type=click.Choice(["standard", "all_outside_entrapment"]),
    help="Segments used for conduction velocity (default: standard).",
)
@click.option(
    "--aan-wrist-exclusion/--no-aan-wrist-exclusion",
    default=None,
    help="AAN 1991: a wrist-entrapment mark removes the median distal latency from item 3 "
    "(a project rule). Default: the database's setting, off unless changed on the Settings "
    "page.",
)
@pass_context
def export_command(
    context: Context,
    level: str,
    file_format: str,
    out: str | None,
    diagnoses: tuple[str, ...],
    date_from: str | None,
    date_to: str | None,
    criteria: tuple[str, ...],
    outcomes: tuple[str, ...],
    patients: str | None,
    dates: str,
    limits_name: str | None,
    identified: bool,
    overwrite: bool,
    chunk_visits: int | None,
    cold_limbs: str | None = None,
    sides_separate: bool | None = None,
    cv_segments: str | None = None,
    aan_wrist_exclusion: bool | None = None,
) -> None:
    """Export the cohort for research: de-identified tables with a data dictionary and a manifest.

    The criteria settings apply as in check: the options given here, else the database's settings."""
    import dataclasses

    from tracker.services.export import ExportOptions, write_export

    pairs = []
    for item in outcomes:
        criteria_id, sep, value = item.partition("=")
        if not sep or not criteria_id.strip() or not value.strip():
            raise click.BadParameter(
                f"expected ID=VALUE such as efns-pns-2010-cidp=definite, got {item!r}", param_hint="--outcome"
            )
        pairs.append((criteria_id.strip(), value.strip()))
    options = ExportOptions(
        level=level,
        criteria=tuple(criteria),
        diagnoses=tuple(diagnoses),
        date_from=_parse_date(date_from) if date_from else None,
        date_to=_parse_date(date_to) if date_to else None,
        outcomes=tuple(pairs),
        patients=tuple(c.strip() for c in (patients or "").split(",") if c.strip()),
        dates=dates,
        identified=identified,
        limits_name=limits_name,
        setting_overrides=tuple(
            (name, value)
            for name, value in (
                ("cold_limbs", cold_limbs),
                ("sides_are_separate_nerves", sides_separate),
                ("cv_segments", cv_segments),
                ("aan_wrist_exclusion", aan_wrist_exclusion),
            )
            if value is not None
        ),
    )
    if chunk_visits is not None:
        options = dataclasses.replace(options, chunk_visits=chunk_visits)

    def progress(done: int, total: int) -> None:
        if total > options.chunk_visits:  # a one-chunk export needs no progress line
            click.echo(f"  {done:,} of {total:,} visits exported", err=True)

    actor = context.acting("export_identified" if identified else "export")
    with context.session_factory().begin() as session:
        result = write_export(
            session,
            options,
            file_format=file_format,
            out=out,
            username=actor.name,
            actor=actor,
            overwrite=overwrite,
            progress=progress,
        )
    kind = "IDENTIFIED export (recorded in the audit trail)" if identified else "de-identified export"
    shape = "Observations (FHIR R4)" if file_format == "fhir" else f"rows at level {level}"
    click.echo(f"{kind}: {result.visits} visits, {result.rows} {shape}")
    for written in result.files:
        rows = f", {written.rows} rows" if written.rows is not None else ""
        click.echo(
            f"  {written.role}: {written.path} ({written.size:,} bytes{rows}; sha256 {written.sha256[:16]}…)"
        )
    click.echo(CAUTION)
    click.echo(result.summary)


from tracker.cli_audit import audit_command  # noqa: E402  (command groups in their own modules)

cli.add_command(audit_command)

from tracker.cli_backup import backup_command, restore_command  # noqa: E402

cli.add_command(backup_command)
cli.add_command(restore_command)


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
        from tracker.db.locking import busy_error

        busy = busy_error(error)  # another process held the database longer than the bounded wait
        if busy is not None:
            click.echo(f"Error: {busy}", err=True)
            sys.exit(busy.exit_code)
        click.echo(
            f"Error: an unexpected {type(error).__name__} stopped the command; nothing further was written. "
            "Run again with --debug to see the details.",
            err=True,
        )
        sys.exit(1)
    sys.exit(0)
