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

Parts
-----
`SqlStore` is composed of one part per group of tables, each in its own module on the
transactions of `adapters.store_transactions`: `adapters.store_readings` (readings,
cursors, quarantine, corrections), `adapters.store_analysis` (fits, window checks, header
balance, data health, findings), `adapters.store_alarms` (alarms, their journal, the
outbox), `adapters.store_maintenance` and `adapters.store_runs` (job runs, watermarks).
This module opens the database, migrates it and sets up each dialect's connections.

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
import stat
from pathlib import Path
from typing import Any, ClassVar

import sqlalchemy as sa

from adapters.base import ResultsStore, StoreError
from adapters.credentials import mask_secrets, parse_url, remember_url
from adapters.migrations.dialects import dumps
from adapters.store_alarms import AlarmTables
from adapters.store_analysis import AnalysisTables
from adapters.store_maintenance import MaintenanceTables
from adapters.store_readings import ReadingsTables
from adapters.store_runs import RunTables

__all__ = ["SqlStore"]

log = logging.getLogger(__name__)

_MIGRATIONS = Path(__file__).resolve().parent / "migrations"
_MIGRATE_LOCK_ID = 0x6277_6D69  # any constant; "bwmi" — shared by every branchwatch
_IDENT = re.compile(r"^[A-Za-z_][A-Za-z0-9_]{0,62}$")


def _reopen(url: str, schema: str | None, busy_timeout_s: float) -> SqlStore:
    return SqlStore(url, schema=schema, migrate=False, busy_timeout_s=busy_timeout_s)


class SqlStore(
    ReadingsTables, AnalysisTables, AlarmTables, MaintenanceTables, RunTables, ResultsStore
):
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
