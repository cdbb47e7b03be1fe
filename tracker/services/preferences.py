"""Settings shared by every user of one database (kept in ``app_settings``), with the audit trail."""

from __future__ import annotations

from sqlalchemy import select
from sqlalchemy.orm import Session

from tracker.criteria import engine
from tracker.criteria.model import Settings
from tracker.db.models import AppSetting
from tracker.errors import TrackerError
from tracker.services.access.audit import record

DEFAULT_CRITERIA_KEY = "default_criteria"
COLD_LIMBS_KEY = "cold_limbs"
COLD_LIMB_POLICIES = ("warn", "exclude")
# Key of the export secret: never shown, logged or exported (see tracker/services/export).
EXPORT_SECRET_KEY = "export_secret"


def get(session: Session, key: str) -> str | None:
    """The stored value of ``key``, or ``None``."""
    return session.scalar(select(AppSetting.value).where(AppSetting.key == key))


def put(session: Session, key: str, value: str, *, username: str, secret: bool = False) -> None:
    """Store ``value`` under ``key`` in the caller's transaction; the change is
    audited (a secret's value is not)."""
    row = session.get(AppSetting, key)
    before = None if row is None else row.value
    if row is None:
        session.add(AppSetting(key=key, value=value))
    else:
        row.value = value
    session.flush()
    shown = (lambda v: None if v is None else "(secret)") if secret else (lambda v: v)
    record(
        session,
        username=username,
        action="set",
        entity="setting",
        entity_key=key,
        before=None if before is None else {"value": shown(before)},
        after={"value": shown(value)},
    )


def default_criteria(session: Session) -> str | None:
    """The clinic's chosen default criteria set, or ``None`` (then each visit's diagnosis decides)."""
    return get(session, DEFAULT_CRITERIA_KEY)


def set_default_criteria(session: Session, criteria_id: str | None, *, username: str) -> None:
    """Choose the default criteria set (``None`` or ``""``: by each visit's diagnosis)."""
    if criteria_id and criteria_id not in engine.REGISTRY:
        raise TrackerError(f"Unknown criteria set {criteria_id!r}; known: {', '.join(engine.available())}")
    put(session, DEFAULT_CRITERIA_KEY, criteria_id or "", username=username)


def cold_limbs(session: Session) -> str:
    """Temperature policy for limbs below the guideline minimum: ``warn`` (default) or ``exclude``."""
    return get(session, COLD_LIMBS_KEY) or "warn"


def set_cold_limbs(session: Session, policy: str, *, username: str) -> None:
    if policy not in COLD_LIMB_POLICIES:
        raise TrackerError(
            f"Unknown temperature policy {policy!r}; choose {' or '.join(COLD_LIMB_POLICIES)}."
        )
    put(session, COLD_LIMBS_KEY, policy, username=username)


# Project rules that change a publication's literal result (tracker/criteria/README.md): stored switches, off
# by default (the publication's reading). Key → Settings field.
CRITERIA_SWITCHES = {
    "criteria_aan_wrist_exclusion": "aan_wrist_exclusion",
    "criteria_duration_filter_strict": "duration_filter_strict",
}


def criteria_switch(session: Session, field: str) -> bool:
    """The stored value of one criteria switch (a field of ``Settings`` listed in ``CRITERIA_SWITCHES``)."""
    key = _switch_key(field)
    return get(session, key) == "on"


def set_criteria_switch(session: Session, field: str, on: bool, *, username: str) -> None:
    """Store one criteria switch (audited); ``on=False`` is the publication's reading."""
    put(session, _switch_key(field), "on" if on else "off", username=username)


def criteria_settings(session: Session, **overrides) -> Settings:
    """The criteria settings of this database: the temperature policy and the stored switches, with
    ``overrides`` (e.g. a ``cold_limbs`` chosen for one check) taking precedence where not ``None``."""
    values = {"cold_limbs": cold_limbs(session)}
    values.update({field: criteria_switch(session, field) for field in CRITERIA_SWITCHES.values()})
    values.update({k: v for k, v in overrides.items() if v is not None})
    return Settings(**values)


def _switch_key(field: str) -> str:
    for key, name in CRITERIA_SWITCHES.items():
        if name == field:
            return key
    raise TrackerError(f"Unknown criteria switch {field!r}; known: {', '.join(CRITERIA_SWITCHES.values())}")
