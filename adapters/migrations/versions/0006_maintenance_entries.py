"""Maintenance entries that can be corrected or withdrawn without losing what was logged.

Revision ID: 0006_maintenance_entries
Revises: 0005_tag_case

An entry in the maintenance log is never deleted: a withdrawn entry keeps its row, with
when (``withdrawn_at``), by whom (``withdrawn_by``) and why (``withdrawn_note``); a
correction withdraws the old entry and logs a new one whose ``replaces`` names it.
``logged_at`` is when the entry was made (NULL for entries logged before this version).
The unique key (branch, kind, time) goes: a withdrawn entry and a new one at the same
time are both kept, and the store keeps one entry in force per key itself.
"""

from __future__ import annotations

from typing import Any

import sqlalchemy as sa
from alembic import op
from sqlalchemy.dialects import mysql

revision = "0006_maintenance_entries"
down_revision = "0005_tag_case"
branch_labels = None
depends_on = None


def _time() -> sa.types.TypeEngine[Any]:
    return sa.DateTime(timezone=True).with_variant(mysql.DATETIME(fsp=6), "mysql", "mariadb")


def upgrade() -> None:
    with op.batch_alter_table("maintenance") as batch:
        batch.drop_constraint("uq_maintenance_event", type_="unique")
        batch.add_column(sa.Column("logged_at", _time(), nullable=True))
        batch.add_column(sa.Column("withdrawn_at", _time(), nullable=True))
        batch.add_column(sa.Column("withdrawn_by", sa.String(100), nullable=True))
        batch.add_column(sa.Column("withdrawn_note", sa.Text(), nullable=True))
        batch.add_column(sa.Column("replaces", sa.BigInteger(), nullable=True))
    op.create_index("ix_maintenance_branch_time", "maintenance", ["branch", "time"])


def downgrade() -> None:
    op.drop_index("ix_maintenance_branch_time", table_name="maintenance")
    op.execute("DELETE FROM maintenance WHERE withdrawn_at IS NOT NULL")
    with op.batch_alter_table("maintenance") as batch:
        for name in ("replaces", "withdrawn_note", "withdrawn_by", "withdrawn_at", "logged_at"):
            batch.drop_column(name)
        batch.create_unique_constraint("uq_maintenance_event", ["branch", "kind", "time"])
