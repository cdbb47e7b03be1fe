"""Saved treatment-response classifications: per regimen, rule set and version, the day judged, the
classification, the visits compared and the evidence, so that what a clinician was shown can be read back.

Revision ID: 0004
Revises: 0003
Create Date: 2026-12-02
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0004"
down_revision = "0003"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "response_assessments",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("patient_id", sa.Integer(), nullable=False),
        sa.Column("therapy", sa.String(length=40), nullable=False),
        sa.Column(
            "regimen_start",
            sa.Date(),
            nullable=False,
            comment="first day of the regimen (of its induction when there is one)",
        ),
        sa.Column(
            "regimen",
            sa.String(length=200),
            nullable=False,
            comment="the regimen in words: therapy, dose, interval",
        ),
        sa.Column("rule_set", sa.String(length=64), nullable=False),
        sa.Column("rule_set_version", sa.String(length=20), nullable=False),
        sa.Column(
            "judged_on",
            sa.Date(),
            nullable=False,
            comment="the day the classification describes (scores after it unseen)",
        ),
        sa.Column("classification", sa.String(length=20), nullable=False),
        sa.Column("visits_compared", sa.JSON(), nullable=False, comment="ISO dates of the scores compared"),
        sa.Column(
            "evidence", sa.JSON(), nullable=False, comment="evidence, missing data, notes and settings"
        ),
        sa.Column("computed_at", sa.DateTime(timezone=True), nullable=False),
        sa.CheckConstraint(
            "classification IN ('improved', 'stable', 'worsened', 'not_assessable')",
            name=op.f("ck_response_assessments_classification_known"),
        ),
        sa.ForeignKeyConstraint(
            ["patient_id"],
            ["patients.id"],
            name=op.f("fk_response_assessments_patient_id_patients"),
            ondelete="CASCADE",
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_response_assessments")),
        sa.UniqueConstraint(
            "patient_id",
            "therapy",
            "regimen_start",
            "rule_set",
            "rule_set_version",
            "judged_on",
            name=op.f("uq_response_assessments_one_per_day"),
        ),
    )
    with op.batch_alter_table("response_assessments", schema=None) as batch_op:
        batch_op.create_index(batch_op.f("ix_response_assessments_patient_id"), ["patient_id"], unique=False)


def downgrade() -> None:
    with op.batch_alter_table("response_assessments", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_response_assessments_patient_id"))
    op.drop_table("response_assessments")
