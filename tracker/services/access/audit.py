"""The audit trail: every write is recorded with who, when, what, and the values before and after.

Rows form a hash chain: each row's ``row_hash`` is SHA-256 over the previous row's hash and this row's
content, so that changing, inserting or deleting a row anywhere before the newest one breaks the chain
(:func:`verify` names the first broken link). Triggers (migration 0005) refuse UPDATE and DELETE of a sealed
row on both backends; the chain is what still shows tampering by someone who drops the triggers.

Entry points: :func:`record` (in the caller's transaction), :func:`verify`, :func:`events`.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any

from sqlalchemy import Connection, select, text, update
from sqlalchemy.orm import Session

from tracker.db.models import AuditEvent, utc_now

# The first row's "previous hash": 64 zeros.
GENESIS = "0" * 64
# Key of the PostgreSQL transaction-level advisory lock that serialises writers of the chain, so that two
# transactions never seal rows on the same previous hash (b"ncs-audit" as an integer, truncated to 63 bits).
PG_CHAIN_LOCK = int.from_bytes(b"ncs-audi", "big") & 0x7FFF_FFFF_FFFF_FFFF
FIELDS = ("id", "occurred_at", "username", "action", "entity", "entity_key", "before", "after", "detail")


def _instant(value: dt.datetime | str | None) -> str | None:
    """One text for an instant on both backends: SQLite hands back naive UTC, PostgreSQL an aware one."""
    if value is None:
        return None
    if isinstance(value, str):
        value = dt.datetime.fromisoformat(value)
    if value.tzinfo is not None:
        value = value.astimezone(dt.UTC).replace(tzinfo=None)
    return value.strftime("%Y-%m-%dT%H:%M:%S.%f")


def row_digest(prev_hash: str, row: dict[str, Any]) -> str:
    """SHA-256 (hex) of the previous hash and the row's fields in canonical JSON."""
    content = {name: row.get(name) for name in FIELDS}
    content["occurred_at"] = _instant(content["occurred_at"])
    for name in ("before", "after"):
        if isinstance(content[name], str):  # a JSON column read back as text by a raw connection
            content[name] = json.loads(content[name])
    canonical = json.dumps(content, sort_keys=True, separators=(",", ":"), ensure_ascii=False, default=str)
    return hashlib.sha256((prev_hash + "\n" + canonical).encode("utf-8")).hexdigest()


def record(
    session: Session,
    *,
    username: str,
    action: str,
    entity: str,
    entity_key: str | None = None,
    before: dict[str, Any] | None = None,
    after: dict[str, Any] | None = None,
    detail: str | None = None,
) -> None:
    """Add one audit event to the caller's transaction (it commits or rolls back with the write) and seal it
    into the chain."""
    seal(
        session.connection(),
        {
            "occurred_at": utc_now(),
            "username": username,
            "action": action,
            "entity": entity,
            "entity_key": entity_key,
            "before": before,
            "after": after,
            "detail": detail,
        },
    )


def seal(connection: Connection, values: dict[str, Any]) -> None:
    """Insert the row, then chain it to the row before it.

    Inserting first takes SQLite's write lock before the previous hash is read, so no other writer can
    append in between; on PostgreSQL an advisory lock held to the end of the transaction does the same.
    """
    if connection.dialect.name == "postgresql":
        connection.execute(text("SELECT pg_advisory_xact_lock(:key)"), {"key": PG_CHAIN_LOCK})
    table = AuditEvent.__table__
    new_id = connection.execute(table.insert().values(**values).returning(table.c.id)).scalar_one()
    prev = connection.execute(
        select(table.c.row_hash).where(table.c.id < new_id).order_by(table.c.id.desc()).limit(1)
    ).scalar_one_or_none()
    prev = prev or GENESIS
    row = dict(values, id=new_id)
    connection.execute(
        update(table).where(table.c.id == new_id).values(prev_hash=prev, row_hash=row_digest(prev, row))
    )


@dataclass(frozen=True)
class ChainReport:
    """What :func:`verify` found: rows checked and the first broken link (``None`` when intact)."""

    rows: int
    broken_at: int | None = None
    problem: str | None = None

    @property
    def intact(self) -> bool:
        return self.broken_at is None


def verify(connection: Connection, *, chunk: int = 5000) -> ChainReport:
    """Walk the chain in id order and report the first row whose link or content does not match."""
    table = AuditEvent.__table__
    columns = [table.c[name] for name in FIELDS] + [table.c.prev_hash, table.c.row_hash]
    expected_prev, checked, last_id = GENESIS, 0, None
    while True:
        query = select(*columns).order_by(table.c.id).limit(chunk)
        if last_id is not None:
            query = query.where(table.c.id > last_id)
        rows = connection.execute(query).mappings().all()
        if not rows:
            return ChainReport(checked)
        for row in rows:
            if row["row_hash"] is None:
                return ChainReport(checked, row["id"], "the row was never sealed into the chain")
            if row["prev_hash"] != expected_prev:
                return ChainReport(
                    checked,
                    row["id"],
                    "the link to the previous row does not match "
                    "(a row before it was removed, inserted or changed)",
                )
            if row_digest(row["prev_hash"], dict(row)) != row["row_hash"]:
                return ChainReport(checked, row["id"], "the row's content was changed after it was written")
            expected_prev, checked, last_id = row["row_hash"], checked + 1, row["id"]


def events(
    session: Session,
    *,
    entity_key_prefix: str | None = None,
    since: dt.date | None = None,
    username: str | None = None,
    limit: int | None = None,
) -> Iterator[AuditEvent]:
    """Audit events, newest first, filtered by patient (entity keys start with the patient code), first
    day and user."""
    query = select(AuditEvent).order_by(AuditEvent.id.desc())
    if entity_key_prefix:
        query = query.where(
            (AuditEvent.entity_key == entity_key_prefix)
            | AuditEvent.entity_key.startswith(entity_key_prefix + "/", autoescape=True)
        )
    if since is not None:
        query = query.where(AuditEvent.occurred_at >= dt.datetime.combine(since, dt.time(), tzinfo=dt.UTC))
    if username:
        query = query.where(AuditEvent.username == username)
    if limit:
        query = query.limit(limit)
    yield from session.scalars(query)


@dataclass(frozen=True)
class EventLine:
    """One audit event for people: when (UTC), who, what in words, and the change in words."""

    event_id: int
    when: str
    who: str
    what: str
    change: str


def event_lines(
    session: Session,
    *,
    patient: str | None = None,
    since: dt.date | None = None,
    username: str | None = None,
    limit: int | None = 200,
) -> list[EventLine]:
    """The newest events first, in words (labels from :mod:`tracker.domain.labels`)."""
    from tracker.domain.labels import AUDIT_ACTION_LABELS, audit_change_words, words

    lines = []
    for event in events(session, entity_key_prefix=patient, since=since, username=username, limit=limit):
        what = AUDIT_ACTION_LABELS.get(event.action, words(event.action))
        if event.entity_key:
            what += f" — {event.entity_key}"
        change = audit_change_words(event.before, event.after)
        if event.detail:
            change = f"{change} ({event.detail})" if change else event.detail
        lines.append(
            EventLine(
                event.id,
                (_instant(event.occurred_at) or "")[:19].replace("T", " "),
                event.username,
                what,
                change,
            )
        )
    return lines
