"""The SQL source loses no back-filled row inside its overlap, doubles none, and counts only
new readings; NaN/inf values are quarantined, not dropped.

A historian that loses its link buffers samples and inserts them late with their own
times (store-and-forward, common practice in plant historians): rows appear *behind* the
watermark. Rule under test: adapters/sql_source.py module doc ("Back-filled rows").
Run against SQLite, PostgreSQL and MariaDB. Site: config/example-site.toml (PT-100 in
bar, FT-110 in m3/h; 1 bar = 1e5 Pa, SI Brochure, 9th ed., Table 8). Invented data.
"""

from __future__ import annotations

import math
import tomllib
from collections.abc import Iterator
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import pandas as pd
import pytest
import sqlalchemy as sa

from adapters.base import ResultsStore, open_store
from adapters.records import TagSpec
from adapters.sql_source import SqlSource
from monitor.app.demo import EXAMPLE_SITE
from monitor.app.ingest import IngestSummary, ingest, open_source
from monitor.site.config import ConfigError, Site, parse_site
from tests.adapters.ingest_helpers import ingest as ingest_batches

T0 = datetime(2026, 6, 1, tzinfo=UTC)
ENV = "BW_TEST_BACKFILL_URL"


@pytest.fixture(
    params=["sqlite", pytest.param("postgresql", marks=pytest.mark.server),
            pytest.param("mariadb", marks=pytest.mark.server)]
)
def database(request: pytest.FixtureRequest, tmp_path: Path, unique_name: str) -> Iterator[
    tuple[str, str, bool]
]:
    """(url, table, aware time column) of an empty historian table."""
    kind: str = request.param
    if kind == "sqlite":
        url, aware = f"sqlite:///{tmp_path / 'historian.db'}", False
    elif kind == "postgresql":
        url, aware = request.getfixturevalue("postgres_url"), True
    else:
        url, aware = request.getfixturevalue("mariadb_url"), False
    engine = sa.create_engine(url)
    table = sa.Table(
        unique_name, sa.MetaData(),
        sa.Column("time", sa.DateTime(timezone=aware)),
        sa.Column("tag", sa.String(32)),
        sa.Column("value", sa.Double()),
    )
    table.create(engine)
    yield url, unique_name, aware
    with engine.begin() as conn:
        table.drop(conn)
    engine.dispose()


def insert(url: str, table: str, aware: bool, rows: list[tuple[int, str, float | None]]) -> None:
    """Rows as (minute after T0, tag, value in plant units)."""
    engine = sa.create_engine(url)
    tbl = sa.Table(table, sa.MetaData(), autoload_with=engine)
    stamp = (lambda m: T0 + timedelta(minutes=m)) if aware else (
        lambda m: (T0 + timedelta(minutes=m)).replace(tzinfo=None))
    with engine.begin() as conn:
        conn.execute(tbl.insert(), [{"time": stamp(m), "tag": g, "value": v} for m, g, v in rows])
    engine.dispose()


def minutes(tag: str, span: range) -> list[tuple[int, str, float | None]]:
    return [(m, tag, 3.0 + m / 1000 if tag == "PT-100" else 100.0 + m % 7) for m in span]


def make_site(tmp_path: Path, table: str, **source: Any) -> Site:
    doc = tomllib.loads(EXAMPLE_SITE.read_text())
    doc["store"] = {"url": f"sqlite:///{tmp_path / 'store.db'}"}
    doc["source"] = {"kind": "sql", "table": table, "url_env": ENV, **source}
    return parse_site(doc, path=tmp_path / "site.toml")


def run(site: Site, store: ResultsStore) -> IngestSummary:
    source = open_source(site)
    try:
        return ingest(site, store, source)
    finally:
        source.close()


def stored(store: ResultsStore) -> pd.DataFrame:
    return store.read_readings(["PT-100", "FT-110"], T0 - timedelta(days=1), T0 + timedelta(days=1))


def instant(minute: int, aware: bool) -> pd.Timestamp:
    """The UTC instant of a row: naive columns hold the site's wall time (Europe/Berlin,
    UTC+2 in June, IANA tz database)."""
    if aware:
        return pd.Timestamp(T0) + pd.Timedelta(minutes=minute)
    wall = pd.Timestamp(T0.replace(tzinfo=None)) + pd.Timedelta(minutes=minute)
    return wall.tz_localize("Europe/Berlin").tz_convert("UTC")


@pytest.fixture
def store(tmp_path: Path) -> Iterator[ResultsStore]:
    opened = open_store(f"sqlite:///{tmp_path / 'store.db'}")
    yield opened
    opened.close()


def test_back_filled_rows_inside_the_overlap_are_all_stored_once(
    database: tuple[str, str, bool], tmp_path: Path, store: ResultsStore,
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    url, table, aware = database
    monkeypatch.setenv(ENV, url)
    site = make_site(tmp_path, table)  # overlap: the default, 2 h
    # the link to the flow meter's node dropped at minute 120: its samples are buffered;
    # one pressure row has no value (NULL: quarantined as a blank value)
    pressure = [(m, g, None if m == 175 else v) for m, g, v in minutes("PT-100", range(180))]
    insert(url, table, aware, pressure + minutes("FT-110", range(0, 120)))
    first = run(site, store)
    assert (first.stored, first.quarantined) == (299, 1)
    mark = store.cursors(f"sql:{table}")[table]["time"]
    assert pd.Timestamp(mark) == instant(179, aware)  # the newest row's own time

    # the link is back: 60 buffered rows behind the watermark (59 min at most: inside
    # the overlap), then 30 new minutes of both tags
    insert(url, table, aware, minutes("FT-110", range(120, 180)))
    new = minutes("PT-100", range(180, 210)) + minutes("FT-110", range(180, 210))
    insert(url, table, aware, new)
    second = run(site, store)
    assert second.stored == 60 + 60  # every back-filled row, every new row: NEW readings
    assert second.duplicates == second.read - second.stored > 0  # the overlap re-read
    assert second.quarantined == 0  # the blank row was re-read, but it is not new
    have = stored(store)
    assert len(have) == 180 + 30 + 180 + 30 - 1  # all rows of the table, each once
    assert not have.duplicated(["time", "tag"]).any()
    # the cursor still advances to the newest instant read
    mark = store.cursors(f"sql:{table}")[table]["time"]
    assert pd.Timestamp(mark) == instant(209, aware)

    third = run(site, store)
    assert third.stored == 0 and third.quarantined == 0


def make_table(url: str, table: str, aware: bool = False) -> None:
    engine = sa.create_engine(url)
    sa.Table(table, sa.MetaData(), sa.Column("time", sa.DateTime(timezone=aware)),
             sa.Column("tag", sa.String(32)), sa.Column("value", sa.Double())).create(engine)
    engine.dispose()


def test_what_the_overlap_is_for_and_its_limit(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    url = f"sqlite:///{tmp_path / 'historian.db'}"
    make_table(url, "r")
    monkeypatch.setenv(ENV, url)
    insert(url, "r", False, minutes("PT-100", range(0, 180)) + minutes("FT-110", range(0, 120)))
    sites = {o: make_site(tmp_path / o.replace(" ", ""), "r", overlap=o) for o in ("0 s", "2 h")}
    stores = {o: open_store(s.store_url) for o, s in sites.items()}
    try:
        for o in sites:
            assert run(sites[o], stores[o]).stored == 300
        # buffered rows 1 to 60 min behind the watermark (179 min), and one row 170 min
        # behind it: older than the 2 h overlap
        late = [*minutes("FT-110", range(120, 180)), (9, "FT-110", 555.0)]
        insert(url, "r", False, late)
        got = {o: run(sites[o], stores[o]).stored for o in sites}
        assert got == {"0 s": 1, "2 h": 60}  # 0 s: only the watermark instant is re-read
        # the documented limit: the row older than the overlap is missed (module doc)
        held = stored(stores["2 h"])
        assert 555.0 / 3600 not in held["value"].tolist()
    finally:
        for opened in stores.values():
            opened.close()


def test_overlap_key_is_validated(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match=r"source\.overlap: must be zero or a positive"):
        make_site(tmp_path, "r", overlap="-1 h")
    with pytest.raises(ValueError, match="overlap must be zero or positive"):
        SqlSource([], url="sqlite://", table="r", overlap=timedelta(hours=-1))


def test_nan_and_inf_values_are_quarantined(
    database: tuple[str, str, bool]
) -> None:
    url, table, aware = database
    # MariaDB refuses NaN and infinity in a DOUBLE column, SQLite stores NaN as NULL
    # (both from the databases' own documentation, from memory): each gets what it holds
    if url.startswith("mysql"):
        pytest.skip("MariaDB cannot store NaN or infinity in a DOUBLE column")
    odd = [float("inf"), -float("inf")] if url.startswith("sqlite") else [math.nan, math.inf]
    rows = [(0, "PT-100", 3.0), (1, "PT-100", odd[0]), (2, "PT-100", odd[1]), (3, "FT-110", 100.0)]
    insert(url, table, aware, rows)
    source = SqlSource([TagSpec("PT-100", "bar", "pressure"), TagSpec("FT-110", "m3/h", "flow")],
                       url=url, table=table, backoff_seconds=0.0)
    try:
        got = ingest_batches(source, {})
    finally:
        source.close()
    assert got.quarantined["reason"].tolist() == ["value is NaN/inf"] * 2
    assert got.quarantined["line"].tolist() == [20260601000100, 20260601000200]  # their times
    assert got.notes["nonfinite_values"] == 2
    assert sorted(got.readings["value"].tolist()) == pytest.approx([100.0 / 3600, 3e5])


def edit(url: str, table: str, aware: bool, minute: int, tag: str, value: float) -> None:
    """The historian corrects one stored row in place (same time and tag)."""
    engine = sa.create_engine(url)
    tbl = sa.Table(table, sa.MetaData(), autoload_with=engine)
    at = T0 + timedelta(minutes=minute)
    with engine.begin() as conn:
        conn.execute(tbl.update().where(tbl.c.time == (at if aware else at.replace(tzinfo=None)),
                                        tbl.c.tag == tag).values(value=value))
    engine.dispose()


@pytest.mark.parametrize("policy", ["refuse", "apply"])
def test_a_row_corrected_inside_the_overlap(
    database: tuple[str, str, bool], tmp_path: Path, store: ResultsStore,
    monkeypatch: pytest.MonkeyPatch, policy: str,
) -> None:
    url, table, aware = database
    monkeypatch.setenv(ENV, url)
    site = make_site(tmp_path, table, corrections=policy)
    insert(url, table, aware, minutes("PT-100", range(60)) + minutes("FT-110", range(60)))
    assert run(site, store).stored == 120
    edit(url, table, aware, 50, "PT-100", 3.25)  # 3.050 bar re-entered as 3.25 bar
    second = run(site, store)
    assert second.stored == 0
    assert (second.corrections_applied, second.corrections_refused) == (
        (1, 0) if policy == "apply" else (0, 1))
    journal = store.read_corrections()
    assert len(journal) == 1 and journal["tag"].iloc[0] == "PT-100"
    assert pd.Timestamp(journal["time"].iloc[0]) == instant(50, aware)
    # 1 bar = 1e5 Pa (SI Brochure, 9th ed., Table 8)
    assert journal["old_value"].iloc[0] == pytest.approx(3.05e5)
    assert journal["new_value"].iloc[0] == pytest.approx(3.25e5)
    assert journal["source"].iloc[0] == f"sql:{table}"
    kept = stored(store).set_index(["tag", "time"]).loc[("PT-100", instant(50, aware)), "value"]
    assert kept == pytest.approx(3.25e5 if policy == "apply" else 3.05e5)
    # every later pass re-reads the overlap, and journals the refused row no more
    third = run(site, store)
    assert (third.corrections_applied, third.corrections_refused) == (0, 0)
    assert len(store.read_corrections()) == 1
