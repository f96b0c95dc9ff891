"""Results-store and screening throughput.

Prints, for SQLite (a temp file) and — when reachable — PostgreSQL and MariaDB on
loopback: readings stored per second by `SqlStore.store_batch` (new rows), the same batch
again (all duplicates), and `read_readings` rows per second; beside them a bare driver
load of the same rows into an identical table (sqlite3 executemany / psycopg COPY /
pymysql executemany), as the ratio store ÷ bare; and the same batch once more with 1 % of
its values corrected, under ``corrections = "apply"``. Then screening speed of
`monitor.analysis.quality.screen` in samples per second.

    .venv/bin/python benchmarks/store.py [--rows 288000] [--repeat 3]
"""

from __future__ import annotations

import argparse
import os
import tempfile
import time
import uuid
from collections.abc import Callable
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import pandas as pd
import sqlalchemy as sa

from adapters.records import Batch, empty_quarantine
from adapters.store import SqlStore
from monitor.analysis.quality import TagLimits, screen

POSTGRES = os.environ.get(
    "BRANCHWATCH_TEST_POSTGRES_URL", "postgresql+psycopg://postgres@127.0.0.1:5432/test"
)
MARIADB = os.environ.get("BRANCHWATCH_TEST_MARIADB_URL", "mysql+pymysql://root@127.0.0.1:3306/test")
DDL = (
    "CREATE TABLE {name} (tag VARCHAR(100) NOT NULL, time {time} NOT NULL, "
    "value DOUBLE PRECISION, good BOOLEAN NOT NULL, PRIMARY KEY (tag, time))"
)


def readings(rows: int, tags: int = 100) -> pd.DataFrame:
    minutes = rows // tags
    times = pd.date_range("2025-01-01", periods=minutes, freq="min", tz="UTC")
    rng = np.random.default_rng(0)
    return pd.DataFrame(
        {
            "time": np.repeat(times, tags),
            "tag": pd.Series([f"FT-{i:03d}" for i in range(tags)] * minutes, dtype=object),
            "value": rng.normal(0.03, 3e-4, minutes * tags),
            "good": True,
        }
    )


def best(fn: Callable[[], object], repeat: int) -> float:
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return min(times)


def bare_load(url: str, schema: str | None, frame: pd.DataFrame) -> float:
    """Seconds for the plain driver to load *frame* into a fresh identical table."""
    engine = sa.create_engine(url)
    name = "bare_" + uuid.uuid4().hex[:8]
    text = np.datetime_as_string(frame["time"].dt.tz_localize(None).to_numpy("datetime64[us]"))
    rows = list(
        zip(
            frame["tag"],
            [t.replace("T", " ") for t in text],
            frame["value"].tolist(),
            frame["good"].tolist(),
            strict=True,
        )
    )
    dialect = engine.dialect.name
    qualified = f"{schema}.{name}" if schema else name
    with engine.begin() as conn:
        timetype = (
            "TIMESTAMPTZ"
            if dialect == "postgresql"
            else ("DATETIME(6)" if dialect == "mysql" else "DATETIME")
        )
        conn.exec_driver_sql(DDL.format(name=qualified, time=timetype))
    raw = engine.raw_connection()
    try:
        cur = raw.cursor()
        t0 = time.perf_counter()
        if dialect == "postgresql":
            with cur.copy(f"COPY {qualified} (tag, time, value, good) FROM STDIN") as copy:
                for row in rows:
                    copy.write_row(row)
        else:
            mark = "?" if dialect == "sqlite" else "%s"
            cur.executemany(
                f"INSERT INTO {qualified} (tag, time, value, good) VALUES "
                f"({mark}, {mark}, {mark}, {mark})",
                rows,
            )
        raw.commit()
        elapsed = time.perf_counter() - t0
        cur.execute(f"DROP TABLE {qualified}")
        raw.commit()
    finally:
        raw.close()
        engine.dispose()
    return elapsed


def bench_store(
    label: str,
    url: str,
    schema: str | None,
    frame: pd.DataFrame,
    repeat: int,
    cleanup: Callable[[], None],
) -> None:
    n = len(frame)
    first, again, read, fixed = [], [], [], []
    corrected = frame.copy()
    corrected.loc[::100, "value"] *= 1.01  # 1 % of the readings re-issued 1 % higher
    n_fixed = len(corrected.loc[::100])
    try:
        for i in range(repeat):
            store = SqlStore(url, schema=schema)
            with store.engine.begin() as conn:
                conn.execute(sa.text("DELETE FROM readings"))
                conn.execute(sa.text("DELETE FROM corrections"))
            batch = Batch(frame, empty_quarantine(), f"bench-{i}", {"offset": n})
            t0 = time.perf_counter()
            stored = store.store_batch(batch, source="bench")
            first.append(time.perf_counter() - t0)
            assert stored == n, (stored, n)
            t0 = time.perf_counter()
            assert store.store_batch(batch, source="bench") == 0
            again.append(time.perf_counter() - t0)
            t0 = time.perf_counter()
            out = store.read_readings(
                list(frame["tag"].unique()),
                datetime(2024, 1, 1, tzinfo=UTC),
                datetime(2026, 1, 1, tzinfo=UTC),
            )
            read.append(time.perf_counter() - t0)
            assert len(out) == n
            t0 = time.perf_counter()
            wrote = store.write_batch(Batch(corrected, empty_quarantine(), f"bench-{i}",
                                            {"offset": n}), source="bench", corrections="apply")
            fixed.append(time.perf_counter() - t0)
            assert wrote.applied == n_fixed, (wrote, n_fixed)
            store.close()
        bare = min(bare_load(url, schema, frame) for _ in range(repeat))
    finally:
        cleanup()
    print(
        f"{label:<11} store {n / min(first):>9,.0f} rows/s   again (duplicates) "
        f"{n / min(again):>9,.0f} rows/s   read {n / min(read):>9,.0f} rows/s   "
        f"bare driver load {n / bare:>9,.0f} rows/s   store/bare time x{min(first) / bare:.1f}"
    )
    print(
        f"{'':<11} again with 1 % corrected (apply: {n_fixed:,} updated and journalled) "
        f"{n / min(fixed):>9,.0f} rows/s"
    )


def drop(url: str, schema: str) -> Callable[[], None]:
    def run() -> None:
        engine = sa.create_engine(url)
        with engine.begin() as conn:
            if engine.dialect.name == "postgresql":
                conn.exec_driver_sql(f'DROP SCHEMA IF EXISTS "{schema}" CASCADE')
            else:
                conn.exec_driver_sql(f"DROP DATABASE IF EXISTS `{schema}`")
        engine.dispose()

    return run


def reachable(url: str) -> bool:
    try:
        engine = sa.create_engine(url)
        with engine.connect():
            pass
        engine.dispose()
        return True
    except Exception:
        return False


def bench_screen(repeat: int) -> None:
    tags, minutes = 500, 1440
    rng = np.random.default_rng(1)
    frame = readings(tags * minutes, tags)  # flow 0.03 m3/s with 1 % Gaussian noise
    injected = rng.choice(len(frame), 2000, replace=False)
    frame.loc[injected, "value"] += 0.02  # spikes of about 67 sigma
    frame["spiked"] = False
    frame.loc[injected, "spiked"] = True
    specs = {t: TagLimits(kind="flow") for t in frame["tag"].unique()}
    seconds = best(lambda: screen(frame, specs), repeat)
    flags = screen(frame, specs).flags
    # screen sorts by tag and time; match the injected rows back by (tag, time)
    marked = frame.loc[frame["spiked"], ["tag", "time"]].assign(truth=True)
    merged = flags.merge(marked, on=["tag", "time"], how="left")
    truth = merged["truth"].fillna(False).astype(bool)
    found = int((merged["spike"] & truth).sum())
    extra = int((merged["spike"] & ~truth).sum())
    print(
        f"screen      {len(frame) / seconds:>9,.0f} samples/s  ({tags} tags x 1 day of "
        f"1-min data in {seconds:.2f} s); spikes: {found} of 2000 injected found, {extra} "
        f"more flagged on plain noise ({extra / (len(frame) - 2000):.2%}; a 3-sigma rule "
        f"on Gaussian noise flags about 0.27 %)"
    )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=288_000)
    parser.add_argument("--repeat", type=int, default=3)
    args = parser.parse_args()
    frame = readings(args.rows)
    print(f"{len(frame):,} readings of {frame['tag'].nunique()} tags, best of {args.repeat}")
    with tempfile.TemporaryDirectory() as tmp:
        url = f"sqlite:///{Path(tmp) / 'bench.db'}"
        bench_store("SQLite", url, None, frame, args.repeat, lambda: None)
    for label, url in (("PostgreSQL", POSTGRES), ("MariaDB", MARIADB)):
        if not reachable(url):
            print(f"{label:<11} not reachable; skipped")
            continue
        schema = "bw_bench_" + uuid.uuid4().hex[:8]
        bench_store(label, url, schema, frame, args.repeat, drop(url, schema))
    bench_screen(args.repeat)


if __name__ == "__main__":
    main()
