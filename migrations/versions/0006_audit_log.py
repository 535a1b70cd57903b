"""audit log, who voided a session

Revision ID: 0006
Revises: 0005
Create Date: 2026-12-02 00:45:35.028589

A new table, the audit log: who did what to which unit, type, calibration or flag, when, with the
numbers; rows are only ever added, and changes made before this revision are not in it. A new
nullable column ``calibration_session.voided_by``; existing rows get NULL.
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0006"
down_revision: str | None = "0005"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    with op.batch_alter_table("calibration_session") as batch:
        batch.add_column(sa.Column("voided_by", sa.String(length=64), nullable=True))
    op.create_table(
        "audit_entry",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("actor", sa.String(length=64), nullable=True),
        sa.Column("action", sa.String(length=48), nullable=False),
        sa.Column("subject_kind", sa.String(length=32), nullable=False),
        sa.Column("subject", sa.String(length=128), nullable=False),
        sa.Column("summary", sa.String(length=500), nullable=False),
        sa.Column("detail", sa.JSON(), nullable=False),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_audit_entry")),
    )
    with op.batch_alter_table("audit_entry", schema=None) as batch_op:
        batch_op.create_index(batch_op.f("ix_audit_entry_action"), ["action"], unique=False)
        batch_op.create_index(batch_op.f("ix_audit_entry_at"), ["at"], unique=False)
        batch_op.create_index(batch_op.f("ix_audit_entry_subject"), ["subject"], unique=False)


def downgrade() -> None:
    with op.batch_alter_table("calibration_session") as batch:
        batch.drop_column("voided_by")
    with op.batch_alter_table("audit_entry", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_audit_entry_subject"))
        batch_op.drop_index(batch_op.f("ix_audit_entry_at"))
        batch_op.drop_index(batch_op.f("ix_audit_entry_action"))

    op.drop_table("audit_entry")
