"""Portable SQL for the results store: upserts per dialect, bulk readings, time formats.

Each dialect upserts with its own statement: ``INSERT … ON CONFLICT`` on SQLite and
PostgreSQL, ``INSERT … ON DUPLICATE KEY UPDATE`` on MariaDB/MySQL, and delete-then-insert
(in the caller's transaction) on any other. Bulk readings skip SQLAlchemy's per-row
parameter handling: times are formatted by numpy into each driver's native form, and
PostgreSQL with psycopg 3 loads them with COPY.
"""

from __future__ import annotations

import json
import math
from collections.abc import Mapping, Sequence
from datetime import date, datetime
from typing import Any

import numpy as np
import pandas as pd
import sqlalchemy as sa
from sqlalchemy.dialects.mysql import insert as mysql_insert
from sqlalchemy.dialects.postgresql import insert as pg_insert
from sqlalchemy.dialects.sqlite import insert as sqlite_insert

from adapters.base import StoreError
from adapters.records import QUARANTINE_COLUMNS, READING_COLUMNS, empty_readings

CHUNK = 20_000  # rows per executemany: bounds the parameter lists held in memory


def json_default(value: Any) -> Any:
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, datetime | pd.Timestamp | date):
        return value.isoformat()
    raise TypeError(f"cannot store a {type(value).__name__} as JSON")


def finite(value: Any) -> Any:
    """NaN and ±inf become JSON null (PostgreSQL's json type rejects the bare tokens)."""
    if isinstance(value, float | np.floating):
        return float(value) if math.isfinite(value) else None
    if isinstance(value, Mapping):
        return {str(k): finite(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [finite(v) for v in value]
    return value


def dumps(value: Any) -> str:
    return json.dumps(finite(value), default=json_default, allow_nan=False)


def num(value: Any) -> float | None:
    """A float for a Double column; NaN/None become NULL (MariaDB refuses NaN)."""
    if value is None:
        return None
    out = float(value)
    return out if math.isfinite(out) else None


def to_utc_index(values: Any) -> pd.DatetimeIndex:
    """Vectorised: stored times (ISO text, naive UTC or aware datetimes) → ns UTC."""
    idx = pd.DatetimeIndex(
        pd.to_datetime(pd.Series(values, dtype=object), utc=True, format="ISO8601")
    )
    return idx.as_unit("ns")


def nullable(values: pd.Series) -> list[float | None]:
    """Floats with NaN/inf as None (NULL), vectorised."""
    arr = values.to_numpy("float64")
    out: list[float | None] = arr.tolist()
    for i in np.flatnonzero(~np.isfinite(arr)):
        out[i] = None
    return out


def native_times(times: pd.Series, dialect: str) -> list[str]:
    """UTC times as text each database parses, formatted by numpy rather than per row.

    SQLAlchemy's SQLite storage format (space, 6 decimals) — which MariaDB/MySQL read as
    DATETIME(6) too — and the same with ``+00`` for PostgreSQL's timestamptz.
    """
    text = np.datetime_as_string(times.dt.tz_localize(None).to_numpy("datetime64[us]"), "us")
    text = np.char.replace(text, "T", " ")
    if dialect == "postgresql":
        text = np.char.add(text, "+00")
    return list(text.tolist())


def time_text(column: sa.ColumnElement[Any], dialect: str) -> sa.ColumnElement[Any]:
    """A time column as ISO-like text: pandas parses text in C, datetime objects per row."""
    if dialect == "sqlite":  # stored as text already
        return sa.type_coerce(column, sa.types.NullType())
    return sa.cast(column, sa.String())


def raw_rows(
    conn: sa.Connection, query: sa.Select[Any], params: Mapping[str, Any] | None = None
) -> list[Any]:
    """All rows as the driver returns them (no per-row Row objects: bulk reads)."""
    result = conn.execute(query, dict(params or {}))
    try:
        return list(result.cursor.fetchall())
    finally:
        result.close()


def readings_from_rows(
    rows: Sequence[Sequence[Any]], tags: Sequence[str], counts: Sequence[int]
) -> pd.DataFrame:
    """A readings frame sorted by time, then tag, from driver rows (time text, value, good)
    of *tags* in turn, ``counts[i]`` rows of ``tags[i]``; *tags* sorted.

    Columns are built by numpy from one object array, not by transposing the rows in
    Python (``zip(*rows)`` over a million tuples costs more than the query).
    """
    if not rows:
        return empty_readings()
    table = np.array(rows, dtype=object).reshape(len(rows), 3)
    time = to_utc_index(table[:, 0])
    # A stable sort on time keeps the tags' sorted turn among equal times.
    order = np.argsort(time.asi8, kind="stable")
    return pd.DataFrame(
        {
            "time": time[order],
            "tag": pd.Series(
                np.repeat(np.asarray(tags, dtype=object), np.asarray(counts))[order], dtype=object
            ),
            "value": pd.Series(table[order, 1], dtype=object).astype("float64"),
            "good": table[order, 2].astype(bool),
        }
    )


def copy_readings_pg(conn: sa.Connection, columns: Mapping[str, list[Any]]) -> None:
    """PostgreSQL with psycopg 3: COPY the (already anti-joined, so new) readings straight
    into the table — several times faster than a parameterised executemany.

    A concurrent writer storing the same keys meanwhile makes the COPY fail on the
    primary key; the transaction then rolls back whole and `StoreError` says to retry.
    """
    driver = conn.connection.driver_connection
    assert driver is not None
    dbapi_error = conn.dialect.loaded_dbapi.Error
    try:
        with (
            driver.cursor() as cur,
            cur.copy("COPY readings (tag, time, value, good) FROM STDIN") as copy,
        ):
            for row in zip(*(columns[c] for c in ("tag", "time", "value", "good")), strict=True):
                copy.write_row(row)
    except dbapi_error as exc:
        raise StoreError(
            f"bulk load of readings failed ({exc}); nothing of the batch was stored — "
            "another writer may have stored the same readings: run ingest again"
        ) from exc


def upsert_statement(
    dialect: str, table: sa.Table, keys: Sequence[str], cols: Sequence[str], *, replace: bool
) -> Any:
    """The dialect's insert that replaces (or keeps) a row on a natural-key conflict."""
    if dialect in ("sqlite", "postgresql"):
        ins = (sqlite_insert if dialect == "sqlite" else pg_insert)(table)
        if replace and cols:
            return ins.on_conflict_do_update(
                index_elements=list(keys), set_={c: ins.excluded[c] for c in cols}
            )
        return ins.on_conflict_do_nothing(index_elements=list(keys))
    if dialect in ("mysql", "mariadb"):
        mins = mysql_insert(table)
        if replace and cols:
            return mins.on_duplicate_key_update({c: mins.inserted[c] for c in cols})
        # assigning a key column to itself keeps the stored row unchanged
        return mins.on_duplicate_key_update({keys[0]: table.c[keys[0]]})
    return None


def upsert(
    conn: sa.Connection,
    table: sa.Table,
    rows: Sequence[Mapping[str, Any]],
    keys: Sequence[str],
    *,
    replace: bool,
) -> None:
    """Insert *rows*; on a natural-key conflict replace the row (or keep it if not *replace*)."""
    if not rows:
        return
    # One row per key (last wins): a statement may not touch the same row twice.
    unique = list({tuple(r[k] for k in keys): r for r in rows}.values())
    cols = [c for c in unique[0] if c not in keys]
    stmt = upsert_statement(conn.dialect.name, table, keys, cols, replace=replace)
    if stmt is None:  # no dialect upsert: delete (or look) then insert, same transaction
        for row in unique:
            match = sa.and_(*(table.c[k] == row[k] for k in keys))
            if replace:
                conn.execute(table.delete().where(match))
            elif conn.execute(sa.select(sa.literal(1)).where(match)).first():
                continue
            conn.execute(table.insert(), [row])
        return
    for i in range(0, len(unique), CHUNK):
        conn.execute(stmt, unique[i : i + CHUNK])


def prepare_readings(frame: pd.DataFrame) -> pd.DataFrame:
    """Validate a readings frame; times to µs UTC; one row per (tag, time), the last."""
    missing = set(READING_COLUMNS) - set(frame.columns)
    if missing:
        raise ValueError(f"batch.readings lacks columns {sorted(missing)}")
    if frame.empty:
        return frame.loc[:, list(READING_COLUMNS)]
    time = frame["time"]
    if not isinstance(time.dtype, pd.DatetimeTZDtype):
        raise ValueError("batch.readings time must be timezone-aware (datetime64[ns, UTC])")
    too_long = frame["tag"].astype(str).str.len() > 100
    if too_long.any():
        first = frame["tag"][too_long].iloc[0]
        raise ValueError(f"batch.readings has a tag longer than 100 characters: {first!r}")
    out = pd.DataFrame(
        {
            "time": time.dt.tz_convert("UTC").dt.floor("us"),
            "tag": frame["tag"].astype(str).astype(object),
            "value": pd.to_numeric(frame["value"], errors="coerce").astype("float64"),
            "good": frame["good"].astype(bool),
        }
    )
    out = out.drop_duplicates(["tag", "time"], keep="last")
    # In primary-key order: the (tag, time) index then grows at its ends instead of being
    # split all over (about 1.5x faster on SQLite; InnoDB clusters on that key).
    return out.sort_values(["tag", "time"], kind="stable", ignore_index=True)


def quarantine_rows(frame: pd.DataFrame, source: str) -> list[dict[str, Any]]:
    missing = set(QUARANTINE_COLUMNS) - set(frame.columns)
    if missing:
        raise ValueError(f"batch.quarantined lacks columns {sorted(missing)}")
    return [
        {
            "source": source,
            "origin": str(o)[:400],
            "line": int(n),
            "reason": str(r)[:200],
            "raw": None if raw is None else str(raw)[:2000],
        }
        for o, n, r, raw in zip(
            frame["origin"], frame["line"], frame["reason"], frame["raw"], strict=True
        )
    ]
