"""The results store's tables as the newest migration leaves them (SQLAlchemy Core).

`adapters.store` queries through these definitions; the migrations in ``versions/`` are
what creates the tables, and a test checks that the two agree. A new migration comes with
the matching change here.

Times are UTC: `UTCDateTime` takes and returns aware UTC datetimes whatever the dialect
stores (``timestamptz`` on PostgreSQL, naive UTC ``DATETIME(6)`` on MariaDB/MySQL, ISO
text on SQLite).
"""

from __future__ import annotations

from datetime import UTC, datetime
from typing import Any

import pandas as pd
import sqlalchemy as sa
from sqlalchemy.dialects import mysql

from adapters.fit_record import FIT_FLOATS


class UTCDateTime(sa.types.TypeDecorator[datetime]):
    """Aware UTC datetimes in, aware UTC datetimes out, whatever the dialect stores."""

    impl = sa.DateTime(timezone=True)
    cache_ok = True

    def load_dialect_impl(self, dialect: sa.Dialect) -> sa.types.TypeEngine[Any]:
        if dialect.name in ("mysql", "mariadb"):
            return dialect.type_descriptor(mysql.DATETIME(fsp=6))
        return dialect.type_descriptor(sa.DateTime(timezone=True))

    def process_bind_param(self, value: Any, dialect: sa.Dialect) -> datetime | None:
        if value is None:
            return None
        utc = utc_datetime(value, "time")
        return utc if dialect.name == "postgresql" else utc.replace(tzinfo=None)

    def process_result_value(self, value: Any, dialect: sa.Dialect) -> datetime | None:
        if value is None:
            return None
        if isinstance(value, str):  # a raw SQLite value read outside the type system
            value = datetime.fromisoformat(value)
        return value.replace(tzinfo=UTC) if value.tzinfo is None else value.astimezone(UTC)


def utc_datetime(value: Any, name: str) -> datetime:
    """*value* as an aware UTC `datetime`; naive times are refused (UTC is never guessed)."""
    if isinstance(value, pd.Timestamp):
        value = value.to_pydatetime()
    if not isinstance(value, datetime):
        raise TypeError(f"{name} must be a timezone-aware datetime, got {type(value).__name__}")
    if value.tzinfo is None:
        raise ValueError(f"{name} must be timezone-aware (UTC inside branchwatch), got {value}")
    return value.astimezone(UTC)


metadata = sa.MetaData()
T = UTCDateTime
#: A tag name: compared byte for byte everywhere (a binary collation on MariaDB/MySQL,
#: whose default compares text case-blind; added by 0005_tag_case).
Tag = sa.String(100).with_variant(
    mysql.VARCHAR(100, charset="utf8mb4", collation="utf8mb4_bin"), "mysql", "mariadb"
)
readings_t = sa.Table(
    "readings",
    metadata,
    sa.Column("tag", Tag, primary_key=True),
    sa.Column("time", T(), primary_key=True),
    sa.Column("value", sa.Double()),
    sa.Column("good", sa.Boolean(), nullable=False),
)
cursors_t = sa.Table(
    "cursors",
    metadata,
    sa.Column("source", sa.String(100), primary_key=True),
    sa.Column("key", sa.String(400), primary_key=True),
    sa.Column("cursor", sa.JSON(), nullable=False),
    sa.Column("updated", T(), nullable=False),
)
quarantine_t = sa.Table(
    "quarantine",
    metadata,
    sa.Column("id", sa.BigInteger().with_variant(sa.Integer(), "sqlite"), primary_key=True),
    sa.Column("source", sa.String(100), nullable=False),
    sa.Column("origin", sa.String(400), nullable=False),
    sa.Column("line", sa.BigInteger(), nullable=False),
    sa.Column("reason", sa.String(200), nullable=False),
    sa.Column("raw", sa.Text()),
    sa.Column("stored_at", T(), nullable=False),
    sa.UniqueConstraint("source", "origin", "line", "reason", name="uq_quarantine_row"),
)
# the fits table's columns are `adapters.fit_record.WindowFit`'s (its `FIT_FLOATS` in order)
fits_t = sa.Table(
    "fits",
    metadata,
    sa.Column("branch", sa.String(100), primary_key=True),
    sa.Column("window_start", T(), primary_key=True),
    sa.Column("window_end", T(), primary_key=True),
    *(sa.Column(name, sa.Double()) for name in FIT_FLOATS[:6]),
    sa.Column("identifiable", sa.Boolean()),
    sa.Column("samples", sa.Integer(), nullable=False),
    *(sa.Column(name, sa.Double()) for name in FIT_FLOATS[6:12]),
    sa.Column("status", sa.String(40), nullable=False),
    sa.Column("message", sa.Text()),
    sa.Column("computed_at", T(), nullable=False),
    *(sa.Column(name, sa.Double()) for name in FIT_FLOATS[12:]),
)
findings_t = sa.Table(
    "findings",
    metadata,
    sa.Column("branch", sa.String(100), primary_key=True),
    sa.Column("kind", sa.String(40), primary_key=True),
    sa.Column("start", T(), primary_key=True),
    sa.Column("detected", T(), nullable=False),
    sa.Column("end", T()),
    sa.Column("confidence", sa.Double(), nullable=False),
    sa.Column("evidence", sa.JSON(), nullable=False),
    sa.Column("message", sa.Text(), nullable=False),
    sa.Column("updated", T(), nullable=False),
)
alarms_t = sa.Table(
    "alarms",
    metadata,
    sa.Column("branch", sa.String(100), primary_key=True),
    sa.Column("condition", sa.String(60), primary_key=True),
    sa.Column("state", sa.String(20), nullable=False),
    sa.Column("priority", sa.String(20)),
    sa.Column("activated", T()),
    sa.Column("acknowledged", T()),
    sa.Column("cleared", T()),
    sa.Column("shelved_until", T()),
    sa.Column("value", sa.Double()),
    sa.Column("limit_value", sa.Double()),
    sa.Column("message", sa.Text()),
    sa.Column("updated", T(), nullable=False),
    # added by 0003_alarm_memory
    sa.Column("active", sa.Boolean()),
    sa.Column("pending_since", T()),
    sa.Column("clear_since", T()),
    sa.Column("last_sample", T()),
    sa.Column("acknowledged_by", sa.String(100)),
)
alarm_events_t = sa.Table(
    "alarm_events",
    metadata,
    sa.Column("id", sa.BigInteger().with_variant(sa.Integer(), "sqlite"), primary_key=True),
    sa.Column("branch", sa.String(100), nullable=False),
    sa.Column("condition", sa.String(60), nullable=False),
    sa.Column("time", T(), nullable=False),
    sa.Column("from_state", sa.String(20)),
    sa.Column("to_state", sa.String(20), nullable=False),
    sa.Column("message", sa.Text()),
)
maintenance_t = sa.Table(
    "maintenance",
    metadata,
    sa.Column("id", sa.BigInteger().with_variant(sa.Integer(), "sqlite"), primary_key=True),
    sa.Column("branch", sa.String(100), nullable=False),
    sa.Column("kind", sa.String(40), nullable=False),
    sa.Column("time", T(), nullable=False),
    sa.Column("note", sa.Text()),
    # 0006_maintenance_entries: entries are withdrawn (kept, marked), never deleted; a
    # correction withdraws the old entry and logs one that ``replaces`` it
    sa.Column("logged_at", T()),
    sa.Column("withdrawn_at", T()),
    sa.Column("withdrawn_by", sa.String(100)),
    sa.Column("withdrawn_note", sa.Text()),
    sa.Column("replaces", sa.BigInteger()),
)
#: A message of any size (the morning report's HTML rides along in a digest).
LongText = sa.Text().with_variant(mysql.LONGTEXT(), "mysql", "mariadb")
#: 0007_outbox: messages waiting to be sent, sent, or given up on, one row per
#: (idempotency key, channel)
outbox_t = sa.Table(
    "outbox",
    metadata,
    sa.Column("key", sa.String(200), primary_key=True),
    sa.Column("channel", sa.String(60), primary_key=True),
    sa.Column("kind", sa.String(20), nullable=False),
    sa.Column("priority", sa.String(20), nullable=False),
    sa.Column("subject", sa.Text(), nullable=False),
    sa.Column("body", LongText, nullable=False),
    sa.Column("created", T(), nullable=False),
    sa.Column("status", sa.String(20), nullable=False),
    sa.Column("attempts", sa.Integer(), nullable=False),
    sa.Column("next_try", T()),
    sa.Column("sent_at", T()),
    sa.Column("last_error", sa.Text()),
    sa.Index("ix_outbox_status_next_try", "status", "next_try"),
)
#: 0008_corrections: the journal of stored readings a later export brought with another
#: value — refused (the first value kept) or applied (the new value taken), and for an
#: applied one when the analysis windows it fell in were fitted again
corrections_t = sa.Table(
    "corrections",
    metadata,
    sa.Column("id", sa.BigInteger().with_variant(sa.Integer(), "sqlite"), primary_key=True),
    sa.Column("tag", Tag, nullable=False),
    sa.Column("time", T(), nullable=False),
    sa.Column("old_value", sa.Double()),
    sa.Column("new_value", sa.Double()),
    sa.Column("old_good", sa.Boolean(), nullable=False),
    sa.Column("new_good", sa.Boolean(), nullable=False),
    sa.Column("source", sa.String(100), nullable=False),
    sa.Column("origin", sa.String(400), nullable=False),
    sa.Column("line", sa.BigInteger()),
    sa.Column("recorded_at", T(), nullable=False),
    sa.Column("action", sa.String(10), nullable=False),
    sa.Column("reanalysed_at", T()),
    sa.Index("ix_corrections_tag_time", "tag", "time"),
    sa.Index("ix_corrections_pending", "action", "reanalysed_at"),
)
job_runs_t = sa.Table(
    "job_runs",
    metadata,
    sa.Column("id", sa.BigInteger().with_variant(sa.Integer(), "sqlite"), primary_key=True),
    sa.Column("job", sa.String(100), nullable=False),
    sa.Column("started", T(), nullable=False),
    sa.Column("finished", T()),
    sa.Column("status", sa.String(20), nullable=False),
    sa.Column("detail", sa.JSON(), nullable=False),
    sa.UniqueConstraint("job", "started", name="uq_job_run"),
)
data_health_t = sa.Table(
    "data_health",
    metadata,
    sa.Column("tag", Tag, primary_key=True),
    sa.Column("day", sa.Date(), primary_key=True),
    sa.Column("flag", sa.String(40), primary_key=True),
    sa.Column("count", sa.BigInteger(), nullable=False),
)
window_checks_t = sa.Table(
    "window_checks",
    metadata,
    sa.Column("branch", sa.String(100), primary_key=True),
    sa.Column("window_start", T(), primary_key=True),
    sa.Column("window_end", T(), primary_key=True),
    sa.Column("tag", Tag, primary_key=True),
    sa.Column("frozen", sa.BigInteger(), nullable=False),
    sa.Column("out_of_range", sa.BigInteger(), nullable=False),
    sa.Column("spikes", sa.BigInteger(), nullable=False),
    sa.Column("samples", sa.BigInteger(), nullable=False),
)
header_balance_t = sa.Table(
    "header_balance",
    metadata,
    sa.Column("window_start", T(), primary_key=True),
    sa.Column("window_end", T(), primary_key=True),
    sa.Column("residual_m3s", sa.Double(), nullable=False),
    sa.Column("uncertainty_m3s", sa.Double(), nullable=False),
    sa.Column("samples", sa.BigInteger(), nullable=False),
)
#: The bulk path of the store binds driver-native times: no per-row type hooks.
readings_raw = sa.Table(
    "readings",
    sa.MetaData(),
    sa.Column("tag", Tag, primary_key=True),
    sa.Column("time", sa.types.NullType(), primary_key=True),
    sa.Column("value", sa.Double()),
    sa.Column("good", sa.Boolean(), nullable=False),
)

FINDING_COLUMNS: tuple[str, ...] = tuple(c.name for c in findings_t.columns)
ALARM_COLUMNS: tuple[str, ...] = tuple(c.name for c in alarms_t.columns)

# Secondary indexes, as the migrations create them (reads by time across branches/tags).
sa.Index("ix_quarantine_stored_at", quarantine_t.c.stored_at)
sa.Index("ix_fits_window_start", fits_t.c.window_start)
sa.Index("ix_findings_detected", findings_t.c.detected)
sa.Index("ix_alarm_events_time", alarm_events_t.c.time)
sa.Index("ix_job_runs_started", job_runs_t.c.started)
sa.Index("ix_maintenance_branch_time", maintenance_t.c.branch, maintenance_t.c.time)

