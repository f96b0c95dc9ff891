"""What an alarm remembers between ingests, so its delays survive a restart.

Revision ID: 0003_alarm_memory
Revises: 0002_window_checks

``active`` is the debounced process condition, ``pending_since``/``clear_since`` run the
on- and off-delays, ``last_sample`` makes a re-ingest of the same samples change nothing,
``acknowledged_by`` names who acknowledged.
"""

from __future__ import annotations

from typing import Any

import sqlalchemy as sa
from alembic import op
from sqlalchemy.dialects import mysql

revision = "0003_alarm_memory"
down_revision = "0002_window_checks"
branch_labels = None
depends_on = None

TIMES = ("pending_since", "clear_since", "last_sample")


def _time() -> sa.types.TypeEngine[Any]:
    return sa.DateTime(timezone=True).with_variant(mysql.DATETIME(fsp=6), "mysql", "mariadb")


def upgrade() -> None:
    with op.batch_alter_table("alarms") as batch:
        batch.add_column(sa.Column("active", sa.Boolean(), nullable=True))
        for name in TIMES:
            batch.add_column(sa.Column(name, _time(), nullable=True))
        batch.add_column(sa.Column("acknowledged_by", sa.String(100), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table("alarms") as batch:
        batch.drop_column("acknowledged_by")
        for name in reversed(TIMES):
            batch.drop_column(name)
        batch.drop_column("active")
