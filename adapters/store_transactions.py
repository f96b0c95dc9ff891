"""What every table of the results store shares: its transactions and its frames.

`StoreTransactions` is the base of the parts `adapters.store.SqlStore` is made of (one
module per group of tables: `adapters.store_readings`, `adapters.store_analysis`,
`adapters.store_alarms`, `adapters.store_maintenance`, `adapters.store_runs`): one write
or read transaction with database errors as masked `StoreError`, and a query's rows as a
frame with UTC times. `checked_name` and `full_record` check the rows every part writes.
"""

from __future__ import annotations

import signal
import threading
from collections.abc import Iterator, Mapping, Sequence
from contextlib import contextmanager
from datetime import datetime
from typing import Any

import pandas as pd
import sqlalchemy as sa

from adapters.base import StoreError
from adapters.credentials import is_authentication_failure, mask_secrets
from adapters.migrations.dialects import to_utc_index
from adapters.migrations.tables import UTCDateTime, utc_datetime


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


def checked_name(value: Any, name: str, limit: int) -> str:
    """*value* when it is a non-empty string of at most *limit* characters (the width of
    its column); else a `ValueError` naming the field *name*."""
    if not isinstance(value, str) or not value or len(value) > limit:
        raise ValueError(f"{name} must be a non-empty string of at most {limit} characters")
    return value


class StoreTransactions:
    """Transactions and frames on the store's engine (set up by `adapters.store.SqlStore`)."""

    url: sa.URL
    dialect: str
    engine: sa.Engine

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


def full_record(
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
