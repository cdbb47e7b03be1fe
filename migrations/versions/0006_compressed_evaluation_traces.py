"""Saved evaluations stored compressed: ``evaluations.result`` becomes a binary column holding the trace as
compact JSON compressed with zlib and a preset dictionary (``tracker.db.types.CompressedJSON``), about 1/20
of the JSON text. The other columns (outcome, criteria version, limit set and version, input fingerprint)
are unchanged, so audit queries never need to open a trace.

Every row is converted, in chunks of 1,000 rows read in id order (memory stays flat whatever the table),
with progress every 10,000 rows. The value read back is the same document: JSON text is parsed and written
again compactly, keys in the same order. Downgrade converts back to the JSON text of revision 0005.

SQLite: converted rows go into a new table that then replaces the old one (an UPDATE would rewrite every
16 kB row once more); ``tracker.db.migrate`` runs VACUUM afterwards, outside the transaction, to give the
freed pages back to the file system. PostgreSQL: a new column filled chunk by chunk, the old one dropped
and the new one renamed; ``VACUUM FULL evaluations`` afterwards rewrites the table without the dropped
column's data.

Revision ID: 0006
Revises: 0005
Create Date: 2026-12-03
"""

from __future__ import annotations

import json
from collections.abc import Callable
from typing import Any

import sqlalchemy as sa
from alembic import context, op

from tracker.db.types import decode_json, encode_json

revision = "0006"
down_revision = "0005"
branch_labels = None
depends_on = None

CHUNK_ROWS = 1000
PACKED_COMMENT = "the full trace, compressed JSON (tracker.db.types)"
TEXT_COMMENT = "the full trace"
COLUMNS = (
    "id",
    "visit_id",
    "criteria_id",
    "criteria_version",
    "limit_set_id",
    "limit_set_version",
    "input_sha256",
    "outcome",
    "result",
    "computed_at",
)
NEW_TABLE = "_evaluations_converted"
NEW_COLUMN = "result_converted"


def upgrade() -> None:
    _convert(packed=True)


def downgrade() -> None:
    _convert(packed=False)


def _to_packed(value: Any) -> bytes:
    return encode_json(decode_json(value))


def _to_text(value: Any) -> str:
    return json.dumps(decode_json(value))  # as the JSON column of revision 0005 wrote it (json.dumps)


def _progress() -> Callable[[int, int], None]:
    """The caller's progress callback (``tracker.db.migrate`` passes one), else nothing."""
    callback = context.config.attributes.get("progress")
    return (
        (lambda done, total: callback("converting saved evaluations", done, total))
        if callback
        else (lambda done, total: None)
    )


def _convert(*, packed: bool) -> None:
    bind = op.get_bind()
    total = int(bind.scalar(sa.text("SELECT count(*) FROM evaluations")) or 0)
    convert = _to_packed if packed else _to_text
    if bind.dialect.name == "sqlite":
        _convert_sqlite(bind, total, convert, packed=packed)
    else:
        _convert_postgresql(bind, total, convert, packed=packed)
    if total:
        # Ask tracker.db.migrate to reclaim the space of the old values once the transaction is committed.
        context.config.attributes.setdefault("reclaim", set()).add("evaluations")


def _chunks(bind, select_sql: str) -> Any:
    """Rows of ``select_sql`` (which takes ``:after`` and ``:size``), CHUNK_ROWS at a time in id order."""
    after = 0
    while True:
        rows = bind.execute(sa.text(select_sql), {"after": after, "size": CHUNK_ROWS}).mappings().all()
        if not rows:
            return
        yield rows
        after = rows[-1]["id"]


def _convert_sqlite(bind, total: int, convert: Callable[[Any], Any], *, packed: bool) -> None:
    result_type = sa.LargeBinary() if packed else sa.JSON()
    op.create_table(
        NEW_TABLE,
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("visit_id", sa.Integer(), nullable=False),
        sa.Column("criteria_id", sa.String(length=40), nullable=False),
        sa.Column("criteria_version", sa.String(length=20), nullable=False),
        sa.Column("limit_set_id", sa.Integer(), nullable=True),
        sa.Column("limit_set_version", sa.Integer(), nullable=True),
        sa.Column(
            "input_sha256",
            sa.String(length=64),
            nullable=False,
            comment="fingerprint of the inputs evaluated",
        ),
        sa.Column("outcome", sa.String(length=32), nullable=False),
        sa.Column("result", result_type, nullable=False, comment=PACKED_COMMENT if packed else TEXT_COMMENT),
        sa.Column("computed_at", sa.DateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(
            ["limit_set_id"],
            ["limit_sets.id"],
            name=op.f("fk_evaluations_limit_set_id_limit_sets"),
            ondelete="SET NULL",
        ),
        sa.ForeignKeyConstraint(
            ["visit_id"], ["visits.id"], name=op.f("fk_evaluations_visit_id_visits"), ondelete="CASCADE"
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_evaluations")),
        sa.UniqueConstraint(
            "visit_id",
            "criteria_id",
            "limit_set_id",
            name=op.f("uq_evaluations_visit_id_criteria_id_limit_set_id"),
        ),
    )
    names = ", ".join(COLUMNS)
    insert = sa.text(f"INSERT INTO {NEW_TABLE} ({names}) VALUES ({', '.join(':' + c for c in COLUMNS)})")
    report, done = _progress(), 0
    # Raw values copied as stored (text() applies no type), the trace alone converted.
    for rows in _chunks(bind, f"SELECT {names} FROM evaluations WHERE id > :after ORDER BY id LIMIT :size"):
        bind.execute(insert, [{**row, "result": convert(row["result"])} for row in rows])
        done += len(rows)
        report(done, total)
    copied = bind.scalar(sa.text(f"SELECT count(*) FROM {NEW_TABLE}"))
    if copied != total:
        raise RuntimeError(f"converted {copied} of {total} saved evaluations; nothing was changed")
    op.drop_table("evaluations")  # its index goes with it
    op.rename_table(NEW_TABLE, "evaluations")
    op.create_index(op.f("ix_evaluations_limit_set_id"), "evaluations", ["limit_set_id"], unique=False)


def _convert_postgresql(bind, total: int, convert: Callable[[Any], Any], *, packed: bool) -> None:
    op.add_column("evaluations", sa.Column(NEW_COLUMN, sa.LargeBinary() if packed else sa.JSON()))
    # bytea reads as bytes; json as its text (result::text keeps the stored text as it was written).
    read = "result" if not packed else "result::text AS result"
    values = "CAST(:values AS bytea[])" if packed else "CAST(:values AS text[])"
    assign = "v.value" if packed else "CAST(v.value AS json)"
    update = sa.text(
        f"UPDATE evaluations AS e SET {NEW_COLUMN} = {assign} "
        f"FROM unnest(CAST(:ids AS integer[]), {values}) AS v(id, value) WHERE e.id = v.id"
    )
    report, done = _progress(), 0
    for rows in _chunks(
        bind, f"SELECT id, {read} FROM evaluations WHERE id > :after ORDER BY id LIMIT :size"
    ):
        bind.execute(
            update, {"ids": [row["id"] for row in rows], "values": [convert(row["result"]) for row in rows]}
        )
        done += len(rows)
        report(done, total)
    missing = bind.scalar(sa.text(f"SELECT count(*) FROM evaluations WHERE {NEW_COLUMN} IS NULL"))
    if missing:
        raise RuntimeError(f"{missing} saved evaluations were not converted; nothing was changed")
    op.drop_column("evaluations", "result")
    op.alter_column(
        "evaluations",
        NEW_COLUMN,
        new_column_name="result",
        nullable=False,
        comment=PACKED_COMMENT if packed else TEXT_COMMENT,
    )
