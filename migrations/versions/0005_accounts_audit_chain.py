"""Accounts and a tamper-evident audit trail: password hashes and sign-in lock-out on users; a hash chain
over audit_events (existing rows are sealed in id order) and triggers that refuse UPDATE and DELETE of a
sealed audit row on both backends.

Revision ID: 0005
Revises: 0004
Create Date: 2026-12-03
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0005"
down_revision = "0004"
branch_labels = None
depends_on = None

SQLITE_TRIGGERS = (
    """CREATE TRIGGER audit_events_append_only_update BEFORE UPDATE ON audit_events
       WHEN OLD.row_hash IS NOT NULL
       BEGIN SELECT RAISE(ABORT, 'audit events are append-only: a sealed row cannot be changed'); END""",
    """CREATE TRIGGER audit_events_append_only_delete BEFORE DELETE ON audit_events
       BEGIN SELECT RAISE(ABORT, 'audit events are append-only: a row cannot be deleted'); END""",
)
POSTGRESQL_TRIGGERS = (
    """CREATE FUNCTION audit_events_append_only() RETURNS trigger LANGUAGE plpgsql AS $$
       BEGIN
         IF TG_OP = 'UPDATE' AND OLD.row_hash IS NULL THEN
           RETURN NEW;
         END IF;
         RAISE EXCEPTION 'audit events are append-only: % refused', TG_OP;
       END $$""",
    """CREATE TRIGGER audit_events_append_only BEFORE UPDATE OR DELETE ON audit_events
       FOR EACH ROW EXECUTE FUNCTION audit_events_append_only()""",
    """CREATE TRIGGER audit_events_no_truncate BEFORE TRUNCATE ON audit_events
       FOR EACH STATEMENT EXECUTE FUNCTION audit_events_append_only()""",
)


def upgrade() -> None:
    with op.batch_alter_table("users", schema=None) as batch_op:
        batch_op.add_column(
            sa.Column(
                "password_hash",
                sa.String(length=255),
                nullable=True,
                comment="argon2id, PHC string; never logged",
            )
        )
        batch_op.add_column(sa.Column("password_changed_at", sa.DateTime(timezone=True), nullable=True))
        batch_op.add_column(
            sa.Column(
                "failed_sign_ins",
                sa.Integer(),
                server_default="0",
                nullable=False,
                comment="consecutive failures",
            )
        )
        batch_op.add_column(sa.Column("locked_until", sa.DateTime(timezone=True), nullable=True))
        batch_op.create_check_constraint("failed_sign_ins_not_negative", "failed_sign_ins >= 0")
    with op.batch_alter_table("audit_events", schema=None) as batch_op:
        batch_op.add_column(sa.Column("prev_hash", sa.String(length=64), nullable=True))
        batch_op.add_column(sa.Column("row_hash", sa.String(length=64), nullable=True))
    _seal_existing_rows()
    triggers = SQLITE_TRIGGERS if op.get_bind().dialect.name == "sqlite" else POSTGRESQL_TRIGGERS
    for statement in triggers:
        op.execute(statement)


def _seal_existing_rows() -> None:
    from tracker.services.access.audit import FIELDS, GENESIS, row_digest

    bind = op.get_bind()
    table = sa.table("audit_events", *(sa.column(name) for name in FIELDS + ("prev_hash", "row_hash")))
    rows = bind.execute(sa.select(*(table.c[name] for name in FIELDS)).order_by(table.c.id)).mappings().all()
    prev = GENESIS
    for row in rows:
        digest = row_digest(prev, dict(row))
        bind.execute(sa.update(table).where(table.c.id == row["id"]).values(prev_hash=prev, row_hash=digest))
        prev = digest


def downgrade() -> None:
    if op.get_bind().dialect.name == "sqlite":
        op.execute("DROP TRIGGER IF EXISTS audit_events_append_only_update")
        op.execute("DROP TRIGGER IF EXISTS audit_events_append_only_delete")
    else:
        op.execute("DROP TRIGGER IF EXISTS audit_events_no_truncate ON audit_events")
        op.execute("DROP TRIGGER IF EXISTS audit_events_append_only ON audit_events")
        op.execute("DROP FUNCTION IF EXISTS audit_events_append_only()")
    with op.batch_alter_table("audit_events", schema=None) as batch_op:
        batch_op.drop_column("row_hash")
        batch_op.drop_column("prev_hash")
    with op.batch_alter_table("users", schema=None) as batch_op:
        batch_op.drop_constraint("failed_sign_ins_not_negative", type_="check")
        batch_op.drop_column("locked_until")
        batch_op.drop_column("failed_sign_ins")
        batch_op.drop_column("password_changed_at")
        batch_op.drop_column("password_hash")
