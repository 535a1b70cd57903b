"""noise model and reading resolution per type; type B inputs per session; ranking, diagnostics

Revision ID: 0002
Revises: 0001
Create Date: 2026-12-01 22:13:39.021705

Existing rows migrate as they are: sensor types get noise_in = 'value' (how they were fitted until
now) and no reading resolution; sessions get reference_k = 2 and no type B inputs; stored fits
keep ranking and diagnostics NULL (they were fitted without a ranking; nothing is refitted).
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0002"
down_revision: str | None = "0001"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    with op.batch_alter_table("calibration_session", schema=None) as batch_op:
        batch_op.add_column(sa.Column("reference_expanded_u", sa.Float(), nullable=True))
        batch_op.add_column(
            sa.Column("reference_k", sa.Float(), server_default="2", nullable=False)
        )
        batch_op.add_column(sa.Column("extra_u", sa.Float(), nullable=True))
        batch_op.add_column(sa.Column("extra_label", sa.String(length=128), nullable=True))

    with op.batch_alter_table("fit", schema=None) as batch_op:
        batch_op.add_column(sa.Column("ranking", sa.JSON(), nullable=True))
        batch_op.add_column(sa.Column("diagnostics", sa.JSON(), nullable=True))

    with op.batch_alter_table("sensor_type", schema=None) as batch_op:
        batch_op.add_column(
            sa.Column(
                "noise_in",
                sa.Enum("value", "reading", name="noisein", native_enum=False, length=16),
                server_default="value",
                nullable=False,
            )
        )
        batch_op.add_column(sa.Column("reading_resolution", sa.Float(), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table("sensor_type", schema=None) as batch_op:
        batch_op.drop_column("reading_resolution")
        batch_op.drop_column("noise_in")

    with op.batch_alter_table("fit", schema=None) as batch_op:
        batch_op.drop_column("diagnostics")
        batch_op.drop_column("ranking")

    with op.batch_alter_table("calibration_session", schema=None) as batch_op:
        batch_op.drop_column("extra_label")
        batch_op.drop_column("extra_u")
        batch_op.drop_column("reference_k")
        batch_op.drop_column("reference_expanded_u")
