"""Ingest throughput: CSV source vs a bare pyarrow read, SQL source vs pandas.read_sql.

Generates (in a temporary folder) a wide CSV of 1-minute data for 100 tags — a year by
default: 525 600 rows x 100 tags — then, each in its own child process so that peak
memory is measured per phase:

* ``bare``  — ``pandas.read_csv(path, engine="pyarrow")`` of the file;
* ``csv``   — `CsvSource` ingest of the same file, all batches (readings counted and
  dropped, as the store would after writing them).

and prints rows/s, the time ratio (goal: at most 2x the bare read) and the peak RSS of
each phase (goal: bounded, well under the file size). Then, when PostgreSQL answers,
loads ``--sql-days`` of the same data into a long table and times `SqlSource.read` of
that window against a bare ``pandas.read_sql`` of the same query.

Usage: ``python benchmarks/ingest.py [--days 365] [--tags 100] [--sql-days 10]``
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from datetime import timedelta
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.csv as pacsv

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from adapters.records import TagSpec

START = pd.Timestamp("2026-01-01", tz="UTC")


def tag_specs(n: int) -> list[TagSpec]:
    """Invented tags: a third pressures (bar), a third flows (m3/h), the rest temperatures."""
    kinds = [("PT", "bar", "pressure"), ("FT", "m3/h", "flow"), ("TT", "degC", "temperature")]
    return [
        TagSpec(f"{kinds[i % 3][0]}-{100 + i}", kinds[i % 3][1], kinds[i % 3][2]) for i in range(n)
    ]


def values_block(day: int, n_tags: int) -> np.ndarray:
    """One day of minute values, (1440, n_tags), smooth plus noise, 3 decimals."""
    rng = np.random.default_rng(day)
    minutes = np.arange(1440)[:, None] + day * 1440
    base = 50 + 20 * np.sin(2 * np.pi * minutes / 1440 + np.arange(n_tags)[None, :])
    return np.round(base + rng.normal(0, 0.5, (1440, n_tags)), 3)


def generate(path: Path, days: int, n_tags: int) -> int:
    """Write the wide CSV one day at a time (bounded memory); return its size [bytes]."""
    names = [t.tag for t in tag_specs(n_tags)]
    options = pacsv.WriteOptions(include_header=True)
    with pa.OSFile(str(path), "wb") as sink:
        writer = None
        for day in range(days):
            stamps = (START + pd.Timedelta(days=day)) + pd.to_timedelta(np.arange(1440), "min")
            cols = {"timestamp": pa.array(stamps.strftime("%Y-%m-%dT%H:%M:%SZ"))}
            block = values_block(day, n_tags)
            cols.update({name: pa.array(block[:, j]) for j, name in enumerate(names)})
            table = pa.table(cols)
            if writer is None:
                writer = pacsv.CSVWriter(sink, table.schema, write_options=options)
            writer.write_table(table)
        if writer is not None:
            writer.close()
    # pyarrow quotes strings; plain exports do not: strip the quotes of the header and times
    text_size = _unquote(path)
    return text_size


def _unquote(path: Path) -> int:
    tmp = path.with_suffix(".tmp")
    with open(path, "rb") as src, open(tmp, "wb") as dst:
        for block in iter(lambda: src.read(1 << 24), b""):
            dst.write(block.replace(b'"', b""))
    tmp.replace(path)
    return path.stat().st_size


def peak_rss_mb() -> float:
    """Peak resident set size of this process [MiB] (Linux reports KiB)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def phase_bare(path: Path) -> dict[str, float]:
    t0 = time.perf_counter()
    frame = pd.read_csv(path, engine="pyarrow")
    seconds = time.perf_counter() - t0
    return {"seconds": seconds, "rows": len(frame), "values": int(frame.iloc[:, 1:].count().sum())}


def phase_csv(path: Path, n_tags: int, chunk_rows: int) -> dict[str, float]:
    from adapters.csv_source import CsvSource

    source = CsvSource(tag_specs(n_tags), path=path.parent, settle_seconds=0, chunk_rows=chunk_rows)
    t0 = time.perf_counter()
    readings = batches = 0
    for batch in source.batches({}):
        readings += len(batch.readings)
        batches += 1
    seconds = time.perf_counter() - t0
    return {"seconds": seconds, "values": readings, "batches": batches}


def child(args: argparse.Namespace) -> None:
    path = Path(args.file)
    if args.phase == "bare":
        result = phase_bare(path)
    else:
        result = phase_csv(path, args.tags, args.chunk_rows)
    result["peak_rss_mb"] = peak_rss_mb()
    print(json.dumps(result))


def run_child(phase: str, path: Path, args: argparse.Namespace) -> dict[str, float]:
    command = [
        sys.executable, __file__, "--phase", phase, "--file", str(path),
        "--tags", str(args.tags), "--chunk-rows", str(args.chunk_rows),
    ]  # fmt: skip
    out = subprocess.run(command, check=True, capture_output=True, text=True).stdout
    return dict(json.loads(out.strip().splitlines()[-1]))


def sql_benchmark(url: str, days: int, n_tags: int) -> None:
    import sqlalchemy as sa

    from adapters.sql_source import SqlSource

    engine = sa.create_engine(url)
    try:
        with engine.connect() as conn:
            conn.execute(sa.text("SELECT 1"))
    except Exception as exc:  # any driver error: no server, no SQL figures
        print(f"SQL: PostgreSQL not reachable ({type(exc).__name__}); skipped")
        return
    table = f"bw_bench_{os.getpid()}"
    meta = sa.MetaData()
    tbl = sa.Table(
        table, meta,
        sa.Column("time", sa.DateTime(timezone=True), nullable=False),
        sa.Column("tag", sa.String(32), nullable=False),
        sa.Column("value", sa.Double()),
    )  # fmt: skip
    names = [t.tag for t in tag_specs(n_tags)]
    try:
        meta.create_all(engine)
        t0 = time.perf_counter()
        raw = engine.raw_connection()
        try:
            cur = raw.cursor()
            with cur.copy(f"COPY {table} (time, tag, value) FROM STDIN") as copy:
                for day in range(days):
                    block = values_block(day, n_tags)
                    stamps = (START + pd.Timedelta(days=day)) + pd.to_timedelta(
                        np.arange(1440), "min"
                    )
                    iso = stamps.strftime("%Y-%m-%d %H:%M:%S+00")
                    lines = [
                        f"{iso[i]}\t{names[j]}\t{block[i, j]}\n"
                        for i in range(1440)
                        for j in range(n_tags)
                    ]
                    copy.write("".join(lines))
            raw.commit()
        finally:
            raw.close()
        with engine.begin() as conn:
            conn.execute(sa.text(f"ANALYZE {table}"))
        rows = days * 1440 * n_tags
        print(f"SQL: loaded {rows:,} long rows ({days} days) in {time.perf_counter() - t0:.1f} s")
        start = START.to_pydatetime()
        end = (START + pd.Timedelta(days=days)).to_pydatetime()
        query = sa.select(tbl.c.time, tbl.c.tag, tbl.c.value).where(
            tbl.c.tag.in_(names), tbl.c.time >= start, tbl.c.time < end
        )
        t0 = time.perf_counter()
        bare = pd.read_sql(query, engine)
        t_bare = time.perf_counter() - t0
        source = SqlSource(tag_specs(n_tags), url=url, table=table, window=timedelta(days=1))
        t0 = time.perf_counter()
        got = source.read(names, start, end)
        t_read = time.perf_counter() - t0
        t0 = time.perf_counter()
        n_batches = sum(len(b.readings) for b in source.batches({}))
        t_batches = time.perf_counter() - t0
        source.close()
        assert len(got) == len(bare) == rows == n_batches, (len(got), len(bare), n_batches)
        print(f"SQL bare pandas.read_sql : {t_bare:7.2f} s  {rows / t_bare:12,.0f} rows/s")
        print(f"SQL SqlSource.read       : {t_read:7.2f} s  {rows / t_read:12,.0f} rows/s"
              f"  ratio {t_read / t_bare:.2f}x")  # fmt: skip
        print(f"SQL SqlSource.batches 1 d: {t_batches:7.2f} s  {rows / t_batches:12,.0f} rows/s"
              f"  ratio {t_batches / t_bare:.2f}x")  # fmt: skip
    finally:
        with engine.begin() as conn:
            tbl.drop(conn, checkfirst=True)
        engine.dispose()


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--days", type=int, default=365, help="days of 1-minute data")
    parser.add_argument("--tags", type=int, default=100, help="number of tags (columns)")
    parser.add_argument("--chunk-rows", type=int, default=200_000, help="readings per batch")
    parser.add_argument("--sql-days", type=int, default=10, help="days loaded into PostgreSQL")
    parser.add_argument(
        "--postgres-url",
        default=os.environ.get(
            "BRANCHWATCH_TEST_POSTGRES_URL", "postgresql+psycopg://postgres@127.0.0.1:5432/test"
        ),
    )
    parser.add_argument("--phase", choices=["bare", "csv"], help=argparse.SUPPRESS)
    parser.add_argument("--file", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.phase:
        child(args)
        return
    with tempfile.TemporaryDirectory(prefix="bw_bench_") as tmp:
        path = Path(tmp) / "historian_wide.csv"
        t0 = time.perf_counter()
        size = generate(path, args.days, args.tags)
        rows = args.days * 1440
        print(f"file: {rows:,} rows x {args.tags} tags, {size / 2**20:,.0f} MiB "
              f"(generated in {time.perf_counter() - t0:.1f} s)")  # fmt: skip
        bare = run_child("bare", path, args)
        ingest = run_child("csv", path, args)
    values = rows * args.tags
    assert int(ingest["values"]) == int(bare["values"]) == values, (ingest, bare)
    for name, r in (("bare pandas.read_csv(pyarrow)", bare), ("CsvSource ingest", ingest)):
        rate, value_rate = rows / r["seconds"], values / r["seconds"]
        print(f"{name:30s}: {r['seconds']:7.2f} s  {rate:10,.0f} rows/s  "
              f"{value_rate:12,.0f} values/s  peak RSS {r['peak_rss_mb']:7,.0f} MiB")  # fmt: skip
    print(f"ratio CsvSource / bare read: {ingest['seconds'] / bare['seconds']:.2f}x (goal <= 2x); "
          f"batches: {int(ingest['batches'])}; "
          f"peak RSS / file size: {ingest['peak_rss_mb'] / (size / 2**20):.2f}")  # fmt: skip
    if args.sql_days > 0:
        sql_benchmark(args.postgres_url, args.sql_days, args.tags)


if __name__ == "__main__":
    main()
