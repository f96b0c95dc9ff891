"""Initial schema of the results store: every table branchwatch keeps.

Revision ID: 0001_initial
Revises: (none)

Times are UTC: ``timestamptz`` on PostgreSQL, naive UTC ``DATETIME(6)`` on MariaDB/MySQL
(microseconds kept), SQLAlchemy's ISO text on SQLite. Natural keys are primary keys or
unique constraints, so that the store's upserts are idempotent.
"""

from __future__ import annotations

from typing import Any

import sqlalchemy as sa
from alembic import op
from sqlalchemy.dialects import mysql

from adapters.records import ALARM_STATES  # the one list of alarm states

revision = "0001_initial"
down_revision = None
branch_labels = None
depends_on = None

def _time() -> sa.types.TypeEngine[Any]:
    return sa.DateTime(timezone=True).with_variant(mysql.DATETIME(fsp=6), "mysql", "mariadb")


def _id() -> sa.Column[int]:
    # SQLite only auto-increments an INTEGER PRIMARY KEY (its rowid alias).
    return sa.Column(
        "id",
        sa.BigInteger().with_variant(sa.Integer(), "sqlite"),
        primary_key=True,
        autoincrement=True,
    )


def upgrade() -> None:
    op.create_table(
        "readings",
        sa.Column("tag", sa.String(100), primary_key=True),
        sa.Column("time", _time(), primary_key=True),
        sa.Column("value", sa.Double(), nullable=True),
        sa.Column("good", sa.Boolean(), nullable=False),
    )
    op.create_table(
        "cursors",
        sa.Column("source", sa.String(100), primary_key=True),
        sa.Column("key", sa.String(400), primary_key=True),
        sa.Column("cursor", sa.JSON(), nullable=False),
        sa.Column("updated", _time(), nullable=False),
    )
    op.create_table(
        "quarantine",
        _id(),
        sa.Column("source", sa.String(100), nullable=False),
        sa.Column("origin", sa.String(400), nullable=False),
        sa.Column("line", sa.BigInteger(), nullable=False),
        sa.Column("reason", sa.String(200), nullable=False),
        sa.Column("raw", sa.Text(), nullable=True),
        sa.Column("stored_at", _time(), nullable=False),
        sa.UniqueConstraint("source", "origin", "line", "reason", name="uq_quarantine_row"),
    )
    op.create_index("ix_quarantine_stored_at", "quarantine", ["stored_at"])
    op.create_table(
        "fits",
        sa.Column("branch", sa.String(100), primary_key=True),
        sa.Column("window_start", _time(), primary_key=True),
        sa.Column("window_end", _time(), primary_key=True),
        sa.Column("r", sa.Double(), nullable=True),
        sa.Column("r_low", sa.Double(), nullable=True),
        sa.Column("r_high", sa.Double(), nullable=True),
        sa.Column("s_pa", sa.Double(), nullable=True),
        sa.Column("s_low_pa", sa.Double(), nullable=True),
        sa.Column("s_high_pa", sa.Double(), nullable=True),
        sa.Column("identifiable", sa.Boolean(), nullable=True),
        sa.Column("samples", sa.Integer(), nullable=False),
        sa.Column("flow_min_m3s", sa.Double(), nullable=True),
        sa.Column("flow_max_m3s", sa.Double(), nullable=True),
        sa.Column("residual_std_pa", sa.Double(), nullable=True),
        sa.Column("corr_rs", sa.Double(), nullable=True),
        sa.Column("temperature_c", sa.Double(), nullable=True),
        sa.Column("header_pressure_pa", sa.Double(), nullable=True),
        sa.Column("status", sa.String(40), nullable=False),
        sa.Column("message", sa.Text(), nullable=True),
        sa.Column("computed_at", _time(), nullable=False),
    )
    op.create_index("ix_fits_window_start", "fits", ["window_start"])
    op.create_table(
        "findings",
        sa.Column("branch", sa.String(100), primary_key=True),
        sa.Column("kind", sa.String(40), primary_key=True),
        sa.Column("start", _time(), primary_key=True),
        sa.Column("detected", _time(), nullable=False),
        sa.Column("end", _time(), nullable=True),
        sa.Column("confidence", sa.Double(), nullable=False),
        sa.Column("evidence", sa.JSON(), nullable=False),
        sa.Column("message", sa.Text(), nullable=False),
        sa.Column("updated", _time(), nullable=False),
    )
    op.create_index("ix_findings_detected", "findings", ["detected"])
    states = ", ".join(f"'{s}'" for s in ALARM_STATES)
    op.create_table(
        "alarms",
        sa.Column("branch", sa.String(100), primary_key=True),
        sa.Column("condition", sa.String(60), primary_key=True),
        sa.Column("state", sa.String(20), nullable=False),
        sa.Column("priority", sa.String(20), nullable=True),
        sa.Column("activated", _time(), nullable=True),
        sa.Column("acknowledged", _time(), nullable=True),
        sa.Column("cleared", _time(), nullable=True),
        sa.Column("shelved_until", _time(), nullable=True),
        sa.Column("value", sa.Double(), nullable=True),
        sa.Column("limit_value", sa.Double(), nullable=True),
        sa.Column("message", sa.Text(), nullable=True),
        sa.Column("updated", _time(), nullable=False),
        sa.CheckConstraint(f"state IN ({states})", name="ck_alarms_state"),
    )
    op.create_table(
        "alarm_events",
        _id(),
        sa.Column("branch", sa.String(100), nullable=False),
        sa.Column("condition", sa.String(60), nullable=False),
        sa.Column("time", _time(), nullable=False),
        sa.Column("from_state", sa.String(20), nullable=True),
        sa.Column("to_state", sa.String(20), nullable=False),
        sa.Column("message", sa.Text(), nullable=True),
    )
    op.create_index("ix_alarm_events_time", "alarm_events", ["time"])
    op.create_table(
        "maintenance",
        _id(),
        sa.Column("branch", sa.String(100), nullable=False),
        sa.Column("kind", sa.String(40), nullable=False),
        sa.Column("time", _time(), nullable=False),
        sa.Column("note", sa.Text(), nullable=True),
        sa.UniqueConstraint("branch", "kind", "time", name="uq_maintenance_event"),
    )
    op.create_table(
        "job_runs",
        _id(),
        sa.Column("job", sa.String(100), nullable=False),
        sa.Column("started", _time(), nullable=False),
        sa.Column("finished", _time(), nullable=True),
        sa.Column("status", sa.String(20), nullable=False),
        sa.Column("detail", sa.JSON(), nullable=False),
        sa.UniqueConstraint("job", "started", name="uq_job_run"),
    )
    op.create_index("ix_job_runs_started", "job_runs", ["started"])
    op.create_table(
        "data_health",
        sa.Column("tag", sa.String(100), primary_key=True),
        sa.Column("day", sa.Date(), primary_key=True),
        sa.Column("flag", sa.String(40), primary_key=True),
        sa.Column("count", sa.BigInteger(), nullable=False),
    )


def downgrade() -> None:
    for name in (
        "data_health",
        "job_runs",
        "maintenance",
        "alarm_events",
        "alarms",
        "findings",
        "fits",
        "quarantine",
        "cursors",
        "readings",
    ):
        op.drop_table(name)
