"""Normal-limit sets and their rows, saved criteria evaluations, and a per-visit content fingerprint
(which makes re-importing the same file a no-op).

The visits change recreates the table on SQLite (batch mode, because of the new CHECK constraint): this is
the operation that would cascade-delete nerve tests if foreign keys were ON during migrations.

Revision ID: 0002
Revises: 0001
Create Date: 2026-12-01
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0002"
down_revision = "0001"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "limit_sets",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("name", sa.String(length=80), nullable=False),
        sa.Column("version", sa.Integer(), server_default="1", nullable=False),
        sa.Column("description", sa.Text(), nullable=True),
        sa.Column("is_default", sa.Boolean(), server_default="0", nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_limit_sets")),
        sa.UniqueConstraint("name", "version", name=op.f("uq_limit_sets_name_version")),
    )
    op.create_table(
        "limit_rows",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("limit_set_id", sa.Integer(), nullable=False),
        sa.Column("nerve", sa.String(length=40), nullable=False),
        sa.Column("modality", sa.String(length=7), nullable=False),
        sa.Column(
            "parameter",
            sa.String(length=24),
            nullable=False,
            comment="distal_latency_ms, cv_ms (m/s), amplitude…",
        ),
        sa.Column("bound", sa.String(length=3), nullable=False, comment="uln / lln"),
        sa.Column("value", sa.Float(), nullable=False, comment="the limit, in the parameter's unit"),
        sa.Column("age_min", sa.Float(), nullable=True, comment="years, inclusive"),
        sa.Column("age_max", sa.Float(), nullable=True, comment="years, exclusive"),
        sa.Column("height_min_cm", sa.Float(), nullable=True),
        sa.Column("height_max_cm", sa.Float(), nullable=True),
        sa.Column("sex", sa.String(length=16), nullable=True),
        sa.Column("source", sa.Text(), nullable=True, comment="citation, and whether verified"),
        sa.CheckConstraint("bound IN ('uln', 'lln')", name=op.f("ck_limit_rows_bound")),
        sa.CheckConstraint("modality IN ('motor', 'sensory')", name=op.f("ck_limit_rows_modality")),
        sa.CheckConstraint(
            "parameter IN ('distal_latency_ms', 'cv_ms', 'amplitude', 'f_latency_ms', 'distal_duration_ms', "
            "'peak_latency_ms')",
            name=op.f("ck_limit_rows_parameter"),
        ),
        sa.CheckConstraint(
            "sex IS NULL OR sex IN ('female', 'male', 'unspecified')", name=op.f("ck_limit_rows_sex")
        ),
        sa.CheckConstraint("value > 0", name=op.f("ck_limit_rows_value_positive")),
        sa.ForeignKeyConstraint(
            ["limit_set_id"],
            ["limit_sets.id"],
            name=op.f("fk_limit_rows_limit_set_id_limit_sets"),
            ondelete="CASCADE",
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_limit_rows")),
    )
    with op.batch_alter_table("limit_rows", schema=None) as batch_op:
        batch_op.create_index(batch_op.f("ix_limit_rows_limit_set_id"), ["limit_set_id"], unique=False)

    op.create_table(
        "evaluations",
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
        sa.Column("result", sa.JSON(), nullable=False, comment="the full trace"),
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
    with op.batch_alter_table("evaluations", schema=None) as batch_op:
        batch_op.create_index(batch_op.f("ix_evaluations_limit_set_id"), ["limit_set_id"], unique=False)

    with op.batch_alter_table("visits", schema=None) as batch_op:
        batch_op.add_column(
            sa.Column(
                "content_sha256",
                sa.String(length=64),
                server_default="",
                nullable=False,
                comment="fingerprint of the measured content, for idempotent import",
            )
        )
        batch_op.create_check_constraint("content_sha256_length", "length(content_sha256) IN (0, 64)")


def downgrade() -> None:
    with op.batch_alter_table("visits", schema=None) as batch_op:
        batch_op.drop_constraint(batch_op.f("ck_visits_content_sha256_length"), type_="check")
        batch_op.drop_column("content_sha256")

    with op.batch_alter_table("evaluations", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_evaluations_limit_set_id"))

    op.drop_table("evaluations")
    with op.batch_alter_table("limit_rows", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_limit_rows_limit_set_id"))

    op.drop_table("limit_rows")
    op.drop_table("limit_sets")
