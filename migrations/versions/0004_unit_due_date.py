"""unit due date from drift history

Revision ID: 0004
Revises: 0003
Create Date: 2026-12-01 23:50:00.000000

Two nullable columns on ``unit``: the due date and the words of its basis, as computed from the
unit's drift history (``server.fleet.service.unit_due``) at flag recomputation. Existing rows get
NULL; until the next recomputation the due date is computed on demand.
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0004"
down_revision: str | None = "0003"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    with op.batch_alter_table("unit") as batch:
        batch.add_column(sa.Column("due_on", sa.Date(), nullable=True))
        batch.add_column(sa.Column("due_basis", sa.Text(), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table("unit") as batch:
        batch.drop_column("due_basis")
        batch.drop_column("due_on")
