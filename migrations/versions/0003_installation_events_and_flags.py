"""installation events and flags

Revision ID: 0003
Revises: 0002
Create Date: 2026-12-01 23:18:42.786292

New tables only: installation events of a unit (installed at a location / removed, when, who)
and flags (kind, severity, one-line message, JSON evidence, open/closed, acknowledgement). A
flag's unique ``key`` names its condition so that recomputation keeps the row and its
acknowledgement. Existing rows are untouched; flags appear at the next recomputation (after a
calibration or an installation event).
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0003"
down_revision: str | None = "0002"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table(
        "flag",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("unit_id", sa.Integer(), nullable=False),
        sa.Column(
            "kind",
            sa.Enum(
                "drift",
                "out_of_tolerance_in_service",
                "fleet_outlier",
                "failed_acceptance",
                "overdue",
                name="flagkind",
                native_enum=False,
                length=32,
            ),
            nullable=False,
        ),
        sa.Column(
            "severity",
            sa.Enum("warning", "action", name="severity", native_enum=False, length=16),
            nullable=False,
        ),
        sa.Column("key", sa.String(length=128), nullable=False),
        sa.Column("message", sa.Text(), nullable=False),
        sa.Column("evidence", sa.JSON(), nullable=False),
        sa.Column("raised_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("open", sa.Boolean(), nullable=False),
        sa.Column("closed_at", sa.DateTime(timezone=True), nullable=True),
        sa.Column("acknowledged_by", sa.String(length=64), nullable=True),
        sa.Column("acknowledged_at", sa.DateTime(timezone=True), nullable=True),
        sa.Column("acknowledged_note", sa.Text(), nullable=True),
        sa.ForeignKeyConstraint(["unit_id"], ["unit.id"], name=op.f("fk_flag_unit_id_unit")),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_flag")),
        sa.UniqueConstraint("key", name=op.f("uq_flag_key")),
    )
    with op.batch_alter_table("flag", schema=None) as batch_op:
        batch_op.create_index(batch_op.f("ix_flag_kind"), ["kind"], unique=False)
        batch_op.create_index(batch_op.f("ix_flag_open"), ["open"], unique=False)
        batch_op.create_index(batch_op.f("ix_flag_unit_id"), ["unit_id"], unique=False)

    op.create_table(
        "installation_event",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("unit_id", sa.Integer(), nullable=False),
        sa.Column(
            "kind",
            sa.Enum("installed", "removed", name="eventkind", native_enum=False, length=16),
            nullable=False,
        ),
        sa.Column("location", sa.String(length=128), nullable=True),
        sa.Column("at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("recorded_by", sa.String(length=64), nullable=True),
        sa.Column("note", sa.Text(), nullable=True),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(
            ["unit_id"], ["unit.id"], name=op.f("fk_installation_event_unit_id_unit")
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_installation_event")),
    )
    with op.batch_alter_table("installation_event", schema=None) as batch_op:
        batch_op.create_index(
            batch_op.f("ix_installation_event_unit_id"), ["unit_id"], unique=False
        )


def downgrade() -> None:
    with op.batch_alter_table("installation_event", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_installation_event_unit_id"))

    op.drop_table("installation_event")
    with op.batch_alter_table("flag", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_flag_unit_id"))
        batch_op.drop_index(batch_op.f("ix_flag_open"))
        batch_op.drop_index(batch_op.f("ix_flag_kind"))

    op.drop_table("flag")
