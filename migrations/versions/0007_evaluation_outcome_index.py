"""A covering index for the patient list: ``evaluations (visit_id, criteria_id, limit_set_id, outcome)``.

The patient list counts every patient's latest outcome: per patient one look-up of the saved evaluation of
its latest visit by (visit, criteria set, limit set), to read ``outcome``. The unique index finds the row,
but the row itself has to be read for ``outcome``, and rows are large (about 1 kB with the compressed trace):
on 5,000 invented patients that read was most of the count's time on SQLite. With ``outcome`` in the index
the look-up stops at the index. The unique constraint stays (one saved evaluation per visit, criteria set
and limit set).

One definition for both backends (the model declares it so): ``outcome`` is a fourth key column rather
than a PostgreSQL ``INCLUDE`` column, so that SQLite (which has no INCLUDE) gets the same covering index.

Revision ID: 0007
Revises: 0006
Create Date: 2026-12-04
"""

from __future__ import annotations

from alembic import op

revision = "0007"
down_revision = "0006"
branch_labels = None
depends_on = None

INDEX = "ix_evaluations_visit_id_criteria_id_limit_set_id_outcome"


def upgrade() -> None:
    with op.batch_alter_table("evaluations", schema=None) as batch_op:
        batch_op.create_index(
            batch_op.f(INDEX), ["visit_id", "criteria_id", "limit_set_id", "outcome"], unique=False
        )


def downgrade() -> None:
    with op.batch_alter_table("evaluations", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f(INDEX))
