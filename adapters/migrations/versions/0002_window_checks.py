"""Per-window evidence for the diagnosis: fit sums, screening counts, header balance.

Revision ID: 0002_window_checks
Revises: 0001_initial

* ``fits`` gains what the diagnosis needs to test any baseline later without the
  samples: the weighted sums of the window's fit, the mean flow, the fixed back-pressure,
  the flow span, the residual autocorrelation and the logged termination pressure.
* ``window_checks``: what screening flagged per tag and analysis window.
* ``header_balance``: Σ branch meters − total meter per window, with its uncertainty.
"""

from __future__ import annotations

from typing import Any

import sqlalchemy as sa
from alembic import op
from sqlalchemy.dialects import mysql

revision = "0002_window_checks"
down_revision = "0001_initial"
branch_labels = None
depends_on = None

NEW_FIT_FLOATS = (
    "s_fixed_pa", "flow_span", "mean_flow_m3s", "end_pressure_pa", "residual_autocorr",
    "sum_w", "sum_x", "sum_y", "sum_xx", "sum_xy", "sum_yy",
)  # fmt: skip


def _time() -> sa.types.TypeEngine[Any]:
    return sa.DateTime(timezone=True).with_variant(mysql.DATETIME(fsp=6), "mysql", "mariadb")


def upgrade() -> None:
    with op.batch_alter_table("fits") as batch:
        for name in NEW_FIT_FLOATS:
            batch.add_column(sa.Column(name, sa.Double(), nullable=True))
    op.create_table(
        "window_checks",
        sa.Column("branch", sa.String(100), primary_key=True),
        sa.Column("window_start", _time(), primary_key=True),
        sa.Column("window_end", _time(), primary_key=True),
        sa.Column("tag", sa.String(100), primary_key=True),
        sa.Column("frozen", sa.BigInteger(), nullable=False),
        sa.Column("out_of_range", sa.BigInteger(), nullable=False),
        sa.Column("spikes", sa.BigInteger(), nullable=False),
        sa.Column("samples", sa.BigInteger(), nullable=False),
    )
    op.create_table(
        "header_balance",
        sa.Column("window_start", _time(), primary_key=True),
        sa.Column("window_end", _time(), primary_key=True),
        sa.Column("residual_m3s", sa.Double(), nullable=False),
        sa.Column("uncertainty_m3s", sa.Double(), nullable=False),
        sa.Column("samples", sa.BigInteger(), nullable=False),
    )


def downgrade() -> None:
    op.drop_table("header_balance")
    op.drop_table("window_checks")
    with op.batch_alter_table("fits") as batch:
        for name in reversed(NEW_FIT_FLOATS):
            batch.drop_column(name)
