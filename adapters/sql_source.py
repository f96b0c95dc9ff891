"""Readings from a SQL table through SQLAlchemy 2.x (alias ``sql``), any dialect.

This module keeps the source: its settings, the read-only connection with its retries,
and the windowed reads (`SqlSource.read`, `SqlSource.batches`). The table is reflected,
its settings checked and its time bounds worked out in `adapters.sql_table`; the rows a
window fetched become readings and quarantine rows in `adapters.sql_rows`.

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
import time
from collections import Counter
from collections.abc import Callable, Iterable, Iterator, Mapping
from datetime import datetime, timedelta
from pathlib import Path
from typing import Any, TypeVar
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

import numpy as np
import pandas as pd
import sqlalchemy as sa

from adapters.base import ReadingsSource, SourceUnavailable, UnknownTagError
from adapters.credentials import (
    is_authentication_failure,
    mask_secrets,
    parse_url,
    read_url,
    remember_url,
    url_secrets,
)
from adapters.records import Batch, TagSpec, empty_quarantine, empty_readings
from adapters.source_tools import (
    DEFAULT_QUALITY_MAP,
    TIME_REASONS,
    quarantine_frame,
    si_scale_offset,
)
from adapters.sql_rows import SqlRows
from adapters.sql_table import LOCAL_PAD

__all__ = ["CredentialsRefused", "SqlSource"]

log = logging.getLogger(__name__)
T = TypeVar("T")

_READ_ONLY = {
    "postgresql": "SET SESSION CHARACTERISTICS AS TRANSACTION READ ONLY",
    "mysql": "SET SESSION TRANSACTION READ ONLY",
    "mariadb": "SET SESSION TRANSACTION READ ONLY",
    "sqlite": "PRAGMA query_only = ON",
}
_AMBIGUOUS = "ambiguous local time"


class CredentialsRefused(SourceUnavailable):
    """The database refused the login: not retried (retries can lock the account)."""


class SqlSource(SqlRows, ReadingsSource):
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

    def _window(
        self, tags: list[str], start: datetime, end: datetime
    ) -> tuple[pd.DataFrame, pd.DataFrame, dict[str, int]]:
        """Readings, quarantine and notes of ``start <= time < end``."""

        def fetch(conn: sa.Connection) -> tuple[sa.Table, list[Any]]:
            table = self._reflect(conn)
            t = table.c[self.time_column]
            lo, hi = self._to_db(table, start, -LOCAL_PAD), self._to_db(table, end, LOCAL_PAD)
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

    def _mask(self, text: str) -> str:
        """*text* with every password masked (`adapters.credentials.mask_secrets`)."""
        return mask_secrets(text)



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
