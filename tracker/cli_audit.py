"""``ncs-tracker audit`` — read the audit trail in words, and check that nobody altered it."""

from __future__ import annotations

import datetime as dt

import click

from tracker.cli_context import Context, pass_context
from tracker.errors import TrackerError


class ChainBroken(TrackerError):
    """``audit verify`` found a broken link (exit code 1)."""


@click.group("audit", invoke_without_command=True)
@click.option(
    "--patient", metavar="CODE", help="Only events about this patient (visits, scores, annotations)."
)
@click.option("--since", metavar="YYYY-MM-DD", help="Only events on or after this day (UTC).")
@click.option("--user", "username", metavar="NAME", help="Only events by this account.")
@click.option(
    "--limit", type=click.IntRange(min=1), default=200, show_default=True, help="At most this many events."
)
@click.pass_context
def audit_command(
    ctx: click.Context, patient: str | None, since: str | None, username: str | None, limit: int
) -> None:
    """Who changed what, before → after, newest first (clinicians and administrators).

    A file import is one event naming the file's checksum; replaced visits, annotations and changed
    patient details name the patient.
    """
    if ctx.invoked_subcommand is not None:
        return
    from tracker.services.access.audit import event_lines

    context: Context = ctx.obj
    context.acting("read_audit")
    day = None
    if since:
        try:
            day = dt.date.fromisoformat(since)
        except ValueError:
            raise click.BadParameter(
                f"expected a date as YYYY-MM-DD, got {since!r}", param_hint="--since"
            ) from None
    with context.session_factory()() as session:
        lines = event_lines(session, patient=patient, since=day, username=username, limit=limit)
    if not lines:
        click.echo("No audit events match.")
    for line in lines:
        click.echo(f"{line.when}  {line.who:<16} {line.what}")
        if line.change:
            click.echo(f"{'':21}{line.change}")


@audit_command.command("verify")
@pass_context
def audit_verify(context: Context) -> None:
    """Check the hash chain of the whole audit trail; exit 1 naming the first broken link."""
    from tracker.services.access.audit import verify

    context.acting("read_audit")
    with context.engine().connect() as connection:
        report = verify(connection)
    if not report.intact:
        raise ChainBroken(
            f"The audit trail was altered: event {report.broken_at}: {report.problem}. "
            f"{report.rows} events before it are intact."
        )
    click.echo(f"The audit trail is intact: {report.rows} events, every link checked.")
