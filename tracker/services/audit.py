"""The audit trail: every write is recorded with who, when, what, and the values before and after."""

from __future__ import annotations

from typing import Any

from sqlalchemy import insert
from sqlalchemy.orm import Session

from tracker.db.models import AuditEvent, utc_now


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
    """Add one audit event to the caller's transaction (it commits or rolls back with the write)."""
    session.execute(
        insert(AuditEvent),
        [
            {
                "occurred_at": utc_now(),
                "username": username,
                "action": action,
                "entity": entity,
                "entity_key": entity_key,
                "before": before,
                "after": after,
                "detail": detail,
            }
        ],
    )
