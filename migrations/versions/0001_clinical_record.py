"""Clinical record: patients and identities, visits and their history, nerve tests, stimulation sites,
treatments, outcome scores, users and the audit trail.

Revision ID: 0001
Revises:
Create Date: 2026-12-01
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0001"
down_revision = None
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "audit_events",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("occurred_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("username", sa.String(length=64), nullable=False),
        sa.Column(
            "action",
            sa.String(length=40),
            nullable=False,
            comment="e.g. import, replace_visit, add_treatment",
        ),
        sa.Column("entity", sa.String(length=40), nullable=False, comment="table or kind of thing written"),
        sa.Column(
            "entity_key",
            sa.String(length=200),
            nullable=True,
            comment="pseudonymous key, never an identifier",
        ),
        sa.Column("before", sa.JSON(), nullable=True),
        sa.Column("after", sa.JSON(), nullable=True),
        sa.Column("detail", sa.Text(), nullable=True),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_audit_events")),
    )
    with op.batch_alter_table("audit_events", schema=None) as batch_op:
        batch_op.create_index(batch_op.f("ix_audit_events_occurred_at"), ["occurred_at"], unique=False)

    op.create_table(
        "patients",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("code", sa.String(length=40), nullable=False, comment="pseudonymous patient code"),
        sa.Column("sex", sa.String(length=16), nullable=True, comment="female / male / unspecified"),
        sa.Column("birth_year", sa.Integer(), nullable=True, comment="year of birth (no full date here)"),
        sa.Column(
            "diagnosis",
            sa.String(length=16),
            nullable=True,
            comment="current diagnosis: cidp, mmn, gbs, other",
        ),
        sa.Column("phenotype", sa.String(length=16), nullable=True, comment="current CIDP phenotype"),
        sa.Column("onset_date", sa.Date(), nullable=True, comment="symptom onset date"),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.CheckConstraint("sex IN ('female', 'male', 'unspecified')", name=op.f("ck_patients_sex")),
        sa.CheckConstraint("birth_year BETWEEN 1900 AND 2100", name=op.f("ck_patients_birth_year_range")),
        sa.CheckConstraint("length(code) BETWEEN 1 AND 40", name=op.f("ck_patients_code_length")),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_patients")),
        sa.UniqueConstraint("code", name=op.f("uq_patients_code")),
    )
    op.create_table(
        "users",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("username", sa.String(length=64), nullable=False),
        sa.Column("display_name", sa.String(length=200), nullable=True),
        sa.Column("role", sa.String(length=16), server_default="viewer", nullable=False),
        sa.Column("active", sa.Boolean(), server_default="1", nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.CheckConstraint(
            "role IN ('viewer', 'clinician', 'coordinator', 'admin')", name=op.f("ck_users_role")
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_users")),
        sa.UniqueConstraint("username", name=op.f("uq_users_username")),
    )
    op.create_table(
        "outcome_scores",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("patient_id", sa.Integer(), nullable=False),
        sa.Column("score_date", sa.Date(), nullable=False),
        sa.Column("scale", sa.String(length=40), nullable=False),
        sa.Column("value", sa.Float(), nullable=False, comment="in the scale's own unit"),
        sa.CheckConstraint("value >= 0 AND value <= 1000", name=op.f("ck_outcome_scores_value_range")),
        sa.ForeignKeyConstraint(
            ["patient_id"],
            ["patients.id"],
            name=op.f("fk_outcome_scores_patient_id_patients"),
            ondelete="CASCADE",
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_outcome_scores")),
        sa.UniqueConstraint(
            "patient_id", "score_date", "scale", name=op.f("uq_outcome_scores_patient_id_score_date_scale")
        ),
    )
    op.create_table(
        "patient_identities",
        sa.Column("patient_id", sa.Integer(), nullable=False),
        sa.Column("record_number", sa.String(length=64), nullable=True, comment="hospital record number"),
        sa.Column("full_name", sa.String(length=200), nullable=True),
        sa.Column("birth_date", sa.Date(), nullable=True),
        sa.ForeignKeyConstraint(
            ["patient_id"],
            ["patients.id"],
            name=op.f("fk_patient_identities_patient_id_patients"),
            ondelete="CASCADE",
        ),
        sa.PrimaryKeyConstraint("patient_id", name=op.f("pk_patient_identities")),
    )
    op.create_table(
        "treatments",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("patient_id", sa.Integer(), nullable=False),
        sa.Column(
            "therapy",
            sa.String(length=40),
            nullable=False,
            comment="ivig, scig, corticosteroid, plasma_exchange…",
        ),
        sa.Column("start_date", sa.Date(), nullable=False),
        sa.Column("end_date", sa.Date(), nullable=True, comment="empty while ongoing"),
        sa.Column("dose", sa.Float(), nullable=True, comment="dose per administration, in dose_unit"),
        sa.Column("dose_unit", sa.String(length=20), nullable=True, comment="e.g. g/kg, mg"),
        sa.Column("interval_days", sa.Integer(), nullable=True, comment="days between administrations"),
        sa.Column("note", sa.Text(), nullable=True, comment="free text; never exported by default"),
        sa.CheckConstraint("dose > 0", name=op.f("ck_treatments_dose_positive")),
        sa.CheckConstraint(
            "end_date IS NULL OR end_date >= start_date", name=op.f("ck_treatments_end_after_start")
        ),
        sa.CheckConstraint(
            "interval_days > 0 AND interval_days <= 3660", name=op.f("ck_treatments_interval_range")
        ),
        sa.CheckConstraint("length(therapy) > 0", name=op.f("ck_treatments_therapy_not_empty")),
        sa.ForeignKeyConstraint(
            ["patient_id"],
            ["patients.id"],
            name=op.f("fk_treatments_patient_id_patients"),
            ondelete="CASCADE",
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_treatments")),
        sa.UniqueConstraint(
            "patient_id", "therapy", "start_date", name=op.f("uq_treatments_patient_id_therapy_start_date")
        ),
    )
    op.create_table(
        "visits",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("patient_id", sa.Integer(), nullable=False),
        sa.Column("visit_date", sa.Date(), nullable=False, comment="date of the study (ISO)"),
        sa.Column("height_cm", sa.Float(), nullable=True, comment="height in cm at the visit"),
        sa.Column("examiner", sa.String(length=100), nullable=True),
        sa.Column("laboratory", sa.String(length=100), nullable=True),
        sa.Column(
            "diagnosis", sa.String(length=16), nullable=True, comment="working diagnosis at this visit"
        ),
        sa.Column("phenotype", sa.String(length=16), nullable=True, comment="CIDP phenotype at this visit"),
        sa.Column(
            "status", sa.String(length=8), server_default="draft", nullable=False, comment="draft / final"
        ),
        sa.Column("version", sa.Integer(), server_default="1", nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("updated_at", sa.DateTime(timezone=True), nullable=True),
        sa.CheckConstraint("status IN ('draft', 'final')", name=op.f("ck_visits_status")),
        sa.CheckConstraint("height_cm > 40 AND height_cm < 260", name=op.f("ck_visits_height_range")),
        sa.CheckConstraint("version >= 1", name=op.f("ck_visits_version_positive")),
        sa.ForeignKeyConstraint(
            ["patient_id"], ["patients.id"], name=op.f("fk_visits_patient_id_patients"), ondelete="CASCADE"
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_visits")),
        sa.UniqueConstraint("patient_id", "visit_date", name=op.f("uq_visits_patient_id_visit_date")),
    )
    op.create_table(
        "nerve_tests",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("visit_id", sa.Integer(), nullable=False),
        sa.Column(
            "nerve",
            sa.String(length=40),
            nullable=False,
            comment="canonical nerve name (see reference/nerves.csv)",
        ),
        sa.Column("side", sa.String(length=5), nullable=False, comment="left / right"),
        sa.Column("modality", sa.String(length=7), nullable=False, comment="motor / sensory"),
        sa.Column(
            "recording_site", sa.String(length=60), nullable=True, comment="muscle or skin site recorded"
        ),
        sa.Column("temperature_c", sa.Float(), nullable=True, comment="limb surface temperature, °C"),
        sa.Column("lff_hz", sa.Float(), nullable=True, comment="low-frequency (high-pass) filter, Hz"),
        sa.Column("f_latency_ms", sa.Float(), nullable=True, comment="minimal F-wave latency, ms"),
        sa.Column(
            "f_absent", sa.Boolean(), server_default="0", nullable=False, comment="F-waves sought, none found"
        ),
        sa.Column("f_persistence_pct", sa.Float(), nullable=True, comment="F-wave persistence, %"),
        sa.Column(
            "wrist_entrapment",
            sa.Boolean(),
            nullable=True,
            comment="median only: clinician judges the distal latency explained by neuropathy at the wrist",
        ),
        sa.CheckConstraint(
            "modality = 'motor' OR (f_latency_ms IS NULL AND NOT f_absent)",
            name=op.f("ck_nerve_tests_f_wave_motor_only"),
        ),
        sa.CheckConstraint("modality IN ('motor', 'sensory')", name=op.f("ck_nerve_tests_modality")),
        sa.CheckConstraint("side IN ('left', 'right')", name=op.f("ck_nerve_tests_side")),
        sa.CheckConstraint(
            "NOT (f_absent AND f_latency_ms IS NOT NULL)", name=op.f("ck_nerve_tests_f_absent_has_no_latency")
        ),
        sa.CheckConstraint(
            "f_latency_ms > 0 AND f_latency_ms < 200", name=op.f("ck_nerve_tests_f_latency_range")
        ),
        sa.CheckConstraint(
            "f_persistence_pct BETWEEN 0 AND 100", name=op.f("ck_nerve_tests_f_persistence_range")
        ),
        sa.CheckConstraint("lff_hz > 0 AND lff_hz <= 1000", name=op.f("ck_nerve_tests_lff_range")),
        sa.CheckConstraint("temperature_c BETWEEN 10 AND 45", name=op.f("ck_nerve_tests_temperature_range")),
        sa.ForeignKeyConstraint(
            ["visit_id"], ["visits.id"], name=op.f("fk_nerve_tests_visit_id_visits"), ondelete="CASCADE"
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_nerve_tests")),
        sa.UniqueConstraint(
            "visit_id", "nerve", "side", "modality", name=op.f("uq_nerve_tests_visit_id_nerve_side_modality")
        ),
    )
    op.create_table(
        "visit_revisions",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("visit_id", sa.Integer(), nullable=False),
        sa.Column(
            "revision", sa.Integer(), nullable=False, comment="the visit version these values belonged to"
        ),
        sa.Column("status", sa.String(length=8), nullable=False, comment="draft / final at the time"),
        sa.Column("content_sha256", sa.String(length=64), nullable=False),
        sa.Column(
            "snapshot", sa.JSON(), nullable=False, comment="the visit, its nerve tests and sites as they were"
        ),
        sa.Column("replaced_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("replaced_by", sa.String(length=64), nullable=False),
        sa.Column("reason", sa.String(length=200), nullable=True),
        sa.ForeignKeyConstraint(
            ["visit_id"], ["visits.id"], name=op.f("fk_visit_revisions_visit_id_visits"), ondelete="CASCADE"
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_visit_revisions")),
        sa.UniqueConstraint("visit_id", "revision", name=op.f("uq_visit_revisions_visit_id_revision")),
    )
    op.create_table(
        "stimulation_sites",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("nerve_test_id", sa.Integer(), nullable=False),
        sa.Column("site_order", sa.Integer(), nullable=False, comment="1 = most distal, then proximally"),
        sa.Column(
            "label", sa.String(length=40), nullable=True, comment="site label (see reference/sites.csv)"
        ),
        sa.Column(
            "distance_mm",
            sa.Float(),
            nullable=False,
            comment="site 1: stimulation to active recording electrode; site n>1: from site n-1; mm",
        ),
        sa.Column("latency_ms", sa.Float(), nullable=True, comment="onset latency, ms"),
        sa.Column("peak_latency_ms", sa.Float(), nullable=True, comment="peak latency, ms"),
        sa.Column("amplitude_mv", sa.Float(), nullable=True, comment="motor negative-peak amplitude, mV"),
        sa.Column("amplitude_uv", sa.Float(), nullable=True, comment="sensory negative-peak amplitude, µV"),
        sa.Column("duration_ms", sa.Float(), nullable=True, comment="negative-peak duration, ms"),
        sa.Column("area_mvms", sa.Float(), nullable=True, comment="negative-peak area, mV·ms"),
        sa.CheckConstraint(
            "amplitude_mv >= 0 AND amplitude_mv <= 100", name=op.f("ck_stimulation_sites_amplitude_mv_range")
        ),
        sa.CheckConstraint(
            "amplitude_mv IS NULL OR amplitude_uv IS NULL",
            name=op.f("ck_stimulation_sites_one_amplitude_unit"),
        ),
        sa.CheckConstraint(
            "amplitude_uv >= 0 AND amplitude_uv <= 1000", name=op.f("ck_stimulation_sites_amplitude_uv_range")
        ),
        sa.CheckConstraint(
            "area_mvms >= 0 AND area_mvms <= 1000", name=op.f("ck_stimulation_sites_area_range")
        ),
        sa.CheckConstraint(
            "distance_mm > 0 AND distance_mm <= 2000", name=op.f("ck_stimulation_sites_distance_range")
        ),
        sa.CheckConstraint(
            "duration_ms > 0 AND duration_ms < 200", name=op.f("ck_stimulation_sites_duration_range")
        ),
        sa.CheckConstraint(
            "latency_ms > 0 AND latency_ms < 200", name=op.f("ck_stimulation_sites_latency_range")
        ),
        sa.CheckConstraint(
            "latency_ms IS NOT NULL OR COALESCE(amplitude_mv, amplitude_uv, -1) = 0",
            name=op.f("ck_stimulation_sites_latency_or_no_response"),
        ),
        sa.CheckConstraint(
            "peak_latency_ms > 0 AND peak_latency_ms < 200",
            name=op.f("ck_stimulation_sites_peak_latency_range"),
        ),
        sa.CheckConstraint(
            "site_order >= 1 AND site_order <= 20", name=op.f("ck_stimulation_sites_site_order_range")
        ),
        sa.ForeignKeyConstraint(
            ["nerve_test_id"],
            ["nerve_tests.id"],
            name=op.f("fk_stimulation_sites_nerve_test_id_nerve_tests"),
            ondelete="CASCADE",
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_stimulation_sites")),
        sa.UniqueConstraint(
            "nerve_test_id", "site_order", name=op.f("uq_stimulation_sites_nerve_test_id_site_order")
        ),
    )


def downgrade() -> None:
    op.drop_table("stimulation_sites")
    op.drop_table("visit_revisions")
    op.drop_table("nerve_tests")
    op.drop_table("visits")
    op.drop_table("treatments")
    op.drop_table("patient_identities")
    op.drop_table("outcome_scores")
    op.drop_table("users")
    op.drop_table("patients")
    with op.batch_alter_table("audit_events", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_audit_events_occurred_at"))

    op.drop_table("audit_events")
