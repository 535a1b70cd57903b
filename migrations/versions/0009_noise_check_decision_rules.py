"""noise-model check on fits; decision rule and guard band per sensor type

Revision ID: 0009
Revises: 0007
Create Date: 2026-12-05 22:30:00.000000

``fit.noise_check`` (JSON, nullable): which noise model the points support
(``shared.noise_check``); existing fits get NULL and show no check until refitted.
``sensor_type.decision_rule`` ("simple" or "guarded", ILAC-G8:2019) and
``sensor_type.guard_multiple`` (r of the guard band w = r U): existing types get "simple" and
1.0 through the server defaults, so their decisions keep their meaning.
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0009"
down_revision: str | None = "0008"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    with op.batch_alter_table("fit") as batch:
        batch.add_column(sa.Column("noise_check", sa.JSON(), nullable=True))
    with op.batch_alter_table("sensor_type") as batch:
        batch.add_column(
            sa.Column(
                "decision_rule", sa.String(length=16), server_default="simple", nullable=False
            )
        )
        batch.add_column(
            sa.Column("guard_multiple", sa.Float(), server_default="1.0", nullable=False)
        )


def downgrade() -> None:
    with op.batch_alter_table("sensor_type") as batch:
        batch.drop_column("guard_multiple")
        batch.drop_column("decision_rule")
    with op.batch_alter_table("fit") as batch:
        batch.drop_column("noise_check")
