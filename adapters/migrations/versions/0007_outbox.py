"""The notification outbox: messages queued, sent or given up on.

Revision ID: 0007_outbox
Revises: 0006_maintenance_entries

One row per (idempotency key, channel): queueing the same key again changes nothing, so
a restart neither loses nor doubles a message. ``body`` holds the message as JSON (text,
an HTML attachment, webhook fields); ``status`` is ``pending``, ``sent`` or ``failed``;
``attempts``, ``next_try`` and ``last_error`` carry the retries.
"""

from __future__ import annotations

from typing import Any

import sqlalchemy as sa
from alembic import op
from sqlalchemy.dialects import mysql

revision = "0007_outbox"
down_revision = "0006_maintenance_entries"
branch_labels = None
depends_on = None


def _time() -> sa.types.TypeEngine[Any]:
    return sa.DateTime(timezone=True).with_variant(mysql.DATETIME(fsp=6), "mysql", "mariadb")


def upgrade() -> None:
    op.create_table(
        "outbox",
        sa.Column("key", sa.String(200), primary_key=True),
        sa.Column("channel", sa.String(60), primary_key=True),
        sa.Column("kind", sa.String(20), nullable=False),
        sa.Column("priority", sa.String(20), nullable=False),
        sa.Column("subject", sa.Text(), nullable=False),
        sa.Column("body", sa.Text().with_variant(mysql.LONGTEXT(), "mysql", "mariadb"),
                  nullable=False),
        sa.Column("created", _time(), nullable=False),
        sa.Column("status", sa.String(20), nullable=False),
        sa.Column("attempts", sa.Integer(), nullable=False),
        sa.Column("next_try", _time()),
        sa.Column("sent_at", _time()),
        sa.Column("last_error", sa.Text()),
    )
    op.create_index("ix_outbox_status_next_try", "outbox", ["status", "next_try"])


def downgrade() -> None:
    op.drop_index("ix_outbox_status_next_try", table_name="outbox")
    op.drop_table("outbox")
