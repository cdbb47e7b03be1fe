"""Is the database at the schema this installation expects? Answered without loading Alembic when it is.

Every command and the dashboard check the schema before they touch the data. Loading Alembic to read the
newest migration costs 0.2–0.3 s of start-up per command (measured in the import benchmark's profile),
more than a one-visit ``check`` spends on its visit; the common answer — "yes, current" — needs only the
revision stored in ``alembic_version`` and the newest revision's id, kept here. Anything else (no schema,
an older or newer one, an unreachable server) goes to :func:`tracker.db.migrate.require_current_schema`,
which names the command to run.
"""

from __future__ import annotations

from sqlalchemy import Engine, text

# The id of the newest file in migrations/versions (tests/test_migrations.py checks it against Alembic's
# own head, so a new migration without this line changed fails the tests).
SCHEMA_HEAD = "0007"


def _stored_revision(engine: Engine) -> str | None:
    """The revision in ``alembic_version``, or None when it cannot be read plainly (no such table…)."""
    try:
        with engine.connect() as connection:
            rows = connection.execute(text("SELECT version_num FROM alembic_version")).scalars().all()
    except Exception:  # noqa: BLE001 - the full check below says what is wrong, in words
        return None
    return rows[0] if len(rows) == 1 else None


def require_current_schema(engine: Engine) -> None:
    """Return when the schema is current; otherwise stop with one line naming the command to run."""
    if _stored_revision(engine) == SCHEMA_HEAD:
        return
    from tracker.db.migrate import require_current_schema as full_check

    full_check(engine)
