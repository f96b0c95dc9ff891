"""The corrections journal: stored readings that a later export brought with another value.

Revision ID: 0008_corrections
Revises: 0007_outbox

One row per correction met: the reading (tag, time), its stored value and quality
(``old_value``, ``old_good``) and the one the export brought (``new_value``,
``new_good``), in SI; where it came from (``source``, ``origin`` — the file or table —
and ``line`` when the source knows it); when it was met (``recorded_at``); what the
site's ``[source] corrections`` policy did with it (``action``: ``refused`` keeps the
stored value, ``applied`` took the new one); and, for an applied one, when the analysis
windows it fell in were fitted again (``reanalysed_at``, NULL until then).
"""

from __future__ import annotations

from typing import Any

import sqlalchemy as sa
from alembic import op
from sqlalchemy.dialects import mysql

revision = "0008_corrections"
down_revision = "0007_outbox"
branch_labels = None
depends_on = None


def _time() -> sa.types.TypeEngine[Any]:
    return sa.DateTime(timezone=True).with_variant(mysql.DATETIME(fsp=6), "mysql", "mariadb")


def upgrade() -> None:
    op.create_table(
        "corrections",
        sa.Column("id", sa.BigInteger().with_variant(sa.Integer(), "sqlite"), primary_key=True),
        sa.Column("tag", sa.String(100).with_variant(
            mysql.VARCHAR(100, charset="utf8mb4", collation="utf8mb4_bin"), "mysql", "mariadb"),
            nullable=False),
        sa.Column("time", _time(), nullable=False),
        sa.Column("old_value", sa.Double()),
        sa.Column("new_value", sa.Double()),
        sa.Column("old_good", sa.Boolean(), nullable=False),
        sa.Column("new_good", sa.Boolean(), nullable=False),
        sa.Column("source", sa.String(100), nullable=False),
        sa.Column("origin", sa.String(400), nullable=False),
        sa.Column("line", sa.BigInteger()),
        sa.Column("recorded_at", _time(), nullable=False),
        sa.Column("action", sa.String(10), nullable=False),
        sa.Column("reanalysed_at", _time()),
    )
    op.create_index("ix_corrections_tag_time", "corrections", ["tag", "time"])
    op.create_index("ix_corrections_pending", "corrections", ["action", "reanalysed_at"])


def downgrade() -> None:
    op.drop_index("ix_corrections_pending", table_name="corrections")
    op.drop_index("ix_corrections_tag_time", table_name="corrections")
    op.drop_table("corrections")
