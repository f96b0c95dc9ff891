"""Fleet scale: N simulated sites × M branches × D days of 5-minute data on PostgreSQL,
analysed three ways, and what a cluster for a utility's whole history would take.

Each site is the example site's six branches repeated to M (new names and tags, as in
`benchmarks/analysis_speed.py`), time zone UTC, its readings simulated at ``--step``
seconds and stored in its own PostgreSQL schema. The same analysis (every daily window
of every site, then each site's diagnosis) is timed

1. serial: `monitor.app.jobs.analyze` with ``jobs=1``, site after site (today's default on
   one core);
2. process pool: `monitor.app.jobs.analyze` with ``--jobs`` worker processes, site after
   site (today's ``--executor local``; the pool taken however short the run, and started
   once per site, as ``analyze`` does);
3. Dask: `monitor.app.cluster.analyze_on_cluster` on a `distributed.LocalCluster` of
   ``--jobs`` single-threaded worker processes, all sites in one run (``--executor
   dask``); the cluster's start is timed apart, as a cluster outlives one run. It runs
   twice: with Dask's defaults, and with the workers' statistical profiler (a thread
   sampling every 10 ms) off, to show what that costs.

Before each run the results tables are emptied, so every run writes the same rows.
Then the store's fit write rate is measured on its own (`SqlStore.store_window` of the
stored windows' rows, one writer), and the cluster for 10,000 branches × 5 years in one
hour is estimated from the measured cost per branch-day.

The issue's full size (50 sites × 40 branches × 1 year) takes hours on a 2-core machine:
the default is a size that runs in about five minutes, and the figures are scaled
(per branch-day) to the full size; the output says so. The machine may be shared with
other work: wall and CPU times are both printed.

    .venv/bin/python benchmarks/fleet.py [--sites 4] [--branches 12] [--days 21]
        [--jobs 2] [--step 300] [--url postgresql+psycopg://...]
"""

from __future__ import annotations

import argparse
import os
import resource
import sys
import time
import uuid
from collections.abc import Callable
from dataclasses import replace
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import dask
import distributed
import pandas as pd
import sqlalchemy as sa

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from analysis_speed import readings_frame, synthetic_site

from adapters.fit_record import fits_of
from adapters.migrations.tables import (
    data_health_t,
    findings_t,
    fits_t,
    header_balance_t,
    window_checks_t,
)
from adapters.records import Batch, empty_quarantine
from adapters.store import SqlStore
from monitor.app.cluster import SiteRun, analyze_on_cluster
from monitor.app.demo import simulate_site
from monitor.app.jobs import analyze
from monitor.site.config import Site

START = datetime(2026, 4, 1, tzinfo=UTC)
FULL_SITES, FULL_BRANCHES, FULL_DAYS = 50, 40, 365
TARGET_BRANCHES, TARGET_YEARS, TARGET_S = 10_000, 5, 3600.0
OVERHEAD_GOAL = 0.10
DEFAULT_URL = os.environ.get("BRANCHWATCH_TEST_POSTGRES_URL",
                             "postgresql+psycopg://postgres@127.0.0.1:5432/test")
RESULT_TABLES = (fits_t, window_checks_t, header_balance_t, data_health_t, findings_t)


class StoredReadings:
    """The readings are in the store (as after a CSV ingest): no source to read."""

    keeps_readings = False
    name = "bench"

    def close(self) -> None:
        pass


def cpu_all() -> float:
    """CPU seconds of this process and its waited-for children [s]."""
    own = resource.getrusage(resource.RUSAGE_SELF)
    kids = resource.getrusage(resource.RUSAGE_CHILDREN)
    return own.ru_utime + own.ru_stime + kids.ru_utime + kids.ru_stime


def fill(site: Site, store: SqlStore, days: int, step_s: float, seed: int) -> int:
    rows = 0
    for d in range(days):
        a = START + timedelta(days=d)
        sim = simulate_site(site, a, a + timedelta(days=1), step_s=step_s, seed=seed + d)
        frame = readings_frame(site, sim)
        store.store_batch(Batch(frame, empty_quarantine(), f"sim-{d}", {"day": d}),
                          source="bench")
        rows += len(frame)
    return rows


def clear_results(stores: list[SqlStore]) -> None:
    for store in stores:
        with store.engine.begin() as conn:
            for table in RESULT_TABLES:
                conn.execute(table.delete())


def timed(label: str, func: Callable[[], Any]) -> tuple[float, float, Any]:
    w0, c0 = time.perf_counter(), cpu_all()
    out = func()
    wall, cpu = time.perf_counter() - w0, cpu_all() - c0
    print(f"  {label:<34} wall {wall:7.1f} s   cpu (this process and pool) {cpu:7.1f} s",
          flush=True)
    return wall, cpu, out


def write_rate(store: SqlStore) -> tuple[float, int]:
    """Fit rows per second that `SqlStore.store_window` writes (one writer): the stored
    windows' fits and screening rows written again, one transaction per window."""
    fits = store.read_fits().drop(columns="computed_at")
    screening = store.read_screening()
    clear_results([store])
    groups = list(fits.groupby("window_start"))
    t0 = time.perf_counter()
    for ws, rows in groups:
        store.store_window(fits=fits_of(rows),
                           screening=screening[screening["window_start"] == ws],
                           balance=None, health=pd.DataFrame())
    return len(fits) / (time.perf_counter() - t0), len(fits)


def on_local_cluster(runs: list[SiteRun], end: datetime, jobs: int, profiler: bool
                     ) -> tuple[float, float, float, Any]:
    """(wall, cluster start, workers' CPU, summaries) of `analyze_on_cluster` on a fresh
    LocalCluster; the workers' CPU is counted from just before the run (not their
    imports)."""
    c0 = time.perf_counter()
    with distributed.LocalCluster(n_workers=jobs, threads_per_worker=1, processes=True,
                                  dashboard_address=":0") as cluster, \
            distributed.Client(cluster) as client:
        start_s = time.perf_counter() - c0
        before = client.run(time.process_time)
        wall, _, out = timed(
            f"Dask LocalCluster ({jobs} workers, profiler {'on' if profiler else 'off'})",
            lambda: analyze_on_cluster(client, runs, START, end))
        after = client.run(time.process_time)
    print(f"    (its start: {start_s:.1f} s, apart)")
    return wall, start_s, sum(after[w] - before.get(w, 0.0) for w in after), out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--sites", type=int, default=4)
    ap.add_argument("--branches", type=int, default=12)
    ap.add_argument("--days", type=int, default=21)
    ap.add_argument("--jobs", type=int, default=2, help="worker processes (pool and Dask)")
    ap.add_argument("--step", type=float, default=300.0, help="logging interval [s]")
    ap.add_argument("--url", default=DEFAULT_URL, help="PostgreSQL URL (a scratch database)")
    args = ap.parse_args()

    n, m, d, jobs = args.sites, args.branches, args.days, args.jobs
    branch_days = n * m * d
    print(f"fleet benchmark: {n} sites x {m} branches x {d} days of {args.step:g}-s data "
          f"= {branch_days} branch-days, {jobs} workers, {os.cpu_count()} cores; "
          f"PostgreSQL {args.url.rsplit('@', 1)[-1]}")
    print(f"(the issue's full size, {FULL_SITES} x {FULL_BRANCHES} x {FULL_DAYS} days, is "
          "too long for this machine: figures below are measured at this size and scaled "
          "per branch-day)")
    schemas = [f"bw_fleet_bench_{uuid.uuid4().hex[:8]}" for _ in range(n)]
    stores: list[SqlStore] = []
    try:
        w0 = time.perf_counter()
        sites = []
        rows = 0
        for i, schema in enumerate(schemas):
            site = replace(synthetic_site(m), name=f"bench site {i + 1}")
            store = SqlStore(args.url, schema=schema)
            rows += fill(site, store, d, args.step, seed=100 * i)
            sites.append(site)
            stores.append(store)
        print(f"  simulated and stored {rows} readings in {time.perf_counter() - w0:.0f} s")
        end = START + timedelta(days=d)
        source: Any = StoredReadings()

        def local(j: int) -> Callable[[], Any]:
            return lambda: [analyze(s, st, source, START, end, jobs=j, parallel_after_s=0.0)
                            for s, st in zip(sites, stores, strict=True)]

        clear_results(stores)
        serial_wall, serial_cpu, serial = timed("serial (--jobs 1)", local(1))
        clear_results(stores)
        pool_wall, _, _ = timed(f"process pool (--jobs {jobs})", local(jobs))
        runs = [SiteRun(s, st, source) for s, st in zip(sites, stores, strict=True)]
        dask_runs = []
        for profiler in (True, False):
            clear_results(stores)
            with dask.config.set({"distributed.worker.profile.enabled": profiler}):
                dask_runs.append(on_local_cluster(runs, end, jobs, profiler))
        (dask_wall, start_s, worker_cpu, on_cluster), (quiet_wall, _, quiet_cpu, _) = dask_runs
        fits_serial = sum(s.fits for s in serial)
        fits_dask = sum(s.fits for s in on_cluster)
        assert fits_serial == fits_dask == branch_days, (fits_serial, fits_dask)
        rate, n_rate = write_rate(stores[0])
    finally:
        for store in stores:
            store.close()
        engine = sa.create_engine(args.url)
        with engine.begin() as conn:
            for schema in schemas:
                conn.exec_driver_sql(f'DROP SCHEMA IF EXISTS "{schema}" CASCADE')
        engine.dispose()

    print()
    print("figures")
    for label, wall in (("serial", serial_wall), (f"process pool x{jobs}", pool_wall),
                        (f"Dask x{jobs}", dask_wall)):
        print(f"  {label:<18} {branch_days / wall:8.1f} branch-days/s")
    print(f"  scaling ratio (serial wall / Dask wall): {serial_wall / dask_wall:.2f} "
          f"on {jobs} workers (ideal {jobs})")
    overhead = dask_wall / pool_wall - 1.0
    verdict = "within" if overhead <= OVERHEAD_GOAL else "over"
    print(f"  Dask overhead against the process pool, one machine: {overhead:+.1%} "
          f"({verdict} the {OVERHEAD_GOAL:.0%} goal). The pool starts its workers once per "
          f"site (as 'analyze --jobs' does), the cluster once ({start_s:.1f} s, not "
          f"counted); counted: {(dask_wall + start_s) / pool_wall - 1.0:+.1%}")
    print(f"  Dask with the workers' statistical profiler off: {branch_days / quiet_wall:.1f} "
          f"branch-days/s, {quiet_cpu / branch_days * 1e3:.1f} ms CPU per branch-day")
    per_bd = serial_cpu / branch_days
    per_bd_dask = worker_cpu / branch_days
    print(f"  cost per branch-day: {per_bd * 1e3:.1f} ms CPU serial, "
          f"{per_bd_dask * 1e3:.1f} ms CPU in the Dask workers (read, analyse, write; "
          f"diagnosis included): Dask's CPU overhead {per_bd_dask / per_bd - 1.0:+.0%}")
    full_bd = FULL_SITES * FULL_BRANCHES * FULL_DAYS
    print(f"  full size ({FULL_SITES} x {FULL_BRANCHES} x {FULL_DAYS} d = {full_bd} "
          f"branch-days), scaled: serial {full_bd / (branch_days / serial_wall) / 3600:.1f} h, "
          f"Dask on {jobs} workers {full_bd / (branch_days / dask_wall) / 3600:.1f} h")
    print(f"  store fit write rate (store_window, one writer, {n_rate} fits with their "
          f"screening rows): {rate:.0f} fits/s")

    target_bd = TARGET_BRANCHES * TARGET_YEARS * 365.25
    need = target_bd / TARGET_S
    workers = need * per_bd_dask
    print()
    print(f"estimate: {TARGET_BRANCHES} branches x {TARGET_YEARS} years = {target_bd:.3g} "
          f"branch-days in one hour needs {need:.0f} branch-days/s:")
    print(f"  workers: {need:.0f}/s x {per_bd_dask * 1e3:.1f} ms = {workers:.0f} busy cores "
          f"(say {workers * 1.25:.0f} with a quarter spare)")
    print(f"  store: {need:.0f} fit rows/s (each with its screening rows) against "
          f"{rate:.0f}/s measured for one writer here: {need / rate:.1f} writers' worth. "
          "The store's write rate is the likely limit: one PostgreSQL server takes a few "
          "writers in parallel before its disk and WAL saturate; beyond that, split the "
          "fleet over several stores (one per site already is) or write in larger "
          "transactions.")


if __name__ == "__main__":
    main()
