"""De-identification for research exports: pseudonymous export ids, secret per-patient date shifts, ages
over 89 top-coded at 90 (with a flag), and who may ask for an identified export.

Everything here is keyed by one secret per database (``app_settings``, key
:data:`tracker.services.preferences.EXPORT_SECRET_KEY`), created on the first export: the same database
gives the same export ids and date shifts every time; two databases give unlinkable ones. The secret is
never printed, logged or exported.
"""

from __future__ import annotations

import hashlib
import hmac
import secrets

from sqlalchemy import select
from sqlalchemy.orm import Session

from tracker.db.models import User
from tracker.services import preferences
from tracker.services.access.permissions import PERMISSIONS, Actor, NotPermitted

# Hex digits of the HMAC kept as the export id: 64 bits, so that the chance of two patients of a cohort of
# 100,000 sharing an id is about 3 in 10^10.
EXPORT_ID_HEX_DIGITS = 16
# Shifted dates move by 1 to 365 days, earlier or later (never 0: an unshifted date would be a real one).
MAX_SHIFT_DAYS = 365
# HIPAA Safe Harbor, 45 CFR 164.514(b)(2)(i)(C): ages over 89 are aggregated into one category, 90 or older.
TOP_AGE = 90
# Roles that may receive an identified export: the research coordinator (who prepares cohort tables under a
# study approval) and the administrator. Viewers and clinicians see identities in care, one patient at a
# time, but a bulk identified file is a disclosure, so it needs one of these roles.
IDENTIFIED_EXPORT_ROLES = PERMISSIONS["export_identified"]


def export_secret(session: Session, *, username: str) -> bytes:
    """This database's export secret (32 random bytes), created and stored on first use.

    The new secret is stored in the caller's transaction and audited without its value.
    """
    stored = preferences.get(session, preferences.EXPORT_SECRET_KEY)
    if not stored:
        stored = secrets.token_hex(32)
        preferences.put(session, preferences.EXPORT_SECRET_KEY, stored, username=username, secret=True)
    return bytes.fromhex(stored)


def _digest(secret: bytes, purpose: str, code: str) -> bytes:
    # A purpose label keeps the export id and the date shift independent of each other.
    return hmac.new(secret, purpose.encode() + b"\x00" + code.encode("utf-8"), hashlib.sha256).digest()


def export_id(secret: bytes, code: str) -> str:
    """Pseudonymous id of the patient with clinic code ``code``: HMAC-SHA256, first 16 hex digits."""
    return _digest(secret, "export-id", code).hex()[:EXPORT_ID_HEX_DIGITS]


def date_shift_days(secret: bytes, code: str) -> int:
    """The patient's secret date shift in days: in −365…−1 or 1…365, the
    same for every date of the patient."""
    number = int.from_bytes(_digest(secret, "date-shift", code)[:8], "big") % (2 * MAX_SHIFT_DAYS)
    return number - MAX_SHIFT_DAYS if number < MAX_SHIFT_DAYS else number - MAX_SHIFT_DAYS + 1


def top_coded_age(age_years: float | None, *, identified: bool) -> tuple[int | None, bool | None]:
    """(age in whole years, top-coded?) for the export: from 90 on, (90, True) unless the export is identified
    (then the age itself and False); (None, None) when the age is unknown (no birth year)."""
    if age_years is None or age_years != age_years:  # missing birth year (NaN)
        return None, None
    age = int(age_years)
    if age >= TOP_AGE and not identified:
        return TOP_AGE, True
    return age, False


def require_identified_permission(session: Session, actor: Actor | None) -> str:
    """Return the role of ``actor`` if it may receive an identified export
    now, else raise :class:`NotPermitted`.

    The role is read again from the database (an account deactivated a moment ago is refused), and the actor
    must have proved itself with its password in this command or sign-in session.
    """
    allowed = " or ".join(IDENTIFIED_EXPORT_ROLES)
    if actor is None or not actor.authenticated:
        raise NotPermitted(
            f"An identified export needs an account with role {allowed} that signed in with its password. "
            "Without --identified the export is de-identified."
        )
    user = session.scalar(select(User).where(User.username == actor.name))
    if user is None or not user.active or user.role not in IDENTIFIED_EXPORT_ROLES:
        state = "no active account" if user is None or not user.active else f"role {user.role!r}"
        raise NotPermitted(
            f"An identified export is refused: {actor.name} has {state}; it needs an active account with "
            f"role {allowed}. Without --identified the export is de-identified and needs no role."
        )
    return user.role
