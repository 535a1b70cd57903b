"""fleet, calibrations, accounts

Revision ID: 0001
Revises:
Create Date: 2026-12-01 21:41:00.775253
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0001"
down_revision: str | None = None
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:

    op.create_table(
        "sensor_type",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("name", sa.String(length=64), nullable=False),
        sa.Column("quantity", sa.String(length=64), nullable=False),
        sa.Column("value_unit", sa.String(length=16), nullable=False),
        sa.Column("reading_unit", sa.String(length=16), nullable=False),
        sa.Column("reading_min", sa.Float(), nullable=False),
        sa.Column("reading_max", sa.Float(), nullable=False),
        sa.Column("families", sa.JSON(), nullable=False),
        sa.Column("family_options", sa.JSON(), nullable=False),
        sa.Column("tolerance_abs", sa.Float(), nullable=True),
        sa.Column("tolerance_rel", sa.Float(), nullable=True),
        sa.Column("drift_limit_abs", sa.Float(), nullable=True),
        sa.Column("interval_days", sa.Integer(), nullable=False),
        sa.Column("tur", sa.Float(), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_sensor_type")),
        sa.UniqueConstraint("name", name=op.f("uq_sensor_type_name")),
    )
    op.create_table(
        "user_account",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("name", sa.String(length=64), nullable=False),
        sa.Column(
            "role",
            sa.Enum("viewer", "technician", "admin", name="role", native_enum=False, length=16),
            nullable=False,
        ),
        sa.Column("password_hash", sa.String(length=256), nullable=True),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_user_account")),
        sa.UniqueConstraint("name", name=op.f("uq_user_account_name")),
    )
    op.create_table(
        "token",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("user_id", sa.Integer(), nullable=False),
        sa.Column("name", sa.String(length=64), nullable=False),
        sa.Column(
            "kind",
            sa.Enum("api", "browser", name="tokenkind", native_enum=False, length=16),
            nullable=False,
        ),
        sa.Column("token_hash", sa.String(length=64), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("expires_at", sa.DateTime(timezone=True), nullable=True),
        sa.Column("revoked_at", sa.DateTime(timezone=True), nullable=True),
        sa.ForeignKeyConstraint(
            ["user_id"], ["user_account.id"], name=op.f("fk_token_user_id_user_account")
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_token")),
        sa.UniqueConstraint("token_hash", name=op.f("uq_token_token_hash")),
    )
    with op.batch_alter_table("token", schema=None) as batch_op:
        batch_op.create_index(batch_op.f("ix_token_user_id"), ["user_id"], unique=False)

    op.create_table(
        "unit",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("serial", sa.String(length=64), nullable=False),
        sa.Column("sensor_type_id", sa.Integer(), nullable=False),
        sa.Column(
            "status",
            sa.Enum(
                "in_stock",
                "installed",
                "quarantined",
                "retired",
                name="unitstatus",
                native_enum=False,
                length=16,
            ),
            nullable=False,
        ),
        sa.Column("installed_in", sa.String(length=128), nullable=True),
        sa.Column("received_on", sa.Date(), nullable=True),
        sa.Column("notes", sa.Text(), nullable=True),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(
            ["sensor_type_id"], ["sensor_type.id"], name=op.f("fk_unit_sensor_type_id_sensor_type")
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_unit")),
        sa.UniqueConstraint("serial", name=op.f("uq_unit_serial")),
    )
    with op.batch_alter_table("unit", schema=None) as batch_op:
        batch_op.create_index(
            batch_op.f("ix_unit_sensor_type_id"), ["sensor_type_id"], unique=False
        )

    op.create_table(
        "calibration_session",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("unit_id", sa.Integer(), nullable=False),
        sa.Column("performed_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("operator", sa.String(length=64), nullable=False),
        sa.Column("reference", sa.String(length=128), nullable=False),
        sa.Column(
            "kind",
            sa.Enum(
                "incoming",
                "as_found",
                "as_left",
                "periodic",
                name="sessionkind",
                native_enum=False,
                length=16,
            ),
            nullable=False,
        ),
        sa.Column("ambient", sa.String(length=128), nullable=True),
        sa.Column("notes", sa.Text(), nullable=True),
        sa.Column("recorded_by", sa.String(length=64), nullable=True),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("voided_at", sa.DateTime(timezone=True), nullable=True),
        sa.Column("void_reason", sa.Text(), nullable=True),
        sa.ForeignKeyConstraint(
            ["unit_id"], ["unit.id"], name=op.f("fk_calibration_session_unit_id_unit")
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_calibration_session")),
    )
    with op.batch_alter_table("calibration_session", schema=None) as batch_op:
        batch_op.create_index(
            batch_op.f("ix_calibration_session_unit_id"), ["unit_id"], unique=False
        )

    op.create_table(
        "fit",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("session_id", sa.Integer(), nullable=False),
        sa.Column("family", sa.String(length=32), nullable=False),
        sa.Column("options", sa.JSON(), nullable=False),
        sa.Column("result", sa.JSON(), nullable=False),
        sa.Column("decision", sa.JSON(), nullable=False),
        sa.Column("passed", sa.Boolean(), nullable=False),
        sa.Column("is_current", sa.Boolean(), nullable=False),
        sa.Column("engine_version", sa.String(length=32), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(
            ["session_id"],
            ["calibration_session.id"],
            name=op.f("fk_fit_session_id_calibration_session"),
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_fit")),
    )
    with op.batch_alter_table("fit", schema=None) as batch_op:
        batch_op.create_index(batch_op.f("ix_fit_session_id"), ["session_id"], unique=False)

    op.create_table(
        "point",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("session_id", sa.Integer(), nullable=False),
        sa.Column("seq", sa.Integer(), nullable=False),
        sa.Column("reference_value", sa.Float(), nullable=False),
        sa.Column("reading", sa.Float(), nullable=False),
        sa.Column("repeat_index", sa.Integer(), nullable=False),
        sa.Column("excluded", sa.Boolean(), nullable=False),
        sa.Column("exclude_reason", sa.Text(), nullable=True),
        sa.ForeignKeyConstraint(
            ["session_id"],
            ["calibration_session.id"],
            name=op.f("fk_point_session_id_calibration_session"),
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_point")),
    )
    with op.batch_alter_table("point", schema=None) as batch_op:
        batch_op.create_index(batch_op.f("ix_point_session_id"), ["session_id"], unique=False)


def downgrade() -> None:

    with op.batch_alter_table("point", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_point_session_id"))

    op.drop_table("point")
    with op.batch_alter_table("fit", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_fit_session_id"))

    op.drop_table("fit")
    with op.batch_alter_table("calibration_session", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_calibration_session_unit_id"))

    op.drop_table("calibration_session")
    with op.batch_alter_table("unit", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_unit_sensor_type_id"))

    op.drop_table("unit")
    with op.batch_alter_table("token", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_token_user_id"))

    op.drop_table("token")
    op.drop_table("user_account")
    op.drop_table("sensor_type")
