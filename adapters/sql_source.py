"""Readings from a SQL table through SQLAlchemy 2.x (alias ``sql``), any dialect.

Two table shapes, names from the config:

* **long** — one row per reading: ``time_column``, ``tag_column``, ``value_column`` and,
  optionally, ``quality_column``;
* **wide** — one row per instant: ``time_column`` and one column per tag (named as the
  tag).

The table and its columns are reflected (``Table(..., autoload_with=...)``) and used as
Column objects, so SQLAlchemy quotes every name: no name is pasted into SQL text. Every
connection is made read-only where the database allows it (PostgreSQL: session
characteristic READ ONLY; MariaDB/MySQL: session transaction READ ONLY; SQLite:
``PRAGMA query_only``) and the source never writes.

Credentials never come from the config file: give ``url_env`` (the name of an
environment variable holding the URL) or ``secrets_file`` (a file whose first
non-comment line is the URL; refused when other users can read it); a plain ``url`` is
accepted only without a password (in its userinfo or its query). Passwords are masked in
every message and log line by `adapters.credentials.mask_secrets`.

Values: NULL is "no value" — a blank value (long layout, quarantined) or a tag not sampled
at that instant (wide layout, skipped). NaN and infinity are values that went wrong: each
such row is quarantined with reason ``value is NaN/inf`` (wide: ``value is NaN/inf:
<tag>``) and counted (``nonfinite_values``). One row each, not one per window: the
overlap re-reads rows, and the store must recognise a quarantined row it already has.

Time: columns with a time zone (PostgreSQL ``timestamptz``) are exact. Naive columns hold
wall time in ``timezone``; a wall time that falls in the repeated hour of a fall-back
change cannot be placed from the database (row order is not a clock), so it is
quarantined as ``ambiguous local time``, and one in the missing spring-forward hour as
``nonexistent local time`` — never shifted. Use UTC or ``timestamptz`` columns to avoid
both. A quarantined row's origin is ``table:tag`` (long) or ``table`` (wide) and its
"line" the stored time as digits, ``YYYYMMDDhhmmss`` (a table has no line numbers).

Incremental reads (`SqlSource.batches`): cursor key is the table name, cursor
``{"time": ISO UTC}``. Windows of ``window`` run from the watermark up to the newest row.
Tie rule at the watermark instant: a full window ``[lo, hi)`` leaves the watermark at
``hi`` and the next window starts there, so nothing is read twice inside a pass; the last
window of a pass leaves the watermark *at* the newest instant read, and the next pass
re-reads that one instant (inclusive). Rows of that instant that arrived late are so
picked up (no gap), and the ones already stored are dropped by the store's idempotent
upsert on (tag, time) (no double in the store).

Back-filled rows (``overlap``): a historian that buffers during a network outage
(store-and-forward) inserts the buffered rows late, with their own, older times — behind
the watermark. So each pass starts ``overlap`` (default 2 h) before the stored watermark
and reads that span again; the store keeps each (tag, time) once and counts only new
readings, and the watermark still advances to the newest instant read. The limit, stated
plainly: **a row whose time is more than ``overlap`` behind the watermark when it is
inserted is missed** — it lies before where the next pass starts, and the source cannot
see that it arrived (it would have to compare the whole table with the store), so nothing
is logged for it.
Set ``overlap`` longer than the longest outage the historian buffers (its
store-and-forward capacity), or re-read a period with ``analyze --from --to`` (the SQL
source keeps its readings, analysis reads the table). The cost is re-reading the overlap
on every pass (``overlap = "0 s"`` turns it off).

When the database goes away, each query is retried with exponential backoff
(``max_tries``, ``backoff_seconds``, doubling); after the last try `SourceUnavailable`
names the host (never the password) and what to check. The watermark only moves with a
delivered batch, so the next run resumes exactly there. A refused login (wrong user or
password: SQLSTATE class 28, MySQL/MariaDB error 1045) is not retried — repeated failed
logins can lock the account — and raises `CredentialsRefused` at the first attempt.
"""

from __future__ import annotations

import functools
import logging
import math
import time
from collections import Counter
from collections.abc import Callable, Iterable, Iterator, Mapping
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any, TypeVar
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

import numpy as np
import numpy.typing as npt
import pandas as pd
import sqlalchemy as sa

from adapters.base import (
    Batch,
    BranchwatchAdapterError,
    ReadingsSource,
    SourceUnavailable,
    TagSpec,
    UnknownTagError,
    empty_quarantine,
    empty_readings,
)
from adapters.credentials import (
    is_authentication_failure,
    mask_secrets,
    parse_url,
    read_url,
    remember_url,
    url_secrets,
)
from adapters.source_tools import (
    DEFAULT_QUALITY_MAP,
    NONFINITE_REASON,
    TIME_REASONS,
    parse_times,
    quality_good,
    quarantine_frame,
    readings_frame,
    si_scale_offset,
)

__all__ = ["CredentialsRefused", "SourceSettingError", "SqlSource"]

log = logging.getLogger(__name__)
T = TypeVar("T")

_READ_ONLY = {
    "postgresql": "SET SESSION CHARACTERISTICS AS TRANSACTION READ ONLY",
    "mysql": "SET SESSION TRANSACTION READ ONLY",
    "mariadb": "SET SESSION TRANSACTION READ ONLY",
    "sqlite": "PRAGMA query_only = ON",
}
# Padding of a window when the column holds local wall time: wider than any UTC offset
# change (DST moves the clock by one hour, a few zones by two), then filtered exactly.
_LOCAL_PAD = timedelta(hours=3)
_AMBIGUOUS = "ambiguous local time"
_PROBE = 100  # distinct text times looked at from each end for one that reads as a time
_OVERFLOW = "value too large: it overflows when converted to SI units"


class CredentialsRefused(SourceUnavailable):
    """The database refused the login: not retried (retries can lock the account)."""


class SourceSettingError(BranchwatchAdapterError, ValueError):
    """A [source] setting does not match the database (a table or column that does not
    exist); *setting* is its key path in the site file, e.g. ``source.table``."""

    def __init__(self, setting: str, message: str) -> None:
        super().__init__(f"{setting}: {message}")
        self.setting = setting


class SqlSource(ReadingsSource):
    """A long or wide historian table; see the module docstring for the rules.

    *window* [s, as timedelta] is the span of one incremental batch; *overlap* [s, as
    timedelta] how far before the stored watermark each pass starts (back-filled rows);
    *start* the first instant to read when no watermark is stored (default: the oldest
    row); *timezone* the zone of naive time columns.
    """

    alias = "sql"
    keeps_readings = True

    def __init__(
        self,
        tags: Iterable[TagSpec],
        *,
        table: str,
        url: str | None = None,
        url_env: str | None = None,
        secrets_file: str | Path | None = None,
        layout: str = "long",
        time_column: str = "time",
        tag_column: str = "tag",
        value_column: str = "value",
        quality_column: str | None = None,
        schema: str | None = None,
        timezone: str = "UTC",
        quality_map: Mapping[str, bool] | None = None,
        window: timedelta = timedelta(days=1),
        overlap: timedelta = timedelta(hours=2),
        start: datetime | None = None,
        max_tries: int = 5,
        backoff_seconds: float = 1.0,
        name: str = "",
    ) -> None:
        super().__init__(tags, name=name)
        if layout not in ("long", "wide"):
            raise ValueError(f"layout must be 'long' or 'wide', got {layout!r}")
        if not table:
            raise ValueError("table must name the readings table")
        if window <= timedelta(0):
            raise ValueError(f"window must be positive, got {window}")
        if overlap < timedelta(0):
            raise ValueError(f"overlap must be zero or positive, got {overlap}")
        if max_tries < 1:
            raise ValueError(f"max_tries must be at least 1, got {max_tries}")
        if start is not None and start.tzinfo is None:
            raise ValueError("start must be timezone-aware (UTC)")
        try:
            self.zone = ZoneInfo(timezone)
        except (ZoneInfoNotFoundError, ValueError) as exc:
            raise ValueError(f"timezone {timezone!r} is not an IANA time zone name") from exc
        self.table_name, self.schema, self.layout = table, schema, layout
        self.time_column, self.tag_column = time_column, tag_column
        self.value_column, self.quality_column = value_column, quality_column
        self.quality_map: Mapping[str, bool] = dict(quality_map or DEFAULT_QUALITY_MAP)
        self.window, self.overlap, self.start = window, overlap, start
        self.max_tries, self.backoff_seconds = int(max_tries), float(backoff_seconds)
        self._si = {tag: si_scale_offset(spec) for tag, spec in self.tags.items()}
        self._url = _resolve_url(url, url_env, secrets_file)
        self._hint = (
            f"the URL in ${url_env}" if url_env
            else f"the URL in {secrets_file}" if secrets_file else "the URL"
        )
        self.where = mask_secrets(self._url.render_as_string(hide_password=True))
        try:
            self._engine = sa.create_engine(self._url, pool_pre_ping=True)
        except (ImportError, sa.exc.NoSuchModuleError) as exc:
            raise ImportError(
                f"the SQL source needs a driver for {self._url.drivername}: "
                f"pip install 'branchwatch[{self._url.get_backend_name()}]' ({exc})"
            ) from None
        statement = _READ_ONLY.get(self._engine.dialect.name)
        if statement:
            sa.event.listen(self._engine, "connect", _read_only_hook(statement))
        self._table: sa.Table | None = None

    # ----------------------------------------------------------------- public API
    @property
    def cursor_key(self) -> str:
        """The key of this table's watermark in the store."""
        return f"{self.schema}.{self.table_name}" if self.schema else self.table_name

    def read(self, tags: Iterable[str], start: datetime, end: datetime) -> pd.DataFrame:
        """Readings of *tags* with ``start <= time < end`` (UTC); bad rows are dropped
        with a logged count (use `batches` to see them in quarantine)."""
        wanted = list(tags)
        for tag in wanted:
            if tag not in self.tags:
                raise UnknownTagError(tag, self.name)
        for arg, value in (("start", start), ("end", end)):
            if value.tzinfo is None:
                raise ValueError(f"{arg} must be timezone-aware (UTC), got {value!r}")
        readings, quarantine, _ = self._window(wanted, start, end)
        if len(quarantine):
            log.warning(
                "%s: %d rows dropped from the read: %s",
                self.where,
                len(quarantine),
                dict(Counter(quarantine["reason"])),
            )
        return readings

    def batches(self, cursors: Mapping[str, Mapping[str, Any]]) -> Iterator[Batch]:
        """Windows from ``overlap`` before the stored watermark up to the newest row
        (tie rule and back-filled rows: module doc)."""
        tags = list(self.tags)
        stored = (cursors.get(self.cursor_key) or {}).get("time")
        oldest, newest, last = self._run("find the time span", self._span)
        if newest is None or oldest is None or last is None:
            return
        lo = pd.Timestamp(stored) if stored else pd.Timestamp(self.start or oldest)
        lo = lo.tz_convert("UTC") if lo.tzinfo else lo.tz_localize("UTC")
        if stored and self.overlap:
            lo -= self.overlap
            if self.start is not None:
                lo = max(lo, pd.Timestamp(self.start).tz_convert("UTC"))
        while lo <= newest:
            hi = lo + self.window
            readings, quarantine, notes = self._window(tags, lo.to_pydatetime(), hi.to_pydatetime())
            if readings.empty and quarantine.empty:
                after = self._run("find the next row", functools.partial(self._next, after=hi))
                lo = max(after, hi) if after is not None else hi
                continue
            # the newest row's own time, not the padded bound: a local wall-time column
            # is searched 3 h beyond it, and rows arriving there later must not be skipped
            mark = last if hi > last else hi
            yield Batch(readings, quarantine, self.cursor_key, {"time": mark.isoformat()}, notes)
            lo = hi

    def check(self) -> list[str]:
        """Reach the database; name missing columns and configured tags with no rows."""
        try:
            table = self._run("reflect the table", self._reflect)
        except (SourceUnavailable, UnknownTagError, ValueError) as exc:
            return [self._mask(str(exc))]
        if self.layout == "wide" or not self.tags:
            return []
        tag_col = table.c[self.tag_column]
        query = sa.select(tag_col).where(tag_col.in_(list(self.tags))).distinct()
        try:
            present = self._run("list tags", lambda c: {r[0] for r in c.execute(query)})
        except SourceUnavailable as exc:
            return [self._mask(str(exc))]
        return [
            f"configured tag {t!r} has no rows in table {self.cursor_key!r}"
            for t in self.tags
            if t not in present
        ]

    def close(self) -> None:
        """Release the connection pool."""
        self._engine.dispose()

    # ----------------------------------------------------------------- database
    def _run(self, what: str, work: Callable[[sa.Connection], T]) -> T:
        """*work* on a fresh connection, retried with exponential backoff (a refused
        login is not retried: `CredentialsRefused`)."""
        delay = self.backoff_seconds
        last = ""
        for attempt in range(1, self.max_tries + 1):
            try:
                with self._engine.connect() as conn:
                    return work(conn)
            except (sa.exc.OperationalError, sa.exc.InterfaceError) as exc:
                last = self._mask(str(getattr(exc, "orig", None) or exc)).strip()
                self._engine.dispose()  # drop pooled connections to the lost server
                if is_authentication_failure(exc):
                    raise CredentialsRefused(
                        f"database at {self._url.host or self._url.database or '?'} "
                        f"({self.where}) refused the login while trying to {what}: "
                        f"{_first_line(last)}; not retried (repeated failed logins can lock "
                        f"the account): check the user and password in {self._hint}"
                    ) from None
                if attempt == self.max_tries:
                    break
                log.warning(
                    "%s: could not %s (try %d of %d): %s; next try in %.1f s",
                    self.where,
                    what,
                    attempt,
                    self.max_tries,
                    last.splitlines()[0],
                    delay,
                )
                time.sleep(delay)
                delay *= 2
        host = self._url.host or self._url.database or "?"
        raise SourceUnavailable(
            f"database at {host} ({self.where}) did not answer after {self.max_tries} tries "
            f"while trying to {what}: {_first_line(last)}; check "
            f"that the server is running and reachable and that {self._hint} is right"
        )

    def _reflect(self, conn: sa.Connection) -> sa.Table:
        if self._table is not None:
            return self._table
        try:
            table = sa.Table(self.table_name, sa.MetaData(), schema=self.schema, autoload_with=conn)
        except sa.exc.NoSuchTableError:
            raise SourceSettingError(
                "source.table",
                f"table {self.cursor_key!r} does not exist at {self.where}; check the spelling "
                "(and [source] schema)",
            ) from None
        wanted = [("time_column", self.time_column)]
        if self.layout == "long":
            wanted += [("tag_column", self.tag_column), ("value_column", self.value_column)]
            if self.quality_column:
                wanted.append(("quality_column", self.quality_column))
        for arg, col in wanted:
            if col not in table.c:
                raise SourceSettingError(
                    f"source.{arg}",
                    f"table {self.cursor_key!r} has no column {col!r}; "
                    f"it has {sorted(table.c.keys())}",
                )
        if self.layout == "wide":
            for tag in self.tags:
                if tag not in table.c:
                    raise UnknownTagError(tag, f"{self.name} ({self.cursor_key})")
        self._table = table
        return table

    def _aware(self, table: sa.Table) -> bool:
        return bool(getattr(table.c[self.time_column].type, "timezone", False))

    def _to_db(self, table: sa.Table, when: datetime, pad: timedelta) -> datetime:
        """A UTC instant as the column stores it (naive local wall time, padded)."""
        when = when.astimezone(UTC)
        if self._aware(table):
            return when
        if self.zone.key == "UTC":
            return when.replace(tzinfo=None)
        return (when + pad).astimezone(self.zone).replace(tzinfo=None)

    def _span(
        self, conn: sa.Connection
    ) -> tuple[pd.Timestamp | None, pd.Timestamp | None, pd.Timestamp | None]:
        """(oldest, newest) padded for local wall time, and the newest row's own time (a
        repeated wall time read as daylight time: the earlier instant)."""
        table = self._reflect(conn)
        t = table.c[self.time_column]
        query = sa.select(sa.func.min(t), sa.func.max(t))
        if self.layout == "long":
            query = query.where(table.c[self.tag_column].in_(list(self.tags)))
        low, high = conn.execute(query).one()
        if low is None:
            return None, None, None
        if isinstance(low, str) or isinstance(high, str):  # a text column may hold garbage
            low, high = self._readable_end(conn, query, t, t.asc()), \
                self._readable_end(conn, query, t, t.desc())
            if low is None or high is None:
                return None, None, None
        pad = timedelta(0) if self._aware(table) or self.zone.key == "UTC" else _LOCAL_PAD
        last = self._utc_bound(high, timedelta(0))
        return self._utc_bound(low, -pad), self._utc_bound(high, pad), last

    def _next(self, conn: sa.Connection, after: pd.Timestamp) -> pd.Timestamp | None:
        table = self._reflect(conn)
        t = table.c[self.time_column]
        bound = self._to_db(table, after.to_pydatetime(), -_LOCAL_PAD)
        query = sa.select(sa.func.min(t)).where(t >= bound)
        if self.layout == "long":
            query = query.where(table.c[self.tag_column].in_(list(self.tags)))
        low = conn.execute(query).scalar()
        if isinstance(low, str):
            low = self._readable_end(conn, query, t, t.asc())
        return None if low is None else self._utc_bound(low, -_LOCAL_PAD)

    def _readable_end(
        self, conn: sa.Connection, query: sa.Select[Any], t: Any, order: Any
    ) -> Any:
        """The first value of a text time column, in *order*, that reads as a time (a
        text that is no time sorts anywhere and must not set the span); None if the
        first `_PROBE` distinct values all fail."""
        probe = sa.select(t).distinct()
        if query.whereclause is not None:
            probe = probe.where(query.whereclause)
        for (value,) in conn.execute(probe.where(t.is_not(None)).order_by(order).limit(_PROBE)):
            try:
                pd.Timestamp(value)
            except (ValueError, TypeError, OverflowError):
                continue
            return value
        return None

    def _utc_bound(self, value: Any, pad: timedelta) -> pd.Timestamp:
        """A DB time as UTC, moved by *pad* when it is local wall time (may be ambiguous)."""
        stamp = pd.Timestamp(value)
        if stamp.tzinfo is not None:
            return stamp.tz_convert("UTC")
        if self.zone.key == "UTC":
            return stamp.tz_localize("UTC")
        return (
            (stamp + pad)
            .tz_localize(self.zone, ambiguous=True, nonexistent="shift_forward")
            .tz_convert("UTC")
        )

    def _window(
        self, tags: list[str], start: datetime, end: datetime
    ) -> tuple[pd.DataFrame, pd.DataFrame, dict[str, int]]:
        """Readings, quarantine and notes of ``start <= time < end``."""

        def fetch(conn: sa.Connection) -> tuple[sa.Table, list[Any]]:
            table = self._reflect(conn)
            t = table.c[self.time_column]
            lo, hi = self._to_db(table, start, -_LOCAL_PAD), self._to_db(table, end, _LOCAL_PAD)
            if self.layout == "long":
                cols = [t, table.c[self.tag_column], table.c[self.value_column]]
                if self.quality_column:
                    cols.append(table.c[self.quality_column])
                query = sa.select(*cols).where(cols[1].in_(tags))
            else:
                query = sa.select(t, *[table.c[tag] for tag in tags])
            return table, list(conn.execute(query.where(t >= lo, t < hi)).all())

        if not tags:
            return empty_readings(), empty_quarantine(), {}
        _, rows = self._run("read readings", fetch)
        if not rows:
            return empty_readings(), empty_quarantine(), {}
        columns = list(zip(*rows, strict=True))
        times, status = self._times(columns[0])
        lo_ns, hi_ns = pd.Timestamp(start).value, pd.Timestamp(end).value
        placed = times.asi8.copy()
        for i in np.flatnonzero(status != 0):  # few rows: place each in exactly one window
            raw = columns[0][i]
            readable = isinstance(raw, datetime)
            placed[i] = self._utc_bound(raw, timedelta(0)).value if readable else lo_ns
        inside = (placed >= lo_ns) & (placed < hi_ns)
        notes: Counter[str] = Counter()
        bad: list[tuple[str, int, str, Any]] = []
        for code in np.unique(status[inside & (status != 0)]):
            reason = _AMBIGUOUS if code == -1 else TIME_REASONS[int(code)]
            for i in np.flatnonzero(inside & (status == code)):
                bad.append((*self._place(columns, int(i)), reason, repr(rows[i])))
        keep = inside & (status == 0)
        if self.layout == "long":
            readings = self._long(columns, times, keep, bad, notes)
        else:
            readings = self._wide(columns, tags, times, keep, bad, notes)
        notes["quarantined"] += len(bad)
        return readings, quarantine_frame(bad), {k: v for k, v in notes.items() if v}

    def _times(self, raw: tuple[Any, ...]) -> tuple[pd.DatetimeIndex, npt.NDArray[np.int8]]:
        """UTC times and a status (0 ok, -1 ambiguous, else `TIME_REASONS` codes)."""
        # A long table repeats each instant once per tag: convert each distinct value once
        # (datetime objects convert one by one, in Python).
        codes, uniques = pd.factorize(pd.Series(raw, dtype=object), use_na_sentinel=True)
        utc, status = self._times_distinct(tuple(uniques))
        utc_ns = np.append(utc.asi8, np.iinfo(np.int64).min)[codes]  # -1 (NULL) → NaT
        status = np.append(status, np.int8(1))[codes]
        return pd.DatetimeIndex(utc_ns.view("datetime64[ns]")).tz_localize("UTC"), status

    def _times_distinct(
        self, raw: tuple[Any, ...]
    ) -> tuple[pd.DatetimeIndex, npt.NDArray[np.int8]]:
        sample = next((v for v in raw if v is not None), None)
        if isinstance(sample, str):  # a text column (SQLite without a declared type)
            return parse_times(list(raw), self.zone)
        status = np.zeros(len(raw), dtype=np.int8)
        if sample is not None and getattr(sample, "tzinfo", None) is not None:
            utc = pd.DatetimeIndex(pd.to_datetime(list(raw), utc=True)).as_unit("ns")
            status[utc.isna()] = 1
            return utc, status
        wall = pd.DatetimeIndex(pd.to_datetime(list(raw))).as_unit("ns")
        status[wall.isna()] = 1
        if self.zone.key == "UTC":
            return wall.tz_localize("UTC"), status
        local = wall.tz_localize(self.zone, ambiguous="NaT", nonexistent="NaT")
        as_dst = wall.tz_localize(self.zone, ambiguous=np.ones(len(wall), bool), nonexistent="NaT")
        lost = local.isna() & (status == 0)
        nonexistent = lost & as_dst.isna()
        status[nonexistent] = 3
        status[lost & ~nonexistent] = -1
        return local.tz_convert("UTC"), status

    def _long(
        self,
        columns: list[tuple[Any, ...]],
        times: pd.DatetimeIndex,
        keep: npt.NDArray[np.bool_],
        bad: list[tuple[str, int, str, Any]],
        notes: Counter[str],
    ) -> pd.DataFrame:
        tags = np.asarray(columns[1], dtype=object)
        values = _floats(columns[2])
        odd = keep & _nonfinite(columns[2], values)
        if odd.any():
            notes["nonfinite_values"] += int(odd.sum())
            for i in np.flatnonzero(odd):
                row = _row(columns, int(i))
                bad.append((*self._place(columns, int(i)), NONFINITE_REASON, repr(row)))
            keep = keep & ~odd
        blank = keep & ~np.isfinite(values)
        for i in np.flatnonzero(blank):
            row = (columns[0][i], columns[1][i], columns[2][i])
            reason = "blank value" if columns[2][i] is None else "value is not a number"
            bad.append((*self._place(columns, int(i)), reason, repr(row)))
        keep = keep & ~blank
        good = np.ones(len(tags), dtype=bool)
        if self.quality_column:
            good, unmapped = quality_good(columns[3], self.quality_map)
            notes["unmapped_quality"] += unmapped
        ids, uniques = pd.factorize(tags)
        scale = np.array([self._si[str(u)][0] for u in uniques])
        offset = np.array([self._si[str(u)][1] for u in uniques])
        with np.errstate(over="ignore", invalid="ignore"):
            si = values * scale[ids] + offset[ids]
        for i in np.flatnonzero(keep & ~np.isfinite(si)):
            bad.append((*self._place(columns, int(i)), _OVERFLOW, repr(_row(columns, int(i)))))
            keep = keep & (np.arange(len(keep)) != i)
        return readings_frame(times.asi8[keep], tags[keep], si[keep], good[keep])

    def _wide(
        self,
        columns: list[tuple[Any, ...]],
        tags: list[str],
        times: pd.DatetimeIndex,
        keep: npt.NDArray[np.bool_],
        bad: list[tuple[str, int, str, Any]],
        notes: Counter[str],
    ) -> pd.DataFrame:
        parts_t, parts_v, counts = [], [], []
        for j, tag in enumerate(tags, start=1):
            values = _floats(columns[j])
            odd = keep & _nonfinite(columns[j], values)
            if odd.any():  # NULL is "not sampled"; NaN and infinity are values gone wrong
                notes["nonfinite_values"] += int(odd.sum())
                reason = f"{NONFINITE_REASON}: {tag}"
                for i in np.flatnonzero(odd):
                    row = _row(columns, int(i))
                    bad.append((*self._place(columns, int(i)), reason, repr(row)))
            ok = keep & np.isfinite(values)
            scale, offset = self._si[tag]
            with np.errstate(over="ignore", invalid="ignore"):
                si = values * scale + offset
            for i in np.flatnonzero(ok & ~np.isfinite(si)):
                row = _row(columns, int(i))
                bad.append((*self._place(columns, int(i)), f"{_OVERFLOW}: {tag}", repr(row)))
            ok &= np.isfinite(si)
            parts_t.append(times.asi8[ok])
            parts_v.append(si[ok])
            counts.append(int(ok.sum()))
        names = np.repeat(np.array(tags, dtype=object), counts)
        return readings_frame(np.concatenate(parts_t), names, np.concatenate(parts_v), None)

    def _place(self, columns: list[tuple[Any, ...]], i: int) -> tuple[str, int]:
        """Quarantine origin and "line" of row *i*: a table has no line numbers, so the
        origin is the table (and tag, long layout) and the line the stored time as
        digits (YYYYMMDDhhmmss) — stable, so a re-read quarantines the same row again."""
        origin = f"{self.cursor_key}:{columns[1][i]}" if self.layout == "long" else self.cursor_key
        stamp = columns[0][i]
        line = int(stamp.strftime("%Y%m%d%H%M%S")) if isinstance(stamp, datetime) else 0
        return origin, line

    def _mask(self, text: str) -> str:
        """*text* with every password masked (`adapters.credentials.mask_secrets`)."""
        return mask_secrets(text)


def _nonfinite(raw: tuple[Any, ...], values: npt.NDArray[np.float64]) -> npt.NDArray[np.bool_]:
    """Cells that hold NaN or infinity (a stored float, or text that spells one), not NULL."""
    gone = ~np.isfinite(values)
    if not gone.any():
        return gone
    return gone & np.array(
        [v is not None and _spells_nonfinite(v) for v in raw], dtype=bool
    )


def _spells_nonfinite(value: Any) -> bool:
    if isinstance(value, float):
        return not math.isfinite(value)
    if isinstance(value, str):
        return value.strip().lower().lstrip("+-") in ("nan", "inf", "infinity")
    try:
        return not math.isfinite(float(value))  # Decimal('NaN') and the like
    except (TypeError, ValueError):
        return False


def _row(columns: list[tuple[Any, ...]], i: int) -> tuple[Any, ...]:
    """Row *i* of column tuples, for a quarantine row's raw text."""
    return tuple(col[i] for col in columns)


def _floats(values: tuple[Any, ...]) -> npt.NDArray[np.float64]:
    try:
        return np.asarray(values, dtype=np.float64)
    except (TypeError, ValueError):  # text in a numeric column: what does not parse is NaN
        series = pd.to_numeric(pd.Series(values, dtype=object), errors="coerce")
        return series.to_numpy(dtype=np.float64, copy=True)


def _read_only_hook(statement: str) -> Callable[[Any, Any], None]:
    def hook(dbapi_connection: Any, _record: Any) -> None:
        cursor = dbapi_connection.cursor()
        try:
            cursor.execute(statement)
        finally:
            cursor.close()
        # Commit so the session setting outlives the implicit transaction it ran in.
        dbapi_connection.commit()

    return hook


def _resolve_url(url: str | None, url_env: str | None, secrets_file: str | Path | None) -> sa.URL:
    given = [
        n for n, v in (("url", url), ("url_env", url_env), ("secrets_file", secrets_file)) if v
    ]
    if len(given) != 1:
        raise ValueError(
            f"give exactly one of url, url_env, secrets_file (got {', '.join(given) or 'none'})"
        )
    text = url if url else read_url(url_env=url_env, secrets_file=secrets_file)
    parsed = parse_url(text, f"secrets_file: {secrets_file}" if secrets_file else given[0])
    if url and url_secrets(parsed):
        raise ValueError(
            "url: a password in the config is not allowed; put the URL in an environment "
            "variable (url_env) or a secrets file (secrets_file)"
        )
    remember_url(parsed)
    return parsed


def _first_line(text: str) -> str:
    return text.splitlines()[0] if text.strip() else "no message"
