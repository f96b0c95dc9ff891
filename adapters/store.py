"""The SQLAlchemy results store: everything branchwatch ingests and learns, in one database.

`SqlStore` (alias ``sqlalchemy``) takes any SQLAlchemy URL: SQLite is the embedded
default (WAL journal, busy timeout, ``BEGIN IMMEDIATE`` for writes, so a report reading
while the daemon writes neither blocks nor deadlocks), PostgreSQL serves shared
installations, MariaDB/MySQL work too. The schema is created and upgraded by the
packaged Alembic migrations (``adapters/migrations``) each time a store is opened; an
up-to-date database makes that a no-op.

Tables
------
``readings`` (tag, time) · ``cursors`` (source, key) · ``quarantine`` · ``fits`` (branch,
window_start, window_end) · ``findings`` (branch, kind, start) · ``alarms`` (branch,
condition) and its journal ``alarm_events`` · ``maintenance`` · ``job_runs`` ·
``data_health`` (tag, day, flag) · ``corrections`` (the journal of changed readings). The
natural key of each is in brackets.

Writes
------
Every public write is one transaction. Upserts on natural keys use each dialect's own
statement — ``INSERT … ON CONFLICT`` on SQLite and PostgreSQL, ``INSERT … ON DUPLICATE
KEY UPDATE`` on MariaDB/MySQL — and a delete-then-insert inside the same transaction on
any other dialect. A (tag, time) already stored keeps its first value unless the site's
corrections policy says ``apply``: `SqlStore.write_batch` compares the batch with what is
stored before the insert (one range read, compared as arrays), inserts only the new
readings (the insert itself still ignores conflicts, so a concurrent writer cannot make
it fail), and journals each reading the batch changes — applied or refused — in
``corrections``, in the same transaction.

Times
-----
UTC throughout: ``timestamptz`` on PostgreSQL, naive UTC ``DATETIME(6)`` on
MariaDB/MySQL, ISO text on SQLite; every read returns aware UTC (``datetime64[ns, UTC]``
in frames). Readings times are kept to the microsecond (finer parts are dropped).
"""

from __future__ import annotations

import logging
import os
import re
import signal
import stat
import threading
from collections.abc import Iterable, Iterator, Mapping, Sequence
from contextlib import contextmanager
from datetime import UTC, date, datetime, timedelta
from pathlib import Path
from typing import Any, ClassVar

import numpy as np
import pandas as pd
import sqlalchemy as sa

from adapters.base import (
    ALARM_STATES,
    CORRECTION_POLICIES,
    MAINTENANCE_KINDS,
    AlarmStateName,
    Batch,
    BatchWrite,
    ResultsStore,
    StoreError,
    empty_readings,
    values_differ,
)
from adapters.credentials import (
    is_authentication_failure,
    mask_secrets,
    parse_url,
    remember_url,
)
from adapters.migrations.dialects import (
    CHUNK,
    copy_readings_pg,
    dumps,
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
    ALARM_COLUMNS,
    FINDING_COLUMNS,
    FIT_COLUMNS,
    FIT_FLOATS,
    UTCDateTime,
    alarm_events_t,
    alarms_t,
    corrections_t,
    cursors_t,
    data_health_t,
    findings_t,
    fits_t,
    header_balance_t,
    job_runs_t,
    maintenance_t,
    outbox_t,
    quarantine_t,
    readings_raw,
    readings_t,
    utc_datetime,
    window_checks_t,
)

__all__ = [
    "ALARM_STATES",
    "FINDING_COLUMNS",
    "FIT_COLUMNS",
    "MAINTENANCE_KINDS",
    "SqlStore",
    "Watermarks",
]

log = logging.getLogger(__name__)

_MIGRATIONS = Path(__file__).resolve().parent / "migrations"
_MIGRATE_LOCK_ID = 0x6277_6D69  # any constant; "bwmi" — shared by every branchwatch
_IDENT = re.compile(r"^[A-Za-z_][A-Za-z0-9_]{0,62}$")


#: What `SqlStore.watermarks` returns (defined with the interface).
Watermarks = ResultsStore.Watermarks


@contextmanager
def _interrupt_deferred() -> Iterator[None]:
    """Hold Ctrl-C (SIGINT) back until the block ends, then raise KeyboardInterrupt.

    A KeyboardInterrupt inside a driver call leaves the SQLite connection's statement
    alive in a reference cycle until the garbage collector runs: its transaction keeps
    the write lock, and the next write (the job's own record of the interruption) waits
    for the busy timeout and fails. Deferred, the transaction commits or rolls back
    whole first. Only Python's default handler in the main thread is replaced: a
    program that installed its own (the daemon) keeps it.
    """
    if (
        threading.current_thread() is not threading.main_thread()
        or signal.getsignal(signal.SIGINT) is not signal.default_int_handler
    ):
        yield
        return
    caught: list[int] = []
    signal.signal(signal.SIGINT, lambda signum, _frame: caught.append(signum))
    try:
        yield
    finally:
        signal.signal(signal.SIGINT, signal.default_int_handler)
        if caught:
            raise KeyboardInterrupt


def _reopen(url: str, schema: str | None, busy_timeout_s: float) -> SqlStore:
    return SqlStore(url, schema=schema, migrate=False, busy_timeout_s=busy_timeout_s)


def _name(value: Any, name: str, limit: int) -> str:
    if not isinstance(value, str) or not value or len(value) > limit:
        raise ValueError(f"{name} must be a non-empty string of at most {limit} characters")
    return value


class SqlStore(ResultsStore):
    """Results store on any SQLAlchemy database.

    Parameters
    ----------
    url
        SQLAlchemy URL, e.g. ``sqlite:///var/branchwatch.db`` or
        ``postgresql+psycopg://branchwatch@db/plant`` (credentials belong in the
        environment, not the config file).
    schema
        Keep the tables in this schema (PostgreSQL) or database (MariaDB/MySQL), created
        if missing; not available on SQLite (use another file).
    migrate
        Bring the schema up to date on open (default). With ``False`` the store trusts
        that someone else did.
    busy_timeout_s
        SQLite only: how long a writer waits for another writer's lock [s].
    """

    alias: ClassVar[str] = "sqlalchemy"

    def __init__(
        self,
        url: str,
        *,
        schema: str | None = None,
        migrate: bool = True,
        busy_timeout_s: float = 30.0,
    ) -> None:
        parsed = parse_url(url, "url")
        remember_url(parsed)
        if schema is not None and not _IDENT.match(schema):
            raise ValueError(
                f"schema must be a plain identifier ([A-Za-z_][A-Za-z0-9_]*), got {schema!r}"
            )
        self.url = parsed
        self.schema = schema
        self.busy_timeout_s = busy_timeout_s
        self.dialect = parsed.get_backend_name()
        if self.dialect == "sqlite":
            if schema is not None:
                raise ValueError("schema is not supported on SQLite; use another database file")
            if parsed.database and parsed.database != ":memory:":
                _private_sqlite_file(Path(parsed.database))
        elif schema is not None:
            self._create_schema(parsed, schema)
        try:
            self.engine = sa.create_engine(
                parsed, json_serializer=dumps, pool_pre_ping=self.dialect != "sqlite"
            )
        except ImportError as exc:
            raise StoreError(
                f"the results store needs a driver for {parsed.drivername}: pip install "
                f"'branchwatch[{self.dialect}]' ({exc})"
            ) from None
        self._install_hooks(busy_timeout_s)
        if migrate:
            self.migrate()

    # setup ---------------------------------------------------------------------------
    def _create_schema(self, url: sa.URL, schema: str) -> None:
        boot = sa.create_engine(url)
        try:
            quoted = boot.dialect.identifier_preparer.quote_identifier(schema)
            word = "SCHEMA" if self.dialect == "postgresql" else "DATABASE"
            with boot.begin() as conn:
                conn.exec_driver_sql(f"CREATE {word} IF NOT EXISTS {quoted}")
        except sa.exc.SQLAlchemyError as exc:
            raise self._error(f"cannot create schema {schema!r}", exc) from exc
        finally:
            boot.dispose()

    def _install_hooks(self, busy_timeout_s: float) -> None:
        schema, dialect = self.schema, self.dialect

        if dialect == "sqlite":

            @sa.event.listens_for(self.engine, "connect")
            def _sqlite_connect(dbapi_conn: Any, _record: Any) -> None:
                # Let SQLAlchemy, not the driver, open transactions (pysqlite's own
                # handling would defer BEGIN and break one-transaction writes).
                dbapi_conn.isolation_level = None
                cur = dbapi_conn.cursor()
                cur.execute("PRAGMA journal_mode=WAL")
                cur.execute(f"PRAGMA busy_timeout={int(busy_timeout_s * 1000)}")
                cur.execute("PRAGMA synchronous=NORMAL")  # durable enough with WAL
                cur.close()

            @sa.event.listens_for(self.engine, "begin")
            def _sqlite_begin(conn: sa.Connection) -> None:
                # A write takes the lock at BEGIN: a deferred read-then-write upgrade
                # would fail at once under contention instead of waiting.
                write = conn.get_execution_options().get("bw_write", False)
                conn.exec_driver_sql("BEGIN IMMEDIATE" if write else "BEGIN")

        elif schema is not None:
            statement = (
                f'SET search_path TO "{schema}"' if dialect == "postgresql" else f"USE `{schema}`"
            )

            @sa.event.listens_for(self.engine, "connect", insert=True)
            def _use_schema(dbapi_conn: Any, _record: Any) -> None:
                autocommit = getattr(dbapi_conn, "autocommit", None)
                if dialect == "postgresql":
                    dbapi_conn.autocommit = True
                cur = dbapi_conn.cursor()
                cur.execute(statement)
                cur.close()
                if dialect == "postgresql":
                    dbapi_conn.autocommit = autocommit

    def migrate(self) -> None:
        """Upgrade the schema to the newest packaged migration (no-op when current)."""
        from alembic import command
        from alembic.config import Config

        cfg = Config()
        cfg.set_main_option("script_location", str(_MIGRATIONS).replace("%", "%%"))
        try:
            with self._write() as conn:
                # Two processes opening a new database at once (daemon and CLI) must not
                # both create the tables: serialise on a server lock (SQLite: BEGIN
                # IMMEDIATE already does).
                if self.dialect == "postgresql":
                    conn.exec_driver_sql(f"SELECT pg_advisory_xact_lock({_MIGRATE_LOCK_ID})")
                elif self.dialect in ("mysql", "mariadb"):
                    conn.exec_driver_sql("SELECT GET_LOCK('branchwatch_migrate', 60)")
                cfg.attributes["connection"] = conn
                try:
                    command.upgrade(cfg, "head")
                finally:
                    if self.dialect in ("mysql", "mariadb"):
                        conn.exec_driver_sql("SELECT RELEASE_LOCK('branchwatch_migrate')")
        except StoreError as exc:
            if isinstance(exc.__cause__, sa.exc.SQLAlchemyError):
                raise self._error("cannot migrate the results store schema",
                                  exc.__cause__) from exc
            raise

    @contextmanager
    def _write(self) -> Iterator[sa.Connection]:
        """One write transaction; database errors come out as `StoreError`.

        Ctrl-C during it takes effect when it has ended (`_interrupt_deferred`).
        """
        try:
            with _interrupt_deferred(), self.engine.connect() as conn:
                conn = conn.execution_options(bw_write=True)
                with conn.begin():
                    yield conn
        except sa.exc.SQLAlchemyError as exc:
            raise self._error("results store write failed", exc) from exc

    @contextmanager
    def _read(self) -> Iterator[sa.Connection]:
        try:
            with self.engine.connect() as conn:
                yield conn
        except sa.exc.SQLAlchemyError as exc:
            raise self._error("results store read failed", exc) from exc

    def _error(self, what: str, exc: sa.exc.SQLAlchemyError) -> StoreError:
        """A masked `StoreError`; a refused login says so on one line (the store never
        retries a connection, so a wrong password costs one failed login)."""
        where = mask_secrets(self.url.render_as_string(hide_password=True))
        if is_authentication_failure(exc):
            first = mask_secrets(str(getattr(exc, "orig", None) or exc)).strip().splitlines()
            return StoreError(
                f"results store at {where} refused the login: "
                f"{first[0] if first else 'no message'}; check the user and password of the "
                "[store] URL (url_env or secrets_file)"
            )
        return StoreError(mask_secrets(f"{what} ({where}): {exc}"))

    def close(self) -> None:
        """Release the connection pool."""
        self.engine.dispose()

    def __enter__(self) -> SqlStore:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def __repr__(self) -> str:
        return f"SqlStore({mask_secrets(self.url.render_as_string(hide_password=True))!r})"

    @property
    def shared(self) -> bool:
        """A database server is; a SQLite file is not (it lives on one machine's disk, and
        SQLite's locking is not safe over network file systems)."""
        return self.dialect != "sqlite"

    def __reduce__(self) -> tuple[Any, ...]:
        """Pickled as the way to open it again (a worker process opens its own
        connections); the schema is up to date already. An in-memory SQLite database
        lives in this process only and cannot be reopened."""
        if self.dialect == "sqlite" and self.url.database in (None, "", ":memory:"):
            raise TypeError("an in-memory SQLite store cannot be opened in another process")
        url = self.url.render_as_string(hide_password=False)
        return (_reopen, (url, self.schema, self.busy_timeout_s))

    # readings and ingest bookkeeping -------------------------------------------------
    def write_batch(
        self, batch: Batch, *, source: str, corrections: str = "refuse"
    ) -> BatchWrite:
        """Store a batch's readings, quarantine rows and cursor in one transaction.

        Readings whose (tag, time) is not stored yet are inserted; within the batch a
        repeated (tag, time) keeps its last row. A stored reading the batch brings again
        with an equal value (`values_differ`) and quality is skipped; with another value
        or quality it is a correction, handled by *corrections* (see
        `ResultsStore.write_batch`) and journalled in ``corrections``.

        Parameters
        ----------
        batch
            Readings frame (see `adapters.base`), quarantine frame and cursor.
        source
            Name of the source the cursor belongs to [-].
        corrections
            ``"refuse"`` (keep the stored value) or ``"apply"`` (take the batch's) [-].

        Returns
        -------
        BatchWrite
            Readings newly stored, corrections applied and newly refused [-].
        """
        _name(source, "source", 100)
        _name(batch.cursor_key, "batch.cursor_key", 400)
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
                    now=now)
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

    # fits and findings ---------------------------------------------------------------
    def upsert_fits(self, rows: Iterable[Mapping[str, Any]]) -> int:
        """Store fit results, one per (branch, window_start, window_end), replacing any.

        Each row has the keys of `FIT_COLUMNS` (``computed_at`` defaults to now; the
        optional numbers may be missing or NaN, stored as NULL). Returns the rows written.
        """
        out = _fit_records(rows)
        with self._write() as conn:
            upsert(conn, fits_t, out, ("branch", "window_start", "window_end"), replace=True)
        return len(out)

    def store_window(
        self,
        *,
        fits: Iterable[Mapping[str, Any]],
        screening: pd.DataFrame,
        balance: Mapping[str, Any] | None,
        health: pd.DataFrame,
    ) -> None:
        """Everything one analysis window produced, in one transaction.

        *fits* as in `upsert_fits`; *screening* with columns branch, window_start,
        window_end, tag, frozen, out_of_range, spikes, samples; *balance* with
        window_start, window_end, residual_m3s, uncertainty_m3s, samples (or None);
        *health* as in `add_data_health`. Rows on the same natural keys are replaced.
        """
        fit_rows = _fit_records(fits)
        checks = [
            {
                "branch": str(b), "window_start": utc_datetime(ws, "window_start"),
                "window_end": utc_datetime(we, "window_end"), "tag": str(t),
                "frozen": int(fr), "out_of_range": int(oor), "spikes": int(sp),
                "samples": int(n),
            }
            for b, ws, we, t, fr, oor, sp, n in zip(
                screening["branch"], screening["window_start"], screening["window_end"],
                screening["tag"], screening["frozen"], screening["out_of_range"],
                screening["spikes"], screening["samples"], strict=True,
            )
        ]
        health_rows = _health_records(health)
        with self._write() as conn:
            upsert(conn, fits_t, fit_rows, ("branch", "window_start", "window_end"),
                   replace=True)
            if checks:
                upsert(conn, window_checks_t, checks,
                       ("branch", "window_start", "window_end", "tag"), replace=True)
            if balance is not None:
                row = _record(balance, tuple(c.name for c in header_balance_t.columns),
                              ("window_start", "window_end"), "balance")
                upsert(conn, header_balance_t, [row], ("window_start", "window_end"),
                       replace=True)
            if health_rows:
                upsert(conn, data_health_t, health_rows, ("tag", "day", "flag"), replace=True)

    def read_screening(
        self, start: datetime | None = None, end: datetime | None = None
    ) -> pd.DataFrame:
        """Screening counts per window and tag, windows starting in ``[start, end)``."""
        t = window_checks_t
        query = sa.select(t).order_by(t.c.window_start, t.c.branch, t.c.tag)
        if start is not None:
            query = query.where(t.c.window_start >= utc_datetime(start, "start"))
        if end is not None:
            query = query.where(t.c.window_start < utc_datetime(end, "end"))
        return self._frame(query, t)

    def read_balance(
        self, start: datetime | None = None, end: datetime | None = None
    ) -> pd.DataFrame:
        """Header mass balance per window, windows starting in ``[start, end)``."""
        t = header_balance_t
        query = sa.select(t).order_by(t.c.window_start)
        if start is not None:
            query = query.where(t.c.window_start >= utc_datetime(start, "start"))
        if end is not None:
            query = query.where(t.c.window_start < utc_datetime(end, "end"))
        return self._frame(query, t)

    def read_fits(
        self,
        branch: str | None = None,
        start: datetime | None = None,
        end: datetime | None = None,
    ) -> pd.DataFrame:
        """Fits of one branch or all, windows starting in ``[start, end)``, oldest first."""
        query = sa.select(fits_t).order_by(fits_t.c.branch, fits_t.c.window_start)
        if branch is not None:
            query = query.where(fits_t.c.branch == branch)
        if start is not None:
            query = query.where(fits_t.c.window_start >= utc_datetime(start, "start"))
        if end is not None:
            query = query.where(fits_t.c.window_start < utc_datetime(end, "end"))
        return self._frame(query, fits_t)

    def upsert_findings(self, rows: Iterable[Mapping[str, Any]]) -> int:
        """Store findings keyed on (branch, kind, start), replacing any stored one.

        Keys as in `FINDING_COLUMNS` (DESIGN §5): ``end`` may be None (still open),
        ``evidence`` a mapping of numbers; ``updated`` defaults to now.
        """
        now = datetime.now(UTC)
        out = []
        for row in rows:
            rec = _record(
                row,
                FINDING_COLUMNS,
                ("branch", "kind", "start", "detected", "confidence", "message"),
                "finding",
            )
            rec["confidence"] = float(rec["confidence"])
            if not 0.0 <= rec["confidence"] <= 1.0:
                raise ValueError(f"finding confidence must be in [0, 1], got {rec['confidence']}")
            rec["evidence"] = dict(rec["evidence"] or {})
            rec["updated"] = rec.get("updated") or now
            out.append(rec)
        with self._write() as conn:
            upsert(conn, findings_t, out, ("branch", "kind", "start"), replace=True)
        return len(out)

    def read_findings(
        self,
        branch: str | None = None,
        *,
        kind: str | None = None,
        since: datetime | None = None,
        open_only: bool = False,
    ) -> pd.DataFrame:
        """Findings (of a branch, of a kind, detected at or after *since*, still open)."""
        query = sa.select(findings_t).order_by(findings_t.c.detected, findings_t.c.branch)
        if branch is not None:
            query = query.where(findings_t.c.branch == branch)
        if kind is not None:
            query = query.where(findings_t.c.kind == kind)
        if since is not None:
            query = query.where(findings_t.c.detected >= utc_datetime(since, "since"))
        if open_only:
            query = query.where(findings_t.c.end.is_(None))
        return self._frame(query, findings_t)

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
            rec = _record(row, ALARM_COLUMNS, ("branch", "condition", "state"), "alarm")
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
            rec["key"] = _name(rec["key"], "message key", 200)
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

    # maintenance, job runs, data health ----------------------------------------------
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
        branch = _name(branch, "branch", 100)
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
            withdrawn_at=when, withdrawn_by=_name(by, "by", 100), withdrawn_note=note))

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

    def record_job_run(
        self,
        job: str,
        started: datetime,
        finished: datetime | None,
        status: str,
        detail: Mapping[str, Any] | None = None,
    ) -> None:
        """Record a job run; the same (job, started) again replaces it (e.g. when it ends).

        Text in *detail* is masked (`mask_secrets`): an error message that quotes a URL
        must not leave a password in the table.
        """
        row = {
            "job": _name(job, "job", 100),
            "started": utc_datetime(started, "started"),
            "finished": None if finished is None else utc_datetime(finished, "finished"),
            "status": _name(status, "status", 20),
            "detail": _masked(dict(detail or {})),
        }
        with self._write() as conn:
            upsert(conn, job_runs_t, [row], ("job", "started"), replace=True)

    def job_runs(self, limit: int = 20, job: str | None = None) -> pd.DataFrame:
        """The newest *limit* job runs (of one *job* or all), newest first."""
        if limit < 1:
            raise ValueError(f"limit must be at least 1, got {limit}")
        query = sa.select(job_runs_t).order_by(job_runs_t.c.started.desc()).limit(limit)
        if job is not None:
            query = query.where(job_runs_t.c.job == job)
        frame = self._frame(query, job_runs_t)
        if "detail" in frame.columns:  # rows written before masking existed
            frame["detail"] = [_masked(d) for d in frame["detail"]]
        return frame

    def add_data_health(self, frame: pd.DataFrame) -> int:
        """Store screening counts (columns tag, day, flag, count); a stored day is replaced.

        ``day`` is the UTC day (a date, or a timestamp at UTC midnight).
        """
        missing = {"tag", "day", "flag", "count"} - set(frame.columns)
        if missing:
            raise ValueError(f"frame lacks data-health columns {sorted(missing)}")
        rows = _health_records(frame)
        with self._write() as conn:
            upsert(conn, data_health_t, rows, ("tag", "day", "flag"), replace=True)
        return len(rows)

    def data_health(self, start: datetime, end: datetime) -> pd.DataFrame:
        """Counts of UTC days in ``[start, end)``: tag, day (UTC midnight), flag, count."""
        lo, hi = utc_datetime(start, "start").date(), utc_datetime(end, "end")
        query = (
            sa.select(data_health_t)
            .where(data_health_t.c.day >= lo, data_health_t.c.day < _ceil_day(hi))
            .order_by(data_health_t.c.day, data_health_t.c.tag, data_health_t.c.flag)
        )
        out = self._frame(query, data_health_t)
        out["day"] = pd.to_datetime(out["day"]).dt.tz_localize("UTC").dt.as_unit("ns")
        out["count"] = out["count"].astype("int64")
        return out

    def watermarks(self) -> Watermarks:
        """How far readings, cursors, fits and jobs have got (for ``status``)."""
        raw_last = time_text(sa.func.max(readings_t.c.time), self.dialect)
        with self._read() as conn:
            last = conn.execute(
                sa.select(readings_t.c.tag, raw_last)
                .group_by(readings_t.c.tag)
                .order_by(readings_t.c.tag)
            ).all()
        readings = pd.DataFrame(
            {
                "tag": pd.Series([r[0] for r in last], dtype=object),
                "last": to_utc_index([r[1] for r in last]),
            }
        )
        cur = self._frame(
            sa.select(cursors_t.c.source, cursors_t.c.key, cursors_t.c.updated).order_by(
                cursors_t.c.source, cursors_t.c.key
            ),
            cursors_t,
        )
        last_fit = sa.func.max(fits_t.c.window_end).label("last_window_end")
        fits = self._frame(
            sa.select(fits_t.c.branch, last_fit)
            .group_by(fits_t.c.branch)
            .order_by(fits_t.c.branch),
            fits_t,
            extra_times=("last_window_end",),
        )
        newest = (
            sa.select(job_runs_t.c.job, sa.func.max(job_runs_t.c.started).label("s"))
            .group_by(job_runs_t.c.job)
            .subquery()
        )
        jobs = self._frame(
            sa.select(
                job_runs_t.c.job, job_runs_t.c.started.label("last_started"), job_runs_t.c.status
            )
            .join(
                newest,
                sa.and_(newest.c.job == job_runs_t.c.job, newest.c.s == job_runs_t.c.started),
            )
            .order_by(job_runs_t.c.job),
            job_runs_t,
            extra_times=("last_started",),
        )
        return Watermarks(readings=readings, cursors=cur, fits=fits, jobs=jobs)

    def _frame(
        self, query: sa.Select[Any], table: sa.Table, extra_times: Sequence[str] = ()
    ) -> pd.DataFrame:
        """Run *query*; time columns become ``datetime64[ns, UTC]``, NULL numbers NaN."""
        with self._read() as conn:
            result = conn.execute(query)
            names = list(result.keys())
            frame = pd.DataFrame(result.all(), columns=names, dtype=object)
        times = {c.name for c in table.columns if isinstance(c.type, UTCDateTime)}
        for col in names:
            if col in times or col in extra_times:
                frame[col] = to_utc_index(frame[col].to_numpy())
            elif col in table.c and isinstance(table.c[col].type, sa.Double):
                frame[col] = frame[col].astype("float64")
            elif col in table.c and isinstance(table.c[col].type, sa.Integer):
                # a nullable integer (maintenance.replaces) keeps its NULLs as <NA>
                frame[col] = frame[col].astype("Int64" if frame[col].isna().any() else "int64")
        return frame


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


def _journal(
    conn: sa.Connection, changed: pd.DataFrame, policy: str, *, source: str, origin: str,
    now: datetime,
) -> tuple[int, int, str | None]:
    """Handle the corrections *changed* under *policy* inside the batch's transaction:
    ``apply`` writes the new values into ``readings``; both journal them, a refused one
    only when the same reading was not refused with the same new value before. Returns
    (applied, refused, an example for the log)."""
    action = "applied" if policy == "apply" else "refused"
    rows = [
        {"tag": tag, "time": time.to_pydatetime(), "old_value": num(ov), "new_value": num(nv),
         "old_good": bool(og), "new_good": bool(ng), "source": source, "origin": origin[:400],
         "line": None, "recorded_at": now, "action": action, "reanalysed_at": None}
        for tag, time, ov, nv, og, ng in zip(
            changed["tag"], changed["time"], changed["old_value"], changed["value"],
            changed["old_good"], changed["good"], strict=True)
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


def _private_sqlite_file(path: Path) -> None:
    """Create the SQLite file readable by its owner and group only (0o640); SQLite gives
    its -wal and -shm files the database file's mode. An existing file of ours that
    others can read is tightened the same way."""
    path.parent.mkdir(parents=True, exist_ok=True)
    try:
        os.close(os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o640))
        return
    except FileExistsError:
        pass
    for part in (path, path.with_name(path.name + "-wal"), path.with_name(path.name + "-shm")):
        try:
            info = part.stat()
            if info.st_mode & 0o007 and info.st_uid == os.geteuid():
                os.chmod(part, stat.S_IMODE(info.st_mode) & 0o770)
                log.info("%s: removed access for other users (was mode %04o)", part,
                         stat.S_IMODE(info.st_mode))
        except FileNotFoundError:
            continue
        except OSError as exc:
            log.warning("%s: cannot restrict its mode (%s)", part, exc.strerror)


def _masked(value: Any) -> Any:
    """*value* (JSON-like) with every string passed through `mask_secrets`."""
    if isinstance(value, str):
        return mask_secrets(value)
    if isinstance(value, Mapping):
        return {k: _masked(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_masked(v) for v in value]
    return value


def _ceil_day(t: datetime) -> date:
    """The first UTC day that starts at or after *t*."""
    return pd.Timestamp(t).ceil("D").date()


def _fit_records(rows: Iterable[Mapping[str, Any]]) -> list[dict[str, Any]]:
    now = datetime.now(UTC)
    out = []
    for row in rows:
        rec = _record(
            row, FIT_COLUMNS, ("branch", "window_start", "window_end", "samples", "status"),
            "fit",
        )
        rec["computed_at"] = rec.get("computed_at") or now
        for col in FIT_FLOATS:
            rec[col] = num(rec[col])
        if rec["identifiable"] is not None:
            rec["identifiable"] = bool(rec["identifiable"])
        rec["samples"] = int(rec["samples"])
        out.append(rec)
    return out


def _health_records(frame: pd.DataFrame) -> list[dict[str, Any]]:
    if frame.empty:
        return []
    missing = {"tag", "day", "flag", "count"} - set(frame.columns)
    if missing:
        raise ValueError(f"frame lacks data-health columns {sorted(missing)}")
    days = pd.to_datetime(frame["day"], utc=True).dt.date
    return [
        {"tag": t, "day": d, "flag": f, "count": int(n)}
        for t, d, f, n in zip(frame["tag"], days, frame["flag"], frame["count"], strict=True)
    ]


def _record(
    row: Mapping[str, Any], columns: Sequence[str], required: Sequence[str], what: str
) -> dict[str, Any]:
    """*row* with every column present (None where absent); unknown keys are refused."""
    unknown = set(row) - set(columns)
    if unknown:
        raise ValueError(f"{what} has unknown keys {sorted(unknown)}; allowed: {list(columns)}")
    missing = [k for k in required if row.get(k) is None]
    if missing:
        raise ValueError(f"{what} lacks required keys {missing}")
    rec = {c: row.get(c) for c in columns}
    for col in columns:
        if isinstance(rec[col], datetime | pd.Timestamp):
            rec[col] = utc_datetime(rec[col], f"{what} {col}")
    return rec
