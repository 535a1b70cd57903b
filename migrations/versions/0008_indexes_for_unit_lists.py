"""indexes for unit lists

Revision ID: 0008
Revises: 0007
Create Date: 2026-12-05 21:56:19.154870

Two single-column indexes become composite ones that serve the same lookups and the unit lists:

- ``calibration_session(unit_id, performed_at, id)``: a unit's latest valid session (every row
  of the fleet list and the unit lookup) is read newest first from the index instead of sorted.
- ``unit(sensor_type_id, serial)``: a type's units in serial order without a sort.
"""

from collections.abc import Sequence

from alembic import op

revision: str = "0008"
down_revision: str | None = "0007"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    with op.batch_alter_table("calibration_session", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_calibration_session_unit_id"))
        batch_op.create_index(
            "ix_calibration_session_unit_performed", ["unit_id", "performed_at", "id"], unique=False
        )

    with op.batch_alter_table("unit", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_unit_sensor_type_id"))
        batch_op.create_index("ix_unit_type_serial", ["sensor_type_id", "serial"], unique=False)


def downgrade() -> None:
    with op.batch_alter_table("unit", schema=None) as batch_op:
        batch_op.drop_index("ix_unit_type_serial")
        batch_op.create_index(
            batch_op.f("ix_unit_sensor_type_id"), ["sensor_type_id"], unique=False
        )

    with op.batch_alter_table("calibration_session", schema=None) as batch_op:
        batch_op.drop_index("ix_calibration_session_unit_performed")
        batch_op.create_index(
            batch_op.f("ix_calibration_session_unit_id"), ["unit_id"], unique=False
        )
