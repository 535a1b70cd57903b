"""accounts: disabled users, when a token was last used, sign-in throttling

Revision ID: 0010
Revises: 0007
Create Date: 2026-12-05 21:59:11.346390

Two new nullable columns: ``user_account.disabled_at`` (existing users stay enabled: NULL) and
``token.last_used_at`` (existing tokens: NULL, "not used since it was recorded"). A new table
``signin_throttle``: failed sign-ins in a row per user name and per address; it starts empty.
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0010"
down_revision: str | None = "0009"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table(
        "signin_throttle",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column(
            "kind",
            sa.Enum("user", "address", name="throttlekind", native_enum=False, length=16),
            nullable=False,
        ),
        sa.Column("key", sa.String(length=128), nullable=False),
        sa.Column("failures", sa.Integer(), nullable=False),
        sa.Column("last_failure_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("locked_until", sa.DateTime(timezone=True), nullable=True),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_signin_throttle")),
        sa.UniqueConstraint("kind", "key", name=op.f("uq_signin_throttle_kind")),
    )
    with op.batch_alter_table("signin_throttle", schema=None) as batch_op:
        batch_op.create_index(
            batch_op.f("ix_signin_throttle_last_failure_at"), ["last_failure_at"], unique=False
        )
    with op.batch_alter_table("token", schema=None) as batch_op:
        batch_op.add_column(sa.Column("last_used_at", sa.DateTime(timezone=True), nullable=True))
    with op.batch_alter_table("user_account", schema=None) as batch_op:
        batch_op.add_column(sa.Column("disabled_at", sa.DateTime(timezone=True), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table("user_account", schema=None) as batch_op:
        batch_op.drop_column("disabled_at")
    with op.batch_alter_table("token", schema=None) as batch_op:
        batch_op.drop_column("last_used_at")
    with op.batch_alter_table("signin_throttle", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_signin_throttle_last_failure_at"))
    op.drop_table("signin_throttle")
