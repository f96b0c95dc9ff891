"""Tags compare case-sensitively on MariaDB/MySQL too.

Revision ID: 0005_tag_case
Revises: 0004_window_tail

MariaDB's default collation compares text case-blind, so ``FT-203`` and ``ft-203`` at the
same time were one key of ``readings``: the second reading was dropped as a duplicate.
SQLite and PostgreSQL compare bytes already. The tag columns of ``readings``,
``data_health`` and ``window_checks`` get a binary collation; other dialects are left
alone.
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op
from sqlalchemy.dialects import mysql

revision = "0005_tag_case"
down_revision = "0004_window_tail"
branch_labels = None
depends_on = None

TABLES = ("readings", "data_health", "window_checks")


def _alter(collation: str | None) -> None:
    if op.get_bind().dialect.name not in ("mysql", "mariadb"):
        return
    new = mysql.VARCHAR(100, charset="utf8mb4", collation=collation)
    for table in TABLES:
        op.alter_column(table, "tag", existing_type=sa.String(100), type_=new,
                        existing_nullable=False)


def upgrade() -> None:
    _alter("utf8mb4_bin")


def downgrade() -> None:
    _alter(None)
