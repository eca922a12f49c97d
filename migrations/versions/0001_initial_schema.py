"""Initial schema: benches, devices, plans, runs and their instruments, offsets, points,
results and events (see tonebench/store/models.py for what each column means).

Revision ID: 0001
Revises: none
Create Date: 2026-12-01
"""

from alembic import op
import sqlalchemy as sa

revision = "0001"
down_revision = None
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "benches",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("name", sa.String(length=200), nullable=False),
        sa.Column("description", sa.Text(), nullable=True),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_benches")),
        sa.UniqueConstraint("name", name=op.f("uq_benches_name")),
    )
    op.create_table(
        "devices",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("part_number", sa.String(length=200), nullable=False),
        sa.Column("serial", sa.String(length=200), nullable=False),
        sa.Column("lot", sa.String(length=200), nullable=True),
        sa.Column("wafer", sa.String(length=200), nullable=True),
        sa.Column("position", sa.String(length=200), nullable=True),
        sa.Column("tags", sa.JSON(), nullable=False),
        sa.Column("notes", sa.Text(), nullable=True),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_devices")),
        sa.UniqueConstraint("part_number", "serial", name=op.f("uq_devices_part_number_serial")),
    )
    op.create_table(
        "plans",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("name", sa.String(length=200), nullable=False),
        sa.Column("text", sa.Text(), nullable=False),
        sa.Column("sha256", sa.String(length=64), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_plans")),
        sa.UniqueConstraint("sha256", name=op.f("uq_plans_sha256")),
    )
    op.create_table(
        "runs",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("guid", sa.String(length=36), nullable=False),
        sa.Column("bench_id", sa.Integer(), nullable=False),
        sa.Column("device_id", sa.Integer(), nullable=True),
        sa.Column("plan_id", sa.Integer(), nullable=False),
        sa.Column("status", sa.String(length=16), nullable=False),
        sa.Column("end_reason", sa.Text(), nullable=True),
        sa.Column("started_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("ended_at", sa.DateTime(timezone=True), nullable=True),
        sa.Column("simulated", sa.Boolean(), nullable=False),
        sa.Column("host", sa.String(length=255), nullable=False),
        sa.Column("software_version", sa.String(length=64), nullable=False),
        sa.Column("metadata_json", sa.JSON(), nullable=False),
        sa.CheckConstraint(
            "status IN ('running', 'paused', 'complete', 'aborted', 'failed')",
            name=op.f("ck_runs_status"),
        ),
        sa.ForeignKeyConstraint(
            ["bench_id"],
            ["benches.id"],
            name=op.f("fk_runs_bench_id_benches"),
        ),
        sa.ForeignKeyConstraint(
            ["device_id"],
            ["devices.id"],
            name=op.f("fk_runs_device_id_devices"),
        ),
        sa.ForeignKeyConstraint(["plan_id"], ["plans.id"], name=op.f("fk_runs_plan_id_plans")),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_runs")),
        sa.UniqueConstraint("guid", name=op.f("uq_runs_guid")),
    )
    op.create_table(
        "events",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("run_id", sa.Integer(), nullable=True),
        sa.Column("at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("level", sa.String(length=16), nullable=False),
        sa.Column("kind", sa.String(length=64), nullable=False),
        sa.Column("message", sa.Text(), nullable=False),
        sa.Column("details_json", sa.JSON(), nullable=False),
        sa.CheckConstraint("level IN ('info', 'warning', 'error')", name=op.f("ck_events_level")),
        sa.ForeignKeyConstraint(
            ["run_id"],
            ["runs.id"],
            name=op.f("fk_events_run_id_runs"),
            ondelete="CASCADE",
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_events")),
    )
    op.create_index(op.f("ix_events_run_id"), "events", ["run_id"], unique=False)

    op.create_table(
        "instruments",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("run_id", sa.Integer(), nullable=False),
        sa.Column("role", sa.String(length=32), nullable=False),
        sa.Column("resource", sa.String(length=255), nullable=False),
        sa.Column("dialect", sa.String(length=100), nullable=False),
        sa.Column("idn", sa.Text(), nullable=False),
        sa.ForeignKeyConstraint(
            ["run_id"],
            ["runs.id"],
            name=op.f("fk_instruments_run_id_runs"),
            ondelete="CASCADE",
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_instruments")),
        sa.UniqueConstraint("run_id", "role", name=op.f("uq_instruments_run_id_role")),
    )
    op.create_table(
        "offsets",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("run_id", sa.Integer(), nullable=False),
        sa.Column("path", sa.String(length=8), nullable=False),
        sa.Column("freq_hz", sa.Double(), nullable=False),
        sa.Column("loss_db", sa.Double(), nullable=False),
        sa.Column("origin", sa.Text(), nullable=False),
        sa.CheckConstraint("path IN ('in1', 'in2', 'out')", name=op.f("ck_offsets_path")),
        sa.ForeignKeyConstraint(
            ["run_id"],
            ["runs.id"],
            name=op.f("fk_offsets_run_id_runs"),
            ondelete="CASCADE",
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_offsets")),
    )
    op.create_index(
        "ix_offsets_run_path_freq", "offsets", ["run_id", "path", "freq_hz"], unique=False
    )

    op.create_table(
        "points",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("run_id", sa.Integer(), nullable=False),
        sa.Column("point_key", sa.String(length=200), nullable=False),
        sa.Column("seq", sa.Integer(), nullable=False),
        sa.Column("status", sa.String(length=16), nullable=False),
        sa.Column("fail_reason", sa.Text(), nullable=True),
        sa.Column("measured_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("bench_clock_s", sa.Double(), nullable=False),
        sa.Column("center_hz", sa.Double(), nullable=False),
        sa.Column("spacing_hz", sa.Double(), nullable=False),
        sa.Column("f1_hz", sa.Double(), nullable=False),
        sa.Column("f2_hz", sa.Double(), nullable=False),
        sa.Column("tone_dbm", sa.Double(), nullable=False),
        sa.Column("bias_v", sa.Double(), nullable=True),
        sa.Column("source1_dbm", sa.Double(), nullable=True),
        sa.Column("source2_dbm", sa.Double(), nullable=True),
        sa.Column("in1_loss_db", sa.Double(), nullable=True),
        sa.Column("in2_loss_db", sa.Double(), nullable=True),
        sa.Column("out_loss_f1_db", sa.Double(), nullable=True),
        sa.Column("out_loss_f2_db", sa.Double(), nullable=True),
        sa.Column("out_loss_lower_db", sa.Double(), nullable=True),
        sa.Column("out_loss_upper_db", sa.Double(), nullable=True),
        sa.Column("raw_f1_dbm", sa.Double(), nullable=True),
        sa.Column("raw_f2_dbm", sa.Double(), nullable=True),
        sa.Column("raw_lower_dbm", sa.Double(), nullable=True),
        sa.Column("raw_upper_dbm", sa.Double(), nullable=True),
        sa.Column("raw_noise_lower_dbm", sa.Double(), nullable=True),
        sa.Column("raw_noise_upper_dbm", sa.Double(), nullable=True),
        sa.Column("span_hz", sa.Double(), nullable=True),
        sa.Column("rbw_hz", sa.Double(), nullable=True),
        sa.Column("vbw_hz", sa.Double(), nullable=True),
        sa.Column("atten_db", sa.Double(), nullable=True),
        sa.Column("ref_level_dbm", sa.Double(), nullable=True),
        sa.Column("overload", sa.Boolean(), nullable=True),
        sa.Column("sweep_time_s", sa.Double(), nullable=True),
        sa.Column("pin1_dbm", sa.Double(), nullable=True),
        sa.Column("pin2_dbm", sa.Double(), nullable=True),
        sa.Column("pout_f1_dbm", sa.Double(), nullable=True),
        sa.Column("pout_f2_dbm", sa.Double(), nullable=True),
        sa.Column("im3_lower_dbm", sa.Double(), nullable=True),
        sa.Column("im3_upper_dbm", sa.Double(), nullable=True),
        sa.Column("noise_lower_dbm", sa.Double(), nullable=True),
        sa.Column("noise_upper_dbm", sa.Double(), nullable=True),
        sa.Column("extra_json", sa.JSON(), nullable=True),
        sa.CheckConstraint("status IN ('measured', 'failed')", name=op.f("ck_points_status")),
        sa.ForeignKeyConstraint(
            ["run_id"],
            ["runs.id"],
            name=op.f("fk_points_run_id_runs"),
            ondelete="CASCADE",
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_points")),
        sa.UniqueConstraint("run_id", "point_key", name=op.f("uq_points_run_id_point_key")),
    )
    op.create_index(
        "ix_points_run_center_spacing",
        "points",
        ["run_id", "center_hz", "spacing_hz"],
        unique=False,
    )

    op.create_table(
        "results",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("run_id", sa.Integer(), nullable=False),
        sa.Column("group_key", sa.String(length=200), nullable=False),
        sa.Column("center_hz", sa.Double(), nullable=False),
        sa.Column("spacing_hz", sa.Double(), nullable=False),
        sa.Column("bias_v", sa.Double(), nullable=True),
        sa.Column("n_points", sa.Integer(), nullable=False),
        sa.Column("n_valid", sa.Integer(), nullable=False),
        sa.Column("gain_db", sa.Double(), nullable=True),
        sa.Column("iip3_lower_dbm", sa.Double(), nullable=True),
        sa.Column("iip3_upper_dbm", sa.Double(), nullable=True),
        sa.Column("iip3_dbm", sa.Double(), nullable=True),
        sa.Column("oip3_lower_dbm", sa.Double(), nullable=True),
        sa.Column("oip3_upper_dbm", sa.Double(), nullable=True),
        sa.Column("oip3_dbm", sa.Double(), nullable=True),
        sa.Column("slope_fundamental", sa.Double(), nullable=True),
        sa.Column("slope_im3_lower", sa.Double(), nullable=True),
        sa.Column("slope_im3_upper", sa.Double(), nullable=True),
        sa.Column("p1db_in_dbm", sa.Double(), nullable=True),
        sa.Column("p1db_out_dbm", sa.Double(), nullable=True),
        sa.Column("reason", sa.Text(), nullable=True),
        sa.Column("valid_tone_min_dbm", sa.Double(), nullable=True),
        sa.Column("valid_tone_max_dbm", sa.Double(), nullable=True),
        sa.Column("details_json", sa.JSON(), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(
            ["run_id"],
            ["runs.id"],
            name=op.f("fk_results_run_id_runs"),
            ondelete="CASCADE",
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_results")),
        sa.UniqueConstraint("run_id", "group_key", name=op.f("uq_results_run_id_group_key")),
    )


def downgrade() -> None:
    op.drop_table("results")
    op.drop_index("ix_points_run_center_spacing", table_name="points")
    op.drop_table("points")
    op.drop_index("ix_offsets_run_path_freq", table_name="offsets")
    op.drop_table("offsets")
    op.drop_table("instruments")
    op.drop_index(op.f("ix_events_run_id"), table_name="events")
    op.drop_table("events")
    op.drop_table("runs")
    op.drop_table("plans")
    op.drop_table("devices")
    op.drop_table("benches")
