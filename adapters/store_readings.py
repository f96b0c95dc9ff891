"""The results store's readings: ingest, cursors, quarantine and the corrections journal.

A (tag, time) already stored keeps its first value unless the site's corrections policy
says ``apply`` (see `adapters.store`, "Writes").
"""

from __future__ import annotations

import logging
from collections.abc import Iterable
from datetime import UTC, datetime
from typing import Any

import numpy as np
import pandas as pd
import sqlalchemy as sa

from adapters.migrations.dialects import (
    CHUNK,
    copy_readings_pg,
    native_times,
    nullable,
    num,
    prepare_readings,
    quarantine_rows,
    raw_rows,
    readings_from_rows,
    time_text,
    to_utc_index,
    upsert,
    upsert_statement,
)
from adapters.migrations.tables import (
    UTCDateTime,
    corrections_t,
    cursors_t,
    quarantine_t,
    readings_raw,
    readings_t,
    utc_datetime,
)
from adapters.records import CORRECTION_POLICIES, Batch, BatchWrite, empty_readings, values_differ
from adapters.source_tools import FileBatch
from adapters.store_transactions import StoreTransactions, checked_name

log = logging.getLogger(__name__)


class ReadingsTables(StoreTransactions):
    """``readings``, ``cursors``, ``quarantine`` and ``corrections``."""

    # readings and ingest bookkeeping -------------------------------------------------
    def write_batch(
        self, batch: Batch, *, source: str, corrections: str = "refuse"
    ) -> BatchWrite:
        """Store a batch's readings, quarantine rows and cursor in one transaction.

        Readings whose (tag, time) is not stored yet are inserted; within the batch a
        repeated (tag, time) keeps its last row. A stored reading the batch brings again
        with an equal value (`values_differ`) and quality is skipped; with another value
        or quality it is a correction, handled by *corrections* (see
        `ResultsStore.write_batch`) and journalled in ``corrections`` — with the file line
        that brought it when the batch says (`adapters.source_tools.FileBatch`).

        Parameters
        ----------
        batch
            Readings frame (see `adapters.records`), quarantine frame and cursor.
        source
            Name of the source the cursor belongs to [-].
        corrections
            ``"refuse"`` (keep the stored value) or ``"apply"`` (take the batch's) [-].

        Returns
        -------
        BatchWrite
            Readings newly stored, corrections applied and newly refused [-].
        """
        checked_name(source, "source", 100)
        checked_name(batch.cursor_key, "batch.cursor_key", 400)
        if corrections not in CORRECTION_POLICIES:
            raise ValueError(f"corrections must be one of {CORRECTION_POLICIES}, "
                             f"got {corrections!r}")
        frame = prepare_readings(batch.readings)
        quarantined = quarantine_rows(batch.quarantined, source)
        now = datetime.now(UTC)
        applied = refused = 0
        example = None
        with self._write() as conn:
            stored, changed = self._insert_readings(conn, frame)
            if not changed.empty:
                applied, refused, example = _journal(
                    conn, changed, corrections, source=source, origin=batch.cursor_key,
                    lines=_source_lines(batch, changed), now=now)
            upsert(
                conn,
                quarantine_t,
                [dict(q, stored_at=now) for q in quarantined],
                ("source", "origin", "line", "reason"),
                replace=False,
            )
            upsert(
                conn,
                cursors_t,
                [
                    {
                        "source": source,
                        "key": batch.cursor_key,
                        "cursor": dict(batch.cursor),
                        "updated": now,
                    }
                ],
                ("source", "key"),
                replace=True,
            )
        log.debug("stored %d of %d readings from %s (%d corrections applied, %d refused)",
                  stored, len(frame), source, applied, refused)
        return BatchWrite(stored=stored, applied=applied, refused=refused, example=example)

    def _insert_readings(
        self, conn: sa.Connection, frame: pd.DataFrame
    ) -> tuple[int, pd.DataFrame]:
        """Insert the readings not stored yet; returns their count and the stored readings
        the frame changes (`_changes`)."""
        changed = _NO_CHANGES
        if frame.empty:
            return 0, changed
        t_ns = frame["time"].to_numpy("datetime64[ns]").view("int64")
        lo, hi = frame["time"].min(), frame["time"].max()
        raw_time = time_text(readings_t.c.time, conn.dialect.name)
        raw_good = sa.type_coerce(readings_t.c.good, sa.types.NullType())
        query = sa.select(readings_t.c.tag, raw_time, readings_t.c.value, raw_good).where(
            readings_t.c.tag.in_(sorted(set(frame["tag"]))),
            readings_t.c.time >= lo,
            readings_t.c.time <= hi,
        )
        have = raw_rows(conn, query)
        if have:
            # column lists by comprehension: several times faster than one object array
            known = pd.MultiIndex.from_arrays(
                [[h[0] for h in have], to_utc_index([h[1] for h in have]).asi8])
            values = np.array([h[2] for h in have], dtype="float64")  # NULL becomes NaN
            good = np.array([h[3] for h in have], dtype=bool)
            if not known.is_unique:  # one instant stored as two texts (SQLite): the first
                first = ~known.duplicated()
                known, values, good = known[first], values[first], good[first]
            at = known.get_indexer(pd.MultiIndex.from_arrays([frame["tag"].to_numpy(), t_ns]))
            fresh = at < 0
            if not fresh.all():
                same = at[~fresh]
                changed = _changes(frame[~fresh], values[same], good[same])
            frame = frame[fresh]
        if frame.empty:
            return 0, changed
        columns = {
            "tag": frame["tag"].tolist(),
            "time": native_times(frame["time"], conn.dialect.name),
            "value": nullable(frame["value"]),
            "good": frame["good"].tolist(),
        }
        if conn.dialect.name == "postgresql" and conn.dialect.driver == "psycopg":
            copy_readings_pg(conn, columns)
            return len(frame), changed
        # Compiled once, executed by the driver on plain tuples: SQLAlchemy's per-row
        # parameter handling would cost more than the database's own work.
        stmt = upsert_statement(conn.dialect.name, readings_raw, ("tag", "time"), [], replace=False)
        compiled = stmt.compile(dialect=conn.dialect)
        sql = str(compiled)
        if compiled.positional:
            order = [columns[name] for name in compiled.positiontup or ()]
            params: list[Any] = list(zip(*order, strict=True))
        else:
            names = list(compiled.params)
            params = [
                dict(zip(names, row, strict=True))
                for row in zip(*(columns[n] for n in names), strict=True)
            ]
        for i in range(0, len(params), CHUNK):
            conn.exec_driver_sql(sql, params[i : i + CHUNK])
        return len(frame), changed

    def cursors(self, source: str) -> dict[str, dict[str, Any]]:
        """The stored cursors of *source* (cursor key → cursor)."""
        with self._read() as conn:
            rows = conn.execute(
                sa.select(cursors_t.c.key, cursors_t.c.cursor).where(cursors_t.c.source == source)
            ).all()
        return {key: dict(cursor) for key, cursor in rows}

    def read_readings(self, tags: Iterable[str], start: datetime, end: datetime) -> pd.DataFrame:
        """Stored readings of *tags* with ``start <= time < end``, as a readings frame.

        Sorted by time, then tag. Times are aware UTC [datetime64[ns, UTC]], values SI.
        """
        tag_list = sorted(set(tags))
        start, end = utc_datetime(start, "start"), utc_datetime(end, "end")
        if not tag_list or end <= start:
            return empty_readings()
        raw_time = time_text(readings_t.c.time, self.dialect)
        raw_good = sa.type_coerce(readings_t.c.good, sa.types.NullType())
        # MariaDB/MySQL compare text case-blind by default: 'ft-203' = 'FT-203'. The tag
        # comes back there too, and only exact matches are kept.
        case_blind = self.dialect in ("mysql", "mariadb")
        columns = [raw_time, readings_t.c.value, raw_good]
        query = sa.select(*([readings_t.c.tag] if case_blind else []), *columns).where(
            readings_t.c.tag == sa.bindparam("tag"),
            readings_t.c.time >= start,
            readings_t.c.time < end,
        )
        # One query per tag: each is a range scan of the (tag, time) primary key, where
        # one IN (...) query over all tags sorted by time needs the whole result sorted
        # (SQLite: a temporary B-tree) and carries the tag text in every row. The rows
        # come back in tag turns; `readings_from_rows` orders them by time.
        rows: list[Any] = []
        counts: list[int] = []
        with self._read() as conn:
            for tag in tag_list:
                part = raw_rows(conn, query, {"tag": tag})
                if case_blind:
                    part = [r[1:] for r in part if r[0] == tag]
                counts.append(len(part))
                rows += part
        return readings_from_rows(rows, tag_list, counts)

    def quarantine_counts(
        self, source: str | None = None, since: datetime | None = None
    ) -> dict[str, int]:
        """Quarantined rows by reason, of one *source* or all, stored at or after *since*."""
        query = sa.select(quarantine_t.c.reason, sa.func.count()).group_by(quarantine_t.c.reason)
        if source is not None:
            query = query.where(quarantine_t.c.source == source)
        if since is not None:
            query = query.where(quarantine_t.c.stored_at >= utc_datetime(since, "since"))
        with self._read() as conn:
            return {reason: int(n) for reason, n in conn.execute(query).all()}

    # the corrections journal ---------------------------------------------------------
    def read_corrections(
        self, *, action: str | None = None, pending: bool = False,
        start: datetime | None = None, end: datetime | None = None,
    ) -> pd.DataFrame:
        """The corrections journal, by reading time then id (see
        `ResultsStore.read_corrections`); ``line`` is <NA> where the source did not say."""
        t = corrections_t
        query = sa.select(t).order_by(t.c.time, t.c.id)
        if action is not None:
            query = query.where(t.c.action == action)
        if pending:
            query = query.where(t.c.action == "applied", t.c.reanalysed_at.is_(None))
        if start is not None:
            query = query.where(t.c.time >= utc_datetime(start, "start"))
        if end is not None:
            query = query.where(t.c.time < utc_datetime(end, "end"))
        frame = self._frame(query, t)
        frame["line"] = frame["line"].astype("Int64")
        for col in ("old_good", "new_good"):
            frame[col] = frame[col].astype(bool)
        return frame

    def mark_reanalysed(self, ids: Iterable[int], *, when: datetime | None = None) -> int:
        """Mark applied corrections *ids* as re-analysed at *when* (default now)."""
        keys = sorted({int(i) for i in ids})
        if not keys:
            return 0
        stamp = utc_datetime(when, "when") if when is not None else datetime.now(UTC)
        t = corrections_t
        marked = 0
        with self._write() as conn:
            for i in range(0, len(keys), 500):  # IN lists of bounded length
                marked += conn.execute(
                    t.update().where(t.c.id.in_(keys[i : i + 500]), t.c.action == "applied",
                                     t.c.reanalysed_at.is_(None)).values(reanalysed_at=stamp)
                ).rowcount
        return marked

    def correction_counts(self) -> dict[str, int]:
        """Journalled corrections: applied, refused, pending (applied, not re-analysed)."""
        t = corrections_t
        waiting = sa.func.sum(sa.case((sa.and_(t.c.action == "applied",
                                               t.c.reanalysed_at.is_(None)), 1), else_=0))
        with self._read() as conn:
            rows = conn.execute(sa.select(t.c.action, sa.func.count(), waiting)
                                .group_by(t.c.action)).all()
        out = {"applied": 0, "refused": 0, "pending": 0}
        for action, count, pending in rows:
            out[str(action)] = int(count)
            out["pending"] += int(pending or 0)
        return out


#: No stored reading changed (`SqlStore._insert_readings`).
_NO_CHANGES = pd.DataFrame(
    {"time": pd.Series([], dtype="datetime64[ns, UTC]"), "tag": pd.Series([], dtype=object),
     "value": pd.Series([], dtype="float64"), "good": pd.Series([], dtype=bool),
     "old_value": pd.Series([], dtype="float64"), "old_good": pd.Series([], dtype=bool)}
)


def _changes(
    frame: pd.DataFrame, values: np.ndarray[Any, Any], good: np.ndarray[Any, Any]
) -> pd.DataFrame:
    """The rows of *frame* (readings already stored) whose value or quality differs from
    the stored *values* [SI] and *good* (row for row), with the stored ``old_value`` and
    ``old_good`` beside them. Vectorised: a re-sent export of equal values costs one
    comparison of two arrays."""
    old_value, old_good = values, good
    differ = values_differ(old_value, frame["value"].to_numpy("float64")) | (
        old_good != frame["good"].to_numpy(bool))
    if not differ.any():
        return _NO_CHANGES
    out = frame[differ].reset_index(drop=True)
    out["old_value"] = old_value[differ]
    out["old_good"] = old_good[differ]
    return out


def _source_lines(batch: Batch, changed: pd.DataFrame) -> list[int | None]:
    """The source line of each row of *changed* (prepared readings of *batch*): the line
    of the batch's last row of that (tag, time), as `prepare_readings` keeps the last;
    None for all where the batch does not say."""
    lines = batch.lines if isinstance(batch, FileBatch) else None
    if lines is None or changed.empty:
        return [None] * len(changed)
    given = batch.readings
    by_reading = pd.Series(np.asarray(lines, dtype=np.int64), index=pd.MultiIndex.from_arrays(
        [given["tag"].astype(str), given["time"].dt.tz_convert("UTC").dt.floor("us")]))
    by_reading = by_reading[~by_reading.index.duplicated(keep="last")]
    found = by_reading.reindex(pd.MultiIndex.from_arrays([changed["tag"], changed["time"]]))
    return [None if pd.isna(v) else int(v) for v in found]


def _journal(
    conn: sa.Connection, changed: pd.DataFrame, policy: str, *, source: str, origin: str,
    lines: list[int | None], now: datetime,
) -> tuple[int, int, str | None]:
    """Handle the corrections *changed* under *policy* inside the batch's transaction:
    ``apply`` writes the new values into ``readings``; both journal them (with the source
    *lines*, row for row), a refused one only when the same reading was not refused with
    the same new value before. Returns (applied, refused, an example for the log)."""
    action = "applied" if policy == "apply" else "refused"
    rows = [
        {"tag": tag, "time": time.to_pydatetime(), "old_value": num(ov), "new_value": num(nv),
         "old_good": bool(og), "new_good": bool(ng), "source": source, "origin": origin[:400],
         "line": line, "recorded_at": now, "action": action, "reanalysed_at": None}
        for tag, time, ov, nv, og, ng, line in zip(
            changed["tag"], changed["time"], changed["old_value"], changed["value"],
            changed["old_good"], changed["good"], lines, strict=True)
    ]
    t = corrections_t
    if action == "refused":
        seen: dict[tuple[str, datetime], list[tuple[float | None, bool]]] = {}
        times = [r["time"] for r in rows]
        for tag, time, value, good in conn.execute(
            sa.select(t.c.tag, t.c.time, t.c.new_value, t.c.new_good).where(
                t.c.action == "refused", t.c.tag.in_(sorted(set(changed["tag"]))),
                t.c.time >= min(times), t.c.time <= max(times))
        ).all():
            seen.setdefault((tag, time), []).append((value, bool(good)))
        rows = [r for r in rows if not any(
            good == r["new_good"] and not values_differ(
                np.nan if value is None else value,
                np.nan if r["new_value"] is None else r["new_value"])
            for value, good in seen.get((r["tag"], r["time"]), []))]
    else:
        r_t = readings_t
        conn.execute(
            r_t.update()
            .where(r_t.c.tag == sa.bindparam("b_tag"),
                   r_t.c.time == sa.bindparam("b_time", type_=UTCDateTime()))
            .values(value=sa.bindparam("b_value", type_=sa.Double()),
                    good=sa.bindparam("b_good", type_=sa.Boolean())),
            [{"b_tag": r["tag"], "b_time": r["time"], "b_value": r["new_value"],
              "b_good": r["new_good"]} for r in rows],
        )
    if not rows:
        return 0, 0, None
    conn.execute(t.insert(), rows)
    first = rows[0]
    example = (f"{first['tag']} at {first['time']:%Y-%m-%d %H:%M:%S}Z: stored "
               f"{_shown(first['old_value'])}, now {_shown(first['new_value'])} (SI)")
    if first["old_good"] != first["new_good"]:
        example += f", quality {'good' if first['new_good'] else 'bad'} (was " \
                   f"{'good' if first['old_good'] else 'bad'})"
    return (len(rows), 0, example) if action == "applied" else (0, len(rows), example)


def _shown(value: float | None) -> str:
    return "no value" if value is None else f"{value:.9g}"
