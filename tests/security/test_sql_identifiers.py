"""Identifiers from the site file reach SQL only quoted or bound.

The SQL source reflects the named table and uses SQLAlchemy Column objects (every name
quoted by the dialect) and bound parameters for tags (module doc of
`adapters/sql_source.py`; the reflection and its checks: `adapters/sql_table.py`). Each
probe below puts an injection into one identifier — the table, the schema, a column, a
tag — against SQLite and the loopback PostgreSQL and MariaDB servers, and checks that
nothing was executed (a guard table and the readings table are intact, rows counted
before and after), that the source either reads the real table under that quoted name or
refuses with one clear line, and that an injected tag matches no row. The probes are
classic forms of SQL injection (common practice: the statement terminator, a closed
quote with a tautology, a comment).
"""

from __future__ import annotations

from collections.abc import Callable
from datetime import UTC, datetime, timedelta
from typing import Any

import pytest
import sqlalchemy as sa

from adapters.base import SourceUnavailable, UnknownTagError
from adapters.records import TagSpec
from adapters.sql_source import SqlSource
from tests.adapters.ingest_helpers import ingest

T0 = datetime(2026, 6, 1, tzinfo=UTC)
TABLE_PROBES = ["readings; DROP TABLE {guard}", 'r" ; DROP TABLE {guard}; --',
                "r` ; DROP TABLE {guard}; --", "r' OR '1'='1"]
COLUMN_PROBES = ['value" FROM {guard}; --', "value`) FROM {guard}; --",
                 "v' OR '1'='1", "value; DROP TABLE {guard}"]
TAG_PROBES = ["x' OR '1'='1", "x\" OR \"1\"=\"1", "') OR 1=1 --", "FT-1'; DROP TABLE {guard}; --"]
PROBES_TRIED: list[str] = []


def _setup(url: str, name: str) -> tuple[sa.Engine, str, str]:
    """A readings table and a guard table; returns (engine, readings, guard)."""
    engine = sa.create_engine(url)
    readings, guard = f"{name}_r", f"{name}_g"
    meta = sa.MetaData()
    table = sa.Table(readings, meta, sa.Column("time", sa.DateTime()),
                     sa.Column("tag", sa.String(64)), sa.Column("value", sa.Float()))
    guard_t = sa.Table(guard, meta, sa.Column("id", sa.Integer()))
    meta.create_all(engine)
    with engine.begin() as conn:
        conn.execute(table.insert(), [
            {"time": (T0 + timedelta(minutes=i)).replace(tzinfo=None), "tag": "FT-1", "value": 1.0}
            for i in range(5)])
        conn.execute(guard_t.insert(), [{"id": 1}, {"id": 2}])
    return engine, readings, guard


def _counts(engine: sa.Engine, *tables: str) -> list[int]:
    with engine.connect() as conn:
        return [conn.execute(sa.select(sa.func.count()).select_from(sa.table(t))).scalar_one()
                for t in tables]


def _probe(url: str, engine: sa.Engine, readings: str, guard: str,
           make: Callable[[], SqlSource]) -> list[str]:
    """Run check() and a full ingest; the problems or the error, as lines."""
    before = _counts(engine, readings, guard)
    lines: list[str] = []
    try:
        source = make()
    except (ValueError, UnknownTagError) as exc:
        lines = [str(exc)]
    else:
        try:
            lines = source.check()
            try:
                got = ingest(source, {})
                lines += [f"{len(got.readings)} readings"]
            except (SourceUnavailable, UnknownTagError, ValueError) as exc:
                lines.append(str(exc))
        finally:
            source.close()
    assert _counts(engine, readings, guard) == before  # nothing dropped, nothing written
    for line in lines:
        assert "\n" not in line, line  # one clear line each
    return lines


def _run_all(url: str, name: str) -> None:
    engine, readings, guard = _setup(url, name)
    try:
        tags = [TagSpec("FT-1", "m3/h", "flow")]
        for probe in TABLE_PROBES:
            table = probe.format(guard=guard)
            PROBES_TRIED.append(table)
            lines = _probe(url, engine, readings, guard, lambda t=table: SqlSource(
                tags, url=url, table=t, backoff_seconds=0.0, max_tries=1))
            assert any("does not exist" in ln for ln in lines), lines
        for probe in COLUMN_PROBES:
            column = probe.format(guard=guard)
            PROBES_TRIED.append(column)
            lines = _probe(url, engine, readings, guard, lambda c=column: SqlSource(
                tags, url=url, table=readings, value_column=c, backoff_seconds=0.0,
                max_tries=1))
            assert any("has no column" in ln for ln in lines), lines
        schema = f"public; DROP TABLE {guard}; --"
        PROBES_TRIED.append(schema)
        lines = _probe(url, engine, readings, guard, lambda: SqlSource(
            tags, url=url, table=readings, schema=schema, backoff_seconds=0.0, max_tries=1))
        assert lines and not any(ln.endswith(" readings") and not ln.startswith("0 ")
                                 for ln in lines), lines
        for probe in TAG_PROBES:
            tag = probe.format(guard=guard)
            PROBES_TRIED.append(tag)
            lines = _probe(url, engine, readings, guard, lambda g=tag: SqlSource(
                [TagSpec(g, "m3/h", "flow")], url=url, table=readings, backoff_seconds=0.0,
                max_tries=1))
            # an injected tag matches no row: the tautology did not select FT-1's rows
            assert "0 readings" in lines, lines
        # the honest tag still reads its five rows: the probes above were not vacuous
        lines = _probe(url, engine, readings, guard, lambda: SqlSource(
            tags, url=url, table=readings, backoff_seconds=0.0, max_tries=1))
        assert "5 readings" in lines, lines
    finally:
        with engine.begin() as conn:
            for t in (readings, guard):
                conn.execute(sa.text(f"DROP TABLE IF EXISTS {t}"))  # test-made names only
        engine.dispose()


def test_injection_through_identifiers_sqlite(tmp_path: Any, unique_name: str) -> None:
    _run_all(f"sqlite:///{tmp_path / 'plant.db'}", unique_name)


@pytest.mark.server
def test_injection_through_identifiers_postgresql(postgres_url: str, unique_name: str) -> None:
    _run_all(postgres_url, unique_name)


@pytest.mark.server
def test_injection_through_identifiers_mariadb(mariadb_url: str, unique_name: str) -> None:
    _run_all(mariadb_url, unique_name)
