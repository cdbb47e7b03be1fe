"""Users and their roles (viewer, clinician, coordinator, admin): who may receive an identified export.

There is no sign-in yet: the acting user is ``--user`` / ``NCS_TRACKER_USER``; this table states what each
name may do, and every change to it is audited.
"""

from __future__ import annotations

from dataclasses import dataclass

from sqlalchemy import select
from sqlalchemy.orm import Session

from tracker.db.models import User
from tracker.domain.vocabulary import USER_ROLES
from tracker.errors import NotFound, TrackerError
from tracker.services.audit import record


@dataclass(frozen=True)
class UserInfo:
    username: str
    display_name: str | None
    role: str
    active: bool


def list_users(session: Session) -> list[UserInfo]:
    return [
        UserInfo(u.username, u.display_name, u.role, u.active)
        for u in session.scalars(select(User).order_by(User.username))
    ]


def set_user(
    session: Session, username: str, *, role: str, display_name: str | None = None, acting: str
) -> tuple[UserInfo, str]:
    """Add ``username`` with ``role``, or change the role of an existing user (reactivating it).
    Returns the user and ``"added"``, ``"changed"`` or ``"unchanged"``."""
    username = username.strip()
    if not username or len(username) > 64:
        raise TrackerError("A user name needs 1 to 64 characters.")
    if role not in USER_ROLES:
        raise TrackerError(f"Unknown role {role!r}; choose one of {', '.join(USER_ROLES)}.")
    user = session.scalar(select(User).where(User.username == username))
    if user is None:
        user = User(username=username, role=role, display_name=display_name, active=True)
        session.add(user)
        session.flush()
        record(
            session,
            username=acting,
            action="add",
            entity="user",
            entity_key=username,
            after={"role": role, "active": True},
        )
        outcome = "added"
    else:
        before = {"role": user.role, "active": user.active}
        user.role, user.active = role, True
        if display_name is not None:
            user.display_name = display_name
        after = {"role": user.role, "active": user.active}
        outcome = "unchanged" if before == after else "changed"
        if outcome == "changed":
            session.flush()
            record(
                session,
                username=acting,
                action="change",
                entity="user",
                entity_key=username,
                before=before,
                after=after,
            )
    return UserInfo(user.username, user.display_name, user.role, user.active), outcome


def deactivate_user(session: Session, username: str, *, acting: str) -> UserInfo:
    """Keep the user (the audit trail names it) but withdraw what its role allowed."""
    user = session.scalar(select(User).where(User.username == username))
    if user is None:
        raise NotFound(f"No user {username!r} in this database.")
    if user.active:
        user.active = False
        session.flush()
        record(
            session,
            username=acting,
            action="deactivate",
            entity="user",
            entity_key=username,
            before={"active": True},
            after={"active": False},
        )
    return UserInfo(user.username, user.display_name, user.role, user.active)
