"""The results store's alarms: their states, their journal and the notification outbox.

``alarms`` (branch, condition) · ``alarm_events`` (the journal) · ``outbox`` (key, channel).
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from datetime import UTC, datetime
from typing import Any, ClassVar

import pandas as pd
import sqlalchemy as sa

from adapters.credentials import mask_secrets
from adapters.migrations.dialects import num, upsert
from adapters.migrations.tables import (
    ALARM_COLUMNS,
    alarm_events_t,
    alarms_t,
    outbox_t,
    utc_datetime,
)
from adapters.records import ALARM_STATES, AlarmStateName
from adapters.store_transactions import StoreTransactions, checked_name, full_record


class AlarmTables(StoreTransactions):
    """Alarm states (ISA-18.2), the alarm journal and the messages queued for people."""

    # alarms ---------------------------------------------------------------------------
    def upsert_alarms(self, rows: Iterable[Mapping[str, Any]]) -> int:
        """Write the current state of alarms, one per (branch, condition).

        A row whose ``state`` differs from the stored one also appends an entry to the
        alarm journal (`alarm_events`), in the same transaction. ``state`` is one of
        `ALARM_STATES` (ISA-18.2); ``updated`` (the time of the change) defaults to now.
        """
        now = datetime.now(UTC)
        recs = []
        for row in rows:
            rec = full_record(row, ALARM_COLUMNS, ("branch", "condition", "state"), "alarm")
            if rec["state"] not in ALARM_STATES:
                raise ValueError(f"alarm state must be one of {ALARM_STATES}, got {rec['state']!r}")
            rec["updated"] = rec.get("updated") or now
            rec["value"], rec["limit_value"] = num(rec["value"]), num(rec["limit_value"])
            recs.append(rec)
        with self._write() as conn:
            keys = [(r["branch"], r["condition"]) for r in recs]
            before = {
                (b, c): s
                for b, c, s in conn.execute(
                    sa.select(alarms_t.c.branch, alarms_t.c.condition, alarms_t.c.state)
                ).all()
                if (b, c) in set(keys)
            }
            events = [
                {
                    "branch": r["branch"],
                    "condition": r["condition"],
                    "time": r["updated"],
                    "from_state": before.get(k),
                    "to_state": r["state"],
                    "message": r["message"],
                }
                for k, r in zip(keys, recs, strict=True)
                # a change of state; an alarm first seen in normal changed nothing
                if before.get(k) != r["state"] and not (k not in before
                                                        and r["state"] == AlarmStateName.NORMAL)
            ]
            upsert(conn, alarms_t, recs, ("branch", "condition"), replace=True)
            if events:
                conn.execute(alarm_events_t.insert(), events)
        return len(recs)

    def read_alarms(self, branch: str | None = None, *, active_only: bool = False) -> pd.DataFrame:
        """Alarms and their states; *active_only* leaves out those in ``normal``."""
        query = sa.select(alarms_t).order_by(alarms_t.c.branch, alarms_t.c.condition)
        if branch is not None:
            query = query.where(alarms_t.c.branch == branch)
        if active_only:
            query = query.where(alarms_t.c.state != AlarmStateName.NORMAL.value)
        return self._frame(query, alarms_t)

    def alarm_events(
        self, branch: str | None = None, since: datetime | None = None
    ) -> pd.DataFrame:
        """The alarm journal: every state change, oldest first."""
        query = sa.select(alarm_events_t).order_by(alarm_events_t.c.time, alarm_events_t.c.id)
        if branch is not None:
            query = query.where(alarm_events_t.c.branch == branch)
        if since is not None:
            query = query.where(alarm_events_t.c.time >= utc_datetime(since, "since"))
        return self._frame(query, alarm_events_t)

    # the notification outbox ---------------------------------------------------------
    #: the states of a queued message
    MESSAGE_STATES: ClassVar[tuple[str, ...]] = ("pending", "sent", "failed")

    def queue_messages(self, rows: Iterable[Mapping[str, Any]]) -> int:
        recs = []
        for row in rows:
            rec = {k: row[k] for k in ("key", "channel", "kind", "priority", "subject", "body")}
            for k in ("key", "channel"):
                if not isinstance(rec[k], str) or not rec[k]:
                    raise ValueError(f"message {k} must be a non-empty string, got {rec[k]!r}")
            rec["key"] = checked_name(rec["key"], "message key", 200)
            rec["created"] = utc_datetime(row.get("created") or datetime.now(UTC), "created")
            rec.update(status="pending", attempts=0, next_try=rec["created"], sent_at=None,
                       last_error=None)
            recs.append(rec)
        if not recs:
            return 0
        t = outbox_t
        with self._write() as conn:
            have = {(k, c) for k, c in conn.execute(
                sa.select(t.c.key, t.c.channel).where(t.c.key.in_({r["key"] for r in recs}))
            ).all()}
            new = [r for r in recs if (r["key"], r["channel"]) not in have]
            upsert(conn, t, new, ("key", "channel"), replace=False)
        return len(new)

    def outbox(
        self, *, status: str | None = None, due_before: datetime | None = None,
        limit: int | None = None,
    ) -> pd.DataFrame:
        t = outbox_t
        query = sa.select(t).order_by(t.c.created, t.c.key, t.c.channel)
        if status is not None:
            query = query.where(t.c.status == status)
        if due_before is not None:
            query = query.where(t.c.status == "pending",
                                t.c.next_try <= utc_datetime(due_before, "due_before"))
        if limit is not None:
            query = query.limit(int(limit))
        return self._frame(query, t)

    def update_message(self, key: str, channel: str, **fields: Any) -> None:
        allowed = {"status", "attempts", "next_try", "sent_at", "last_error"}
        unknown = set(fields) - allowed
        if unknown:
            raise ValueError(f"cannot update message fields {sorted(unknown)}; "
                             f"allowed: {sorted(allowed)}")
        if "status" in fields and fields["status"] not in self.MESSAGE_STATES:
            raise ValueError(f"message status must be one of {self.MESSAGE_STATES}, "
                             f"got {fields['status']!r}")
        if fields.get("last_error") is not None:
            fields["last_error"] = mask_secrets(str(fields["last_error"]))[:2000]
        t = outbox_t
        with self._write() as conn:
            conn.execute(t.update().where(t.c.key == key, t.c.channel == channel)
                         .values(**fields))
