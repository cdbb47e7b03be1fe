"""Accounts: argon2id password hashes, the first administrator, roles granted only by an authenticated
administrator, sign-in with lock-out, and who the acting login is.

Identity. On PostgreSQL the acting login is the authenticated database login (``current_user``); on SQLite
it is the operating-system account of the process (from the password database, not from environment
variables such as ``LOGNAME``, which anyone can set). The dashboard with sign-in uses the signed-in account.

Passwords are never logged, printed, audited or kept beyond the call that checks them.
"""

from __future__ import annotations

import datetime as dt
import functools
import os
from dataclasses import dataclass

from argon2 import PasswordHasher
from argon2.exceptions import InvalidHashError, VerificationError, VerifyMismatchError
from argon2.low_level import Type
from sqlalchemy import func, select, text
from sqlalchemy.orm import Session

from tracker.db.models import User, utc_now
from tracker.errors import NotFound, TrackerError
from tracker.services.access.audit import record
from tracker.services.access.permissions import ALL_ROLES, Actor, NotPermitted

# OWASP Password Storage Cheat Sheet (2023): "Use Argon2id with a minimum configuration of 19 MiB of memory,
# an iteration count of 2, and 1 degree of parallelism." Salt 16 bytes, tag 32 bytes.
HASHER = PasswordHasher(
    time_cost=2, memory_cost=19 * 1024, parallelism=1, hash_len=32, salt_len=16, type=Type.ID
)
# NIST SP 800-63B §5.1.1.2 asks at least 8 characters and accepting at least 64; we ask
# 12 (common practice for staff accounts holding patient data, no single source) and cap
# at 128 so one sign-in costs what it should.
PASSWORD_MIN, PASSWORD_MAX = 12, 128
# Lock-out: after this many consecutive failures the account is locked for LOCK_MINUTES (common practice,
# no source; OWASP's Authentication Cheat Sheet asks for a lock-out without fixing the numbers).
MAX_FAILED_SIGN_INS = 5
LOCK_MINUTES = 15
USERNAME_MAX = 64


class SignInRefused(TrackerError):
    """Wrong name or password, an inactive account, or a locked one. The message never says which of name
    or password was wrong."""


@dataclass(frozen=True)
class UserInfo:
    username: str
    display_name: str | None
    role: str
    active: bool
    has_password: bool = False
    locked_until: dt.datetime | None = None


def _info(user: User) -> UserInfo:
    return UserInfo(
        user.username,
        user.display_name,
        user.role,
        user.active,
        user.password_hash is not None,
        user.locked_until,
    )


def hash_password(password: str) -> str:
    check_password_rules(password)
    return HASHER.hash(password)


def check_password_rules(password: str) -> None:
    if len(password) < PASSWORD_MIN:
        raise TrackerError(f"A password needs at least {PASSWORD_MIN} characters.")
    if len(password) > PASSWORD_MAX:
        raise TrackerError(f"A password may have at most {PASSWORD_MAX} characters.")
    if "\x00" in password:
        raise TrackerError("A password may not contain a NUL character.")


# --- identity --------------------------------------------------------------------------------------------


def os_login() -> str:
    """The operating-system account running this process (not ``$LOGNAME``/``$USER``, which anyone sets)."""
    try:
        import pwd

        return pwd.getpwuid(os.geteuid()).pw_name
    except (ImportError, KeyError):  # Windows, or a uid without a name (containers)
        import getpass

        try:
            return getpass.getuser()
        except Exception:
            return f"uid-{os.getuid()}" if hasattr(os, "getuid") else "unknown"


def system_identity(session: Session) -> tuple[str, str]:
    """``(login, via)``: the database login on PostgreSQL, the operating-system account on SQLite."""
    if session.get_bind().dialect.name == "postgresql":
        return session.execute(text("SELECT current_user")).scalar_one(), "database-login"
    return os_login(), "os-login"


def accounts_exist(session: Session) -> bool:
    return bool(session.scalar(select(func.count()).select_from(User)))


def _find(session: Session, username: str) -> User | None:
    return session.scalar(select(User).where(User.username == username))


def actor_for(session: Session, name: str, via: str, *, authenticated: bool = False) -> Actor:
    """The actor ``name`` with its role read from the database now (never from a cache), or single-user mode
    while there are no accounts."""
    if not accounts_exist(session):
        return Actor(name, None, "single-user", authenticated)
    user = _find(session, name)
    role = user.role if user is not None and user.active else None
    return Actor(name, role, via, authenticated and role is not None)


def system_actor(session: Session) -> Actor:
    name, via = system_identity(session)
    return actor_for(session, name, via)


# --- sign-in ---------------------------------------------------------------------------------------------


def authenticate(
    session: Session, username: str, password: str, *, via: str = "sign-in", now: dt.datetime | None = None
) -> Actor:
    """Check ``password`` for ``username`` in the caller's transaction (commit it either way: failures count).

    Locked, inactive, unknown and password-less accounts, and wrong passwords, all raise
    :class:`SignInRefused`; every attempt is audited (an unknown name is not written down: it may be a
    password typed in the wrong field)."""
    now = now or utc_now()
    user = _find(session, username) if 0 < len(username) <= USERNAME_MAX else None
    if user is None or user.password_hash is None:
        _verify(_dummy_hash(), password)  # a wrong name costs as long as a wrong password
        record(
            session,
            username="(unknown)" if user is None else username,
            action="sign_in_refused",
            entity="user",
            entity_key=None if user is None else username,
            detail="no such account" if user is None else "the account has no password",
        )
        raise SignInRefused("Sign-in refused: the user name or the password is not right.")
    locked_until = _aware(user.locked_until)
    if locked_until is not None and locked_until > now:
        minutes = max(1, int((locked_until - now).total_seconds() // 60) + 1)
        record(
            session,
            username=username,
            action="sign_in_refused",
            entity="user",
            entity_key=username,
            detail="account locked",
        )
        raise SignInRefused(
            f"Sign-in refused: too many failed attempts; try again in {minutes} minutes, or ask "
            "an administrator."
        )
    if not _verify(user.password_hash, password) or not user.active:
        if user.active:
            user.failed_sign_ins += 1
            if user.failed_sign_ins >= MAX_FAILED_SIGN_INS:
                user.locked_until = now + dt.timedelta(minutes=LOCK_MINUTES)
                user.failed_sign_ins = 0
        session.flush()
        record(
            session,
            username=username,
            action="sign_in_refused",
            entity="user",
            entity_key=username,
            detail="inactive account" if not user.active else "wrong password",
            after={"locked": user.locked_until is not None and _aware(user.locked_until) > now},
        )
        raise SignInRefused("Sign-in refused: the user name or the password is not right.")
    # A command-line password check writes nothing when there is nothing to reset (the action it allows is
    # audited under the same name); a dashboard sign-in starts a session and is audited.
    if HASHER.check_needs_rehash(user.password_hash):
        user.password_hash = HASHER.hash(password)
    if user.failed_sign_ins or user.locked_until is not None:
        user.failed_sign_ins, user.locked_until = 0, None
    if via == "sign-in":
        record(session, username=username, action="sign_in", entity="user", entity_key=username, detail=via)
    session.flush()
    return Actor(username, user.role, via, authenticated=True)


@functools.cache
def _dummy_hash() -> str:
    return HASHER.hash("not a password of anyone " + os.urandom(8).hex())


def _verify(stored: str, password: str) -> bool:
    if len(password) > PASSWORD_MAX:
        return False
    try:
        return HASHER.verify(stored, password)
    except (VerifyMismatchError, VerificationError, InvalidHashError):
        return False


def _aware(value: dt.datetime | None) -> dt.datetime | None:
    """SQLite hands back naive UTC datetimes."""
    if value is not None and value.tzinfo is None:
        return value.replace(tzinfo=dt.UTC)
    return value


# --- accounts --------------------------------------------------------------------------------------------


def list_users(session: Session) -> list[UserInfo]:
    return [_info(u) for u in session.scalars(select(User).order_by(User.username))]


def init_first_admin(
    session: Session, username: str, password: str, *, identity: str, display_name: str | None = None
) -> UserInfo:
    """Create the first administrator; only on an empty users table, and only for the acting login itself
    (so that the new admin can act here)."""
    if accounts_exist(session):
        raise NotPermitted(
            "The users table is not empty: accounts are added by an administrator "
            "(ncs-tracker users add NAME --role ROLE)."
        )
    username = _valid_name(username)
    if username != identity:
        raise NotPermitted(
            f"Commands on this database act as the login {identity!r}; the first administrator "
            f"must be that login so that it can manage accounts here (ncs-tracker users init {identity})."
        )
    user = User(
        username=username,
        role="admin",
        display_name=display_name,
        active=True,
        password_hash=hash_password(password),
        password_changed_at=utc_now(),
        failed_sign_ins=0,
    )
    session.add(user)
    session.flush()
    record(
        session,
        username=username,
        action="init_first_admin",
        entity="user",
        entity_key=username,
        after={"role": "admin", "active": True},
    )
    return _info(user)


def set_user(
    session: Session,
    username: str,
    *,
    role: str,
    acting: Actor,
    display_name: str | None = None,
    password: str | None = None,
) -> tuple[UserInfo, str]:
    """Add ``username`` with ``role``, or change an existing user's role (reactivating it). Only an
    authenticated admin, and never on their own account. Returns the user and ``"added"``, ``"changed"``
    or ``"unchanged"``."""
    _require_admin(acting)
    username = _valid_name(username)
    if role not in ALL_ROLES:
        raise TrackerError(f"Unknown role {role!r}; choose one of {', '.join(ALL_ROLES)}.")
    if username == acting.name:
        raise NotPermitted("Nobody changes their own role or account state; ask another administrator.")
    user = _find(session, username)
    if user is None:
        user = User(
            username=username,
            role=role,
            display_name=display_name,
            active=True,
            failed_sign_ins=0,
            password_hash=None if password is None else hash_password(password),
            password_changed_at=None if password is None else utc_now(),
        )
        session.add(user)
        session.flush()
        record(
            session,
            username=acting.name,
            action="add",
            entity="user",
            entity_key=username,
            after={"role": role, "active": True, "password_set": password is not None},
        )
        return _info(user), "added"
    before = {"role": user.role, "active": user.active}
    if before["role"] == "admin" and role != "admin":
        _keep_one_admin(session, username)
    user.role, user.active = role, True
    if display_name is not None:
        user.display_name = display_name
    after = {"role": user.role, "active": user.active}
    if password is not None and user.password_hash is None:
        user.password_hash, user.password_changed_at = hash_password(password), utc_now()
        after["password_set"] = True
    if before == after:
        return _info(user), "unchanged"
    session.flush()
    record(
        session,
        username=acting.name,
        action="change",
        entity="user",
        entity_key=username,
        before=before,
        after=after,
    )
    return _info(user), "changed"


def deactivate_user(session: Session, username: str, *, acting: Actor) -> UserInfo:
    """Keep the user (the audit trail names it) but withdraw what its role allowed."""
    _require_admin(acting)
    if username == acting.name:
        raise NotPermitted("Nobody deactivates their own account; ask another administrator.")
    user = _find(session, username)
    if user is None:
        raise NotFound(f"No user {username!r} in this database.")
    if user.active:
        if user.role == "admin":
            _keep_one_admin(session, username)
        user.active = False
        session.flush()
        record(
            session,
            username=acting.name,
            action="deactivate",
            entity="user",
            entity_key=username,
            before={"active": True},
            after={"active": False},
        )
    return _info(user)


def set_password(session: Session, username: str, new_password: str, *, acting: Actor) -> None:
    """An account holder changes their own password (``acting`` authenticated as that account), or an admin
    resets another's (which also lifts a lock-out)."""
    if not acting.authenticated:
        raise NotPermitted("Changing a password needs the acting account's password first.")
    if username != acting.name:
        _require_admin(acting)
    user = _find(session, username)
    if user is None:
        raise NotFound(f"No user {username!r} in this database.")
    user.password_hash, user.password_changed_at = hash_password(new_password), utc_now()
    user.failed_sign_ins, user.locked_until = 0, None
    session.flush()
    record(
        session,
        username=acting.name,
        action="set_password",
        entity="user",
        entity_key=username,
        detail="own password" if username == acting.name else "reset by an administrator",
    )


def _require_admin(acting: Actor) -> None:
    acting.require("manage_users")
    if not acting.authenticated:
        raise NotPermitted("Managing accounts needs the administrator's password.")


def _keep_one_admin(session: Session, leaving: str) -> None:
    others = session.scalar(
        select(func.count())
        .select_from(User)
        .where(User.role == "admin", User.active.is_(True), User.username != leaving)
    )
    if not others:
        raise NotPermitted("This is the last active administrator; make another one first.")


def _valid_name(username: str) -> str:
    username = username.strip()
    if not username or len(username) > USERNAME_MAX:
        raise TrackerError(f"A user name needs 1 to {USERNAME_MAX} characters.")
    if any(ch.isspace() or not ch.isprintable() for ch in username):
        raise TrackerError("A user name may not contain spaces or control characters.")
    return username
