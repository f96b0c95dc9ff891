"""The results store's maintenance log: entries logged, withdrawn and corrected.

An entry is never deleted: a withdrawn one stays, marked with who, when and why, and a
correction is a new entry that ``replaces`` the old.
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from typing import Any

import pandas as pd
import sqlalchemy as sa

from adapters.base import StoreError
from adapters.migrations.tables import maintenance_t, utc_datetime
from adapters.records import MAINTENANCE_KINDS
from adapters.store_transactions import StoreTransactions, checked_name


class MaintenanceTables(StoreTransactions):
    """``maintenance``: the work done on the branches, as the operators logged it."""

    def add_maintenance(
        self, branch: str, kind: str, time: datetime, note: str = "", *,
        now: datetime | None = None,
    ) -> int:  # fmt: skip
        """Log a maintenance entry; returns its id.

        Logging the same (branch, kind, time) again while that entry is in force updates
        its note (same id). Work dated after *now* (default: the clock) is refused: the
        log records what was done.
        """
        if kind not in MAINTENANCE_KINDS:
            raise ValueError(f"kind must be one of {MAINTENANCE_KINDS}, got {kind!r}")
        branch = checked_name(branch, "branch", 100)
        when = utc_datetime(time, "time")
        logged = utc_datetime(now, "now") if now is not None else datetime.now(UTC)
        _refuse_future(when, logged)
        t = maintenance_t
        with self._write() as conn:
            same = conn.execute(
                sa.select(t.c.id).where(t.c.branch == branch, t.c.kind == kind,
                                        t.c.time == when, t.c.withdrawn_at.is_(None))
            ).scalar()  # fmt: skip
            if same is not None:
                conn.execute(t.update().where(t.c.id == same).values(note=note))
                return int(same)
            row = {"branch": branch, "kind": kind, "time": when, "note": note,
                   "logged_at": logged}  # fmt: skip
            return _new_id(conn.execute(t.insert().values(**row)))

    def withdraw_maintenance(
        self, entry_id: int, *, by: str, note: str = "", now: datetime | None = None
    ) -> None:
        """Withdraw entry *entry_id*: it stays in the log, marked with who, when and why,
        and the diagnosis no longer reads it."""
        when = utc_datetime(now, "now") if now is not None else datetime.now(UTC)
        with self._write() as conn:
            self._entry_in_force(conn, entry_id)
            self._withdraw(conn, entry_id, by, note, when)

    def correct_maintenance(
        self, entry_id: int, *, time: datetime | None = None, note: str | None = None,
        by: str, now: datetime | None = None,
    ) -> int:  # fmt: skip
        """Correct entry *entry_id* (its time, its note or both): the old entry is
        withdrawn ("corrected") and a new one that ``replaces`` it is logged; returns the
        new entry's id."""
        logged = utc_datetime(now, "now") if now is not None else datetime.now(UTC)
        t = maintenance_t
        with self._write() as conn:
            old = self._entry_in_force(conn, entry_id)
            when = old["time"] if time is None else utc_datetime(time, "time")
            _refuse_future(when, logged)
            row = {"branch": old["branch"], "kind": old["kind"], "time": when,
                   "note": old["note"] if note is None else note, "logged_at": logged,
                   "replaces": int(entry_id)}  # fmt: skip
            new_id = _new_id(conn.execute(t.insert().values(**row)))
            self._withdraw(conn, entry_id, by, f"corrected: replaced by entry {new_id}", logged)
        return new_id

    @staticmethod
    def _entry_in_force(conn: sa.Connection, entry_id: int) -> dict[str, Any]:
        t = maintenance_t
        row = conn.execute(sa.select(t).where(t.c.id == int(entry_id))).mappings().first()
        if row is None:
            raise ValueError(f"maintenance entry {entry_id} does not exist; "
                             "'branchwatch log CONFIG' lists the entries with their ids")
        if row["withdrawn_at"] is not None:
            raise ValueError(f"maintenance entry {entry_id} was already withdrawn on "
                             f"{row['withdrawn_at']:%Y-%m-%d %H:%M}Z; nothing changed")
        return dict(row)

    @staticmethod
    def _withdraw(conn: sa.Connection, entry_id: int, by: str, note: str,
                  when: datetime) -> None:  # fmt: skip
        t = maintenance_t
        conn.execute(t.update().where(t.c.id == int(entry_id)).values(
            withdrawn_at=when, withdrawn_by=checked_name(by, "by", 100), withdrawn_note=note))

    def maintenance(
        self, branch: str | None = None, *, include_withdrawn: bool = False
    ) -> pd.DataFrame:
        """Maintenance entries in force (id, branch, kind, time, note, logged_at, …),
        oldest first; *include_withdrawn* adds the withdrawn ones (``withdrawn_at`` set)."""
        t = maintenance_t
        query = sa.select(t).order_by(t.c.time, t.c.id)
        if branch is not None:
            query = query.where(t.c.branch == branch)
        if not include_withdrawn:
            query = query.where(t.c.withdrawn_at.is_(None))
        frame = self._frame(query, t)
        frame["replaces"] = frame["replaces"].astype("Int64")  # NULL unless a correction
        return frame


def _new_id(result: sa.CursorResult[Any]) -> int:
    """The primary key of the row an insert made."""
    key = result.inserted_primary_key
    if key is None:
        raise StoreError("the database did not return the new maintenance entry's id")
    return int(key[0])


#: How far ahead of the clock a maintenance time may be (clock skew between machines) [s].
_FUTURE_SLACK_S = 300.0


def _refuse_future(when: datetime, now: datetime) -> None:
    if when > now + timedelta(seconds=_FUTURE_SLACK_S):
        raise ValueError(
            f"maintenance time {when:%Y-%m-%d %H:%M}Z is in the future (now "
            f"{now:%Y-%m-%d %H:%M}Z); log work once it is done"
        )
