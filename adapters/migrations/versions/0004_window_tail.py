"""The tail of a window that a step came part-way through.

Revision ID: 0004_window_tail
Revises: 0003_alarm_memory

When the analysis finds a step inside a window (`model.fit.fit_with_change`), it fits the
samples after it apart: ``fits`` keeps where that tail starts (seconds after the window
start), its ratio and interval, samples, fitted back-pressure, logged end pressure, the
size of the change and the tail's fit sums, so that the diagnosis can name the step in
the window it came in. NULL where the window had no step.
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0004_window_tail"
down_revision = "0003_alarm_memory"
branch_labels = None
depends_on = None

TAIL_FLOATS = (
    "tail_offset_s", "tail_change", "tail_r", "tail_r_low", "tail_r_high", "tail_samples",
    "tail_s_pa", "tail_end_pressure_pa",
    "tail_sum_w", "tail_sum_x", "tail_sum_y", "tail_sum_xx", "tail_sum_xy", "tail_sum_yy",
)  # fmt: skip


def upgrade() -> None:
    with op.batch_alter_table("fits") as batch:
        for name in TAIL_FLOATS:
            batch.add_column(sa.Column(name, sa.Double(), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table("fits") as batch:
        for name in reversed(TAIL_FLOATS):
            batch.drop_column(name)
