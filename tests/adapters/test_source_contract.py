"""One contract, every readings source: the same data in, the same frames out.

Each backend below stores the SAME invented readings (three days of 10-minute samples of
a header pressure, a branch flow and a supply temperature, with some flow samples
missing) in its own way — CSV wide, CSV long, SQLite long/wide, PostgreSQL long/wide,
MariaDB long/wide — and every test checks the frames against the SAME expected frame.

Expected SI values are computed here from the definitions: 1 bar = 1e5 Pa (SI Brochure,
9th ed., Table 8), 1 m3/h = 1/3600 m3/s (definition of the hour), °C stays °C.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from dataclasses import dataclass
from datetime import timedelta
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
import sqlalchemy as sa

from adapters.base import ReadingsSource, UnknownTagError
from adapters.csv_source import CsvSource
from adapters.records import TagSpec
from adapters.sql_source import SqlSource
from tests.adapters.ingest_helpers import canonical, ingest, write

TAGS = [
    TagSpec("PT-100", "bar", "pressure"),
    TagSpec("FT-203", "m3/h", "flow"),
    TagSpec("TT-100", "degC", "temperature"),
]
SI = {"PT-100": 1e5, "FT-203": 1 / 3600, "TT-100": 1.0}
START = pd.Timestamp("2026-06-01", tz="UTC")
STEP = pd.Timedelta(minutes=10)
N = 3 * 144  # three days


def dataset() -> pd.DataFrame:
    """The plant-unit readings every backend stores: time, tag, value, quality."""
    i = np.arange(N)
    times = START + STEP * i
    parts = [
        pd.DataFrame({"time": times, "tag": "PT-100", "value": 3.0 + 0.01 * (i % 50)}),
        pd.DataFrame({"time": times, "tag": "FT-203", "value": 100.0 + (i % 37)}),
        pd.DataFrame({"time": times, "tag": "TT-100", "value": 20.0 + 0.5 * (i % 11)}),
    ]
    data = pd.concat(parts, ignore_index=True)
    missing = (data["tag"] == "FT-203") & (np.tile(i, 3) % 17 == 0)  # meter dropouts
    data = data[~missing]
    data["quality"] = "G"
    return data.reset_index(drop=True)


def expected(data: pd.DataFrame) -> pd.DataFrame:
    frame = pd.DataFrame(
        {
            "time": pd.DatetimeIndex(data["time"]).as_unit("ns"),
            "tag": pd.Series(data["tag"].to_numpy(dtype=object), dtype=object),
            "value": data["value"].to_numpy() * data["tag"].map(SI).to_numpy(),
            # the default code map: "", "good", "G", and 192 (0xC0, OPC DA "good"; from memory)
            "good": data["quality"].str.lower().isin(["", "good", "g", "192"]).to_numpy(),
        }
    )
    return canonical(frame)


# --------------------------------------------------------------------------- backends
@dataclass
class Backend:
    """Stores a dataset and hands back a source over it."""

    name: str
    make: Callable[[pd.DataFrame, list[TagSpec]], ReadingsSource]
    long: bool


def _csv(folder: Path, wide: bool, chunk_rows: int = 100) -> Backend:
    def make(data: pd.DataFrame, tags: list[TagSpec]) -> ReadingsSource:
        for day, part in data.groupby(data["time"].dt.date):
            stamp = part["time"].map(lambda t: t.strftime("%Y-%m-%dT%H:%M:%SZ"))
            if wide:
                table = part.assign(timestamp=stamp).pivot(
                    index="timestamp", columns="tag", values="value"
                )
                text = table.to_csv(index_label="timestamp", na_rep="")
            else:
                text = part.assign(timestamp=stamp)[
                    ["timestamp", "tag", "value", "quality"]
                ].to_csv(index=False)
            write(folder / f"export_{day}.csv", text)
        return CsvSource(tags, path=folder, settle_seconds=1, chunk_rows=chunk_rows)

    return Backend("csv-wide" if wide else "csv-long", make, not wide)


def _sql(
    url: str, table: str, wide: bool, aware: bool, engines: list[sa.Engine], opened: list[Any]
) -> Backend:
    def make(data: pd.DataFrame, tags: list[TagSpec]) -> ReadingsSource:
        engine = sa.create_engine(url)
        engines.append(engine)
        meta = sa.MetaData()
        when = sa.Column("time", sa.DateTime(timezone=aware), nullable=False)
        cols: list[sa.Column[Any]]
        if wide:
            cols = [sa.Column(t.tag, sa.Double()) for t in TAGS]
            tbl = sa.Table(table, meta, when, *cols)
            rows = data.pivot(index="time", columns="tag", values="value").reset_index()
        else:
            cols = [
                sa.Column("tag", sa.String(32)),
                sa.Column("value", sa.Double()),
                sa.Column("quality", sa.String(16)),
            ]
            tbl = sa.Table(table, meta, when, *cols)
            rows = data
        records: list[dict[str, Any]] = [
            {str(k): v for k, v in r.items()} for r in rows.to_dict("records")
        ]
        for r in records:
            stamp = r["time"].to_pydatetime()
            r["time"] = stamp if aware else stamp.replace(tzinfo=None)
            for k, v in r.items():
                if isinstance(v, float) and np.isnan(v):
                    r[k] = None
        meta.create_all(engine)
        with engine.begin() as conn:
            conn.execute(tbl.insert(), records)
        source = SqlSource(
            tags,
            url=url,
            table=table,
            layout="wide" if wide else "long",
            quality_column=None if wide else "quality",
            window=timedelta(hours=13),
            backoff_seconds=0.01,
        )
        opened.append(source)
        return source

    return Backend("wide" if wide else "long", make, not wide)


BACKENDS = [
    "csv-wide",
    "csv-long",
    "sqlite-long",
    "sqlite-wide",
    pytest.param("postgresql-long", marks=pytest.mark.server),
    pytest.param("postgresql-wide", marks=pytest.mark.server),
    pytest.param("mariadb-long", marks=pytest.mark.server),
    pytest.param("mariadb-wide", marks=pytest.mark.server),
]


@pytest.fixture(params=BACKENDS)
def backend(request: pytest.FixtureRequest, tmp_path: Path, unique_name: str) -> Iterator[Backend]:
    kind: str = request.param
    engines: list[sa.Engine] = []
    opened: list[Any] = []
    wide = kind.endswith("wide")
    if kind.startswith("csv"):
        yield _csv(tmp_path, wide)
        return
    if kind.startswith("sqlite"):
        url = f"sqlite:///{tmp_path / 'historian.db'}"
        aware = False
    elif kind.startswith("postgresql"):
        url = request.getfixturevalue("postgres_url")
        aware = not wide  # long: timestamptz; wide: naive UTC timestamps
    else:
        url = request.getfixturevalue("mariadb_url")
        aware = False
    made = _sql(url, unique_name, wide, aware, engines, opened)
    made.name = kind
    yield made
    for source in opened:
        source.close()
    for engine in engines:
        with engine.begin() as conn:
            sa.Table(unique_name, sa.MetaData()).drop(conn, checkfirst=True)
        engine.dispose()


# --------------------------------------------------------------------------- the contract
def test_full_ingest_gives_the_expected_frame(backend: Backend) -> None:
    data = dataset()
    got = ingest(backend.make(data, TAGS), {})
    assert got.quarantined.empty
    assert not got.readings.duplicated(["time", "tag"]).any()
    pd.testing.assert_frame_equal(canonical(got.readings), expected(data))


def test_second_pass_adds_nothing(backend: Backend) -> None:
    data = dataset()
    source = backend.make(data, TAGS)
    cursors: dict[str, dict[str, Any]] = {}
    first = ingest(source, cursors)
    second = ingest(source, cursors)
    held = first.readings.set_index(["time", "tag"])
    again = second.readings.set_index(["time", "tag"])
    assert again.index.isin(held.index).all()  # only re-deliveries of stored readings
    if not source.keeps_readings:
        assert again.empty  # CSV reads nothing at all
    # SQL re-reads its overlap before the watermark instant, inclusive (back-filled rows:
    # adapters/sql_source.py module doc); the store keeps one copy of each
    overlap = getattr(source, "overlap", timedelta(0))
    newest = first.readings["time"].max()
    assert (again.index.get_level_values("time") >= newest - overlap).all()


def test_killed_ingest_resumes_without_loss_or_double(backend: Backend) -> None:
    data = dataset()
    source = backend.make(data, TAGS)
    cursors: dict[str, dict[str, Any]] = {}
    killed = ingest(source, cursors, limit=1)
    assert 0 < len(killed.readings) < len(data)
    resumed = ingest(source, cursors)
    both = pd.concat([killed.readings, resumed.readings], ignore_index=True)
    # re-delivered only inside the SQL overlap before the killed pass's watermark; the
    # store keeps one copy of each (tag, time), as drop_duplicates does here
    doubled = both.loc[both.duplicated(["time", "tag"]), "time"]
    overlap = getattr(source, "overlap", timedelta(0))
    assert (doubled >= killed.readings["time"].max() - overlap).all()
    both = both.drop_duplicates(["time", "tag"], ignore_index=True)
    pd.testing.assert_frame_equal(canonical(both), expected(data))


def test_read_window(backend: Backend) -> None:
    data = dataset()
    source = backend.make(data, TAGS)
    lo, hi = START + pd.Timedelta(hours=30), START + pd.Timedelta(hours=41, minutes=5)
    if not source.keeps_readings:
        with pytest.raises(NotImplementedError, match="store"):
            source.read(["PT-100"], lo.to_pydatetime(), hi.to_pydatetime())
        return
    got = source.read(["PT-100", "FT-203"], lo.to_pydatetime(), hi.to_pydatetime())
    part = data[(data["time"] >= lo) & (data["time"] < hi) & (data["tag"] != "TT-100")]
    pd.testing.assert_frame_equal(canonical(got), expected(part))


def test_unknown_configured_tag(backend: Backend) -> None:
    source = backend.make(dataset(), [*TAGS, TagSpec("XX-9", "bar", "pressure")])
    if backend.name.endswith("wide") and source.keeps_readings:
        with pytest.raises(UnknownTagError, match="XX-9"):
            list(source.batches({}))
    problems = source.check()
    assert len(problems) == 1 and "XX-9" in problems[0]
    with (
        pytest.raises(UnknownTagError, match="NOT-A-TAG")
        if source.keeps_readings
        else (pytest.raises(NotImplementedError))
    ):
        source.read(["NOT-A-TAG"], START.to_pydatetime(), (START + STEP).to_pydatetime())


def test_quality_codes_of_long_sources(backend: Backend) -> None:
    if not backend.long:
        pytest.skip("a wide layout carries no quality codes")
    data = dataset()
    data.loc[data.index % 5 == 0, "quality"] = "BAD"
    data.loc[data.index % 7 == 0, "quality"] = "192"
    got = ingest(backend.make(data, TAGS), {})
    want = expected(data)
    assert (~want["good"]).sum() > 0
    pd.testing.assert_frame_equal(canonical(got.readings), want)
    assert got.notes["unmapped_quality"] == int((data["quality"] == "BAD").sum())
