"""Alembic environment: the URL comes from tracker's settings, or a connection handed over by the caller."""

from __future__ import annotations

from alembic import context

from tracker.config import resolve_database_url
from tracker.db.models import Base
from tracker.db.session import make_engine

config = context.config
target_metadata = Base.metadata

COMMON = dict(target_metadata=target_metadata, render_as_batch=True, compare_type=True)


def _url() -> str:
    url = config.get_main_option("sqlalchemy.url")
    return url or resolve_database_url()[0]


def run_offline() -> None:
    context.configure(url=_url(), literal_binds=True, **COMMON)
    with context.begin_transaction():
        context.run_migrations()


def run_online() -> None:
    connection = config.attributes.get("connection")
    if connection is not None:
        context.configure(connection=connection, **COMMON)
        with context.begin_transaction():
            context.run_migrations()
        return
    # Command-line alembic: foreign keys OFF for the same reason as tracker.db.migrate.
    engine = make_engine(_url(), foreign_keys=False)
    with engine.connect() as connection:
        context.configure(connection=connection, **COMMON)
        with context.begin_transaction():
            context.run_migrations()
    engine.dispose()


if context.is_offline_mode():
    run_offline()
else:
    run_online()
