"""Speed of the daily analysis: read a window from the store, screen, fit, diagnose.

A synthetic site of N branches is built from the example site's six branches
(`config/example-site.toml`), repeated with new names and tags (the pump's flows are
scaled so that the header pressure stays where it is on the six-branch site). The
simulator makes 1-minute historian data, which goes into a SQLite store (a temp file)
through `SqlStore.store_batch`.

* One day of a big site (goal <= 10 s), in this process as `monitor.app.jobs.analyze` does
  per window: reading (`SqlStore.read_readings` of every site tag), computing
  (`monitor.analysis.window.analyze_window`, then `monitor.analysis.diagnose.diagnose`
  over the fits).
* A year of a 100-branch site (goal <= 5 min), on ``--days`` days:
  first the same in-process loop, for the shares of reading and computing; then the real
  `monitor.app.jobs.analyze` (read, compute, write every window, diagnose) in this process
  and with ``--jobs`` worker processes (from the second window on, as a long backfill
  runs), wall and CPU of all processes. The year is estimated from each: the first
  windows (worker start included) once, the steady per-window time of the later windows
  for the rest of the 365, and the diagnosis of a whole year's history timed on its own
  (`monitor.app.site_diagnosis.diagnose_site` over 365 windows made by repeating the
  measured windows' stored fits, screening counts and balances with shifted window
  times).

Wall and CPU time are printed: the machine is shared.

    .venv/bin/python benchmarks/analysis_speed.py [--big 500] [--year-branches 100]
        [--days 10] [--jobs 2] [--profile]
"""

from __future__ import annotations

import argparse
import copy
import cProfile
import math
import pstats
import resource
import tempfile
import time
import tomllib
from collections.abc import Iterator, Mapping
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from adapters.base import ReadingsSource
from adapters.fit_record import fits_of
from adapters.records import Batch, empty_quarantine
from adapters.store import SqlStore
from model.simulate import Simulation
from monitor.analysis.diagnose import diagnose
from monitor.analysis.window import analyze_window
from monitor.app.demo import simulate_site
from monitor.app.jobs import analyze
from monitor.app.site_diagnosis import diagnose_site, diagnosis_settings
from monitor.site.config import Site, parse_site

EXAMPLE = Path(__file__).resolve().parent.parent / "config" / "example-site.toml"
START = datetime(2026, 4, 1, tzinfo=UTC)
GOAL_BIG_S = 10.0
GOAL_YEAR_S = 300.0
YEAR_DAYS = 365
#: Tags every copy of a branch shares with the others (the common return header).
SHARED_TAGS = frozenset({"PT-150"})


def synthetic_site(n_branches: int) -> Site:
    """The example site with its branches repeated to *n_branches* (new names and tags),
    its time zone UTC."""
    doc = tomllib.loads(EXAMPLE.read_text(encoding="utf-8"))
    base = doc.pop("branch")
    doc.pop("store", None)
    doc.pop("source", None)
    # Windows are site-local days: in UTC they are the stored days, both loops the same.
    doc["site"]["timezone"] = "UTC"
    scale = n_branches / len(base)
    # The pump delivers proportionally more: same head at scale × the flow.
    doc["pump"]["curve"] = [
        {"flow": _scaled(p["flow"], scale), "head": p["head"]} for p in doc["pump"]["curve"]
    ]
    branches = []
    for i in range(n_branches):
        proto = copy.deepcopy(base[i % len(base)])
        copy_no = i // len(base)
        proto["name"] = f"{proto['name']}-{copy_no:03d}"
        branches.append(_retag(proto, copy_no))
    doc["branch"] = branches
    return parse_site(doc, path=EXAMPLE)


def _scaled(quantity: str, factor: float) -> str:
    value, unit = quantity.split(maxsplit=1)
    return f"{float(value) * factor:.6g} {unit}"


def _retag(node: Any, copy_no: int) -> Any:
    """Every ``tag = "XX-nnn"`` below *node* becomes ``XX-nnn-copy`` (shared tags kept)."""
    if isinstance(node, dict):
        out = {}
        for key, value in node.items():
            if key == "tag" and isinstance(value, str) and value not in SHARED_TAGS:
                out[key] = f"{value}-{copy_no:03d}"
            else:
                out[key] = _retag(value, copy_no)
        return out
    if isinstance(node, list):
        return [_retag(v, copy_no) for v in node]
    return node


def readings_frame(site: Site, sim: Simulation) -> pd.DataFrame:
    """The simulation as a readings frame (time UTC, tag, value SI, good), site tags only."""
    times = pd.DatetimeIndex(sim.times).tz_localize("UTC")
    tags = [t for t in sim.values if t in site.tags]
    n = len(times)
    return pd.DataFrame(
        {
            "time": times[np.tile(np.arange(n), len(tags))],
            "tag": pd.Series(np.repeat(np.array(tags, dtype=object), n), dtype=object),
            "value": np.concatenate([sim.values[t] for t in tags]) if tags else np.zeros(0),
            "good": True,
        }
    )


@dataclass
class Timing:
    wall_read: float = 0.0
    cpu_read: float = 0.0
    wall_compute: float = 0.0
    cpu_compute: float = 0.0
    windows: int = 0
    fits_ok: int = 0
    fits: int = 0
    findings: int = 0

    @property
    def wall(self) -> float:
        return self.wall_read + self.wall_compute

    @property
    def cpu(self) -> float:
        return self.cpu_read + self.cpu_compute


def fill_store(site: Site, days: int, folder: Path, seed: int) -> tuple[SqlStore, int]:
    """Simulate *days* of 1-minute data and store it (one batch per day)."""
    store = SqlStore(f"sqlite:///{folder / 'speed.db'}")
    rows = 0
    for d in range(days):
        a = START + timedelta(days=d)
        sim = simulate_site(site, a, a + timedelta(days=1), step_s=60.0, seed=seed + d)
        frame = readings_frame(site, sim)
        batch = Batch(frame, empty_quarantine(), f"sim-{d}", {"day": d})
        store.store_batch(batch, source="bench")
        rows += len(frame)
    return store, rows


def run(site: Site, store: SqlStore, days: int) -> Timing:
    """Analyse *days* windows as `monitor.app.jobs.analyze` does, timing read and compute."""
    timing = Timing()
    fits: list[dict[str, Any]] = []
    screening: list[pd.DataFrame] = []
    balance: list[dict[str, Any]] = []
    tags = list(site.tags)
    for d in range(days):
        a = START + timedelta(days=d)
        b = a + timedelta(days=1)
        w0, c0 = time.perf_counter(), time.process_time()
        readings = store.read_readings(tags, a, b)
        w1, c1 = time.perf_counter(), time.process_time()
        result = analyze_window(site, readings, a, b)
        w2, c2 = time.perf_counter(), time.process_time()
        timing.wall_read += w1 - w0
        timing.cpu_read += c1 - c0
        timing.wall_compute += w2 - w1
        timing.cpu_compute += c2 - c1
        fits += [f.to_row() for f in result.fits]
        screening.append(result.screening)
        if result.balance is not None:
            balance.append(result.balance)
        timing.windows += 1
    w0, c0 = time.perf_counter(), time.process_time()
    history = pd.DataFrame(fits)
    findings = diagnose(
        history,
        settings=diagnosis_settings(site),
        now=START + timedelta(days=days),
        screening=pd.concat(screening, ignore_index=True),
        balance=pd.DataFrame(balance) if balance else None,
    )
    timing.wall_compute += time.perf_counter() - w0
    timing.cpu_compute += time.process_time() - c0
    timing.fits = len(fits)
    timing.fits_ok = sum(1 for f in fits if f.get("status") in ("ok", "not_identifiable"))
    timing.findings = len(findings)
    return timing


def report(label: str, n_branches: int, days: int, t: Timing, *, scale_to: int | None,
           goal_s: float | None) -> None:
    branch_days = n_branches * days
    share = t.wall_read / t.wall if t.wall > 0 else math.nan
    print(f"\n{label}: {n_branches} branches x {days} day(s) of 1-minute data")
    print(f"  fits {t.fits} ({t.fits_ok} usable), findings {t.findings}")
    print(f"  wall {t.wall:8.2f} s  (read {t.wall_read:.2f} s, compute {t.wall_compute:.2f} s;"
          f" reading {100 * share:.0f} %, computing {100 * (1 - share):.0f} %)")
    print(f"  cpu  {t.cpu:8.2f} s  (read {t.cpu_read:.2f} s, compute {t.cpu_compute:.2f} s)")
    print(f"  per branch-day: wall {1e3 * t.wall / branch_days:.2f} ms, "
          f"cpu {1e3 * t.cpu / branch_days:.2f} ms")
    total, cpu = t.wall, t.cpu
    if scale_to is not None and scale_to != days:
        total, cpu = t.wall * scale_to / days, t.cpu * scale_to / days
        print(f"  scaled linearly to {scale_to} days: wall {total:.1f} s, cpu {cpu:.1f} s")
    if goal_s is not None:
        verdict = "met" if total <= goal_s else "NOT met"
        print(f"  goal <= {goal_s:.0f} s: {verdict} (wall {total:.1f} s, cpu {cpu:.1f} s)")


class StoredReadings(ReadingsSource):
    """The benchmark's source: everything is in the store already (as after ingest)."""

    keeps_readings = False

    def __init__(self) -> None:
        super().__init__([], name="bench")

    def batches(self, cursors: Mapping[str, Mapping[str, Any]]) -> Iterator[Batch]:
        return iter(())


def cpu_all() -> float:
    """CPU seconds of this process and of its finished (waited-for) children."""
    kids = resource.getrusage(resource.RUSAGE_CHILDREN)
    return time.process_time() + kids.ru_utime + kids.ru_stime


@dataclass
class JobsTiming:
    wall: float  # the whole `analyze` call
    cpu: float  # all processes
    written: list[float]  # from the call to each window written [s]
    jobs: int

    @property
    def head(self) -> int:
        """Windows before the steady pace: the first (analysed in this process, timed)
        and, with workers, their first round (worker start included)."""
        return min(1 + self.jobs if self.jobs > 1 else 1, len(self.written))

    @property
    def first_round(self) -> float:
        """Until the `head` windows are written [s]."""
        return self.written[self.head - 1]

    @property
    def per_window(self) -> float:
        """Steady wall time per window after the head (the workers overlap) [s]."""
        later = len(self.written) - self.head
        if later < 1:
            return math.nan
        return (self.written[-1] - self.first_round) / later


def run_jobs(site: Site, store: SqlStore, days: int, jobs: int) -> JobsTiming:
    """`monitor.app.jobs.analyze` over *days* windows with *jobs* processes, timed."""
    marks: list[float] = []
    w0, c0 = time.perf_counter(), cpu_all()
    # Workers whatever the run's length, as a year's backfill would take them.
    summary = analyze(site, store, StoredReadings(), START, START + timedelta(days=days),
                      jobs=jobs, progress=lambda i, n: marks.append(time.perf_counter()),
                      parallel_after_s=0.0)
    wall, cpu = time.perf_counter() - w0, cpu_all() - c0
    assert summary.windows == days == len(marks), (summary.windows, days, len(marks))
    return JobsTiming(wall=wall, cpu=cpu, written=[m - w0 for m in marks], jobs=jobs)


def year_history(store: SqlStore, days: int, target: int) -> None:
    """Repeat the stored windows of *days* days, shifted, until *target* days are stored."""
    fits = store.read_fits()
    screening = store.read_screening()
    balance = store.read_balance()
    no_health = pd.DataFrame({"tag": [], "day": [], "flag": [], "count": []})
    for k in range(1, math.ceil(target / days)):
        shift = pd.Timedelta(days=k * days)
        for d in range(days):
            if k * days + d >= target:
                return
            ws = pd.Timestamp(START + timedelta(days=d))
            f = fits[fits["window_start"] == ws].copy()
            sc = screening[screening["window_start"] == ws].copy()
            b = balance[balance["window_start"] == ws]
            for frame in (f, sc):
                frame["window_start"] += shift
                frame["window_end"] += shift
            row = None
            if len(b):
                row = b.iloc[0].to_dict()
                row["window_start"] += shift
                row["window_end"] += shift
            store.store_window(fits=fits_of(f.drop(columns="computed_at")),
                               screening=sc, balance=row, health=no_health)


def report_jobs(n_branches: int, days: int, par: JobsTiming) -> float:
    """Print one timed `analyze` run; return its estimate for a year's windows [s]."""
    jobs = par.jobs
    procs = f"{jobs} worker processes + this one" if jobs > 1 else "this process only"
    print(f"  monitor.app.jobs.analyze, {procs} (read, compute, write {days} windows, "
          f"diagnose {days} days):")
    print(f"    wall {par.wall:.2f} s, cpu {par.cpu:.2f} s (all processes); first "
          f"{par.head} window(s) written after {par.first_round:.2f} s"
          f"{' (the first here, then worker start)' if jobs > 1 else ''}, then "
          f"{par.per_window:.2f} s wall per window")
    bd = n_branches * days
    print(f"    per branch-day: wall {1e3 * par.wall / bd:.2f} ms, "
          f"cpu {1e3 * par.cpu / bd:.2f} ms (the whole run)")
    later = YEAR_DAYS - par.head
    windows_year = par.first_round + par.per_window * later
    print(f"    a year's windows: {windows_year:.1f} s wall (first {par.head} + {later} x "
          f"steady)")
    return windows_year


def report_year(serial: Timing, days: int, runs: list[tuple[JobsTiming, float]],
                diag_wall: float, diag_cpu: float, diag_fits: int, findings: int) -> None:
    print(f"  diagnosis of a {YEAR_DAYS}-day history ({diag_fits} fits, {findings} findings; "
          f"the measured windows repeated): wall {diag_wall:.2f} s, cpu {diag_cpu:.2f} s")
    for par, windows_year in runs:
        total = windows_year + diag_wall
        # CPU: the measured run, then the remaining windows at the in-process loop's CPU
        # per window (without writing: a lower bound for those), then the diagnosis.
        cpu_year = par.cpu + serial.cpu / days * (YEAR_DAYS - days) + diag_cpu
        verdict = "met" if total <= GOAL_YEAR_S else "NOT met"
        procs = f"{par.jobs} worker processes" if par.jobs > 1 else "in-process"
        print(f"  year estimate, {procs}: windows {windows_year:.1f} s + diagnosis "
              f"{diag_wall:.1f} s = wall {total:.1f} s (cpu about {cpu_year:.0f} s); "
              f"goal <= {GOAL_YEAR_S:.0f} s: {verdict}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--big", type=int, default=500, help="branches of the one-day case")
    parser.add_argument("--year-branches", type=int, default=100)
    parser.add_argument("--days", type=int, default=10,
                        help="days of the year case actually run (the year is estimated)")
    parser.add_argument("--jobs", type=int, default=2,
                        help="worker processes of the year case's analyze, which also runs "
                        "in-process for comparison")
    parser.add_argument("--seed", type=int, default=11)
    parser.add_argument("--profile", action="store_true",
                        help="print a cProfile of the one-day case's compute")
    args = parser.parse_args()
    if args.days < args.jobs + 4:
        parser.error("--days must be at least --jobs + 4 (the steady per-window time needs "
                     "a few windows after the workers' first round)")

    with tempfile.TemporaryDirectory(prefix="bw-speed-") as tmp:
        folder = Path(tmp)
        big = synthetic_site(args.big)
        (folder / "big").mkdir()
        store, rows = fill_store(big, 1, folder / "big", args.seed)
        print(f"one-day case: {len(big.tags)} tags, {rows} readings stored")
        run(big, store, 1)  # warm up imports and caches
        timing = run(big, store, 1)
        report("one day, big site", args.big, 1, timing, scale_to=None, goal_s=GOAL_BIG_S)
        if args.profile:
            prof = cProfile.Profile()
            prof.enable()
            run(big, store, 1)
            prof.disable()
            pstats.Stats(prof).sort_stats("cumulative").print_stats(25)
        store.close()

        site = synthetic_site(args.year_branches)
        (folder / "year").mkdir()
        store, rows = fill_store(site, args.days, folder / "year", args.seed)
        print(f"\nyear case: {len(site.tags)} tags, {rows} readings stored")
        serial = run(site, store, args.days)
        report("year, in-process loop", args.year_branches, args.days, serial, scale_to=None,
               goal_s=None)
        share = serial.wall_read / serial.wall if serial.wall > 0 else math.nan
        print(f"  in-process shares (no writing): reading {100 * share:.0f} %, "
              f"computing {100 * (1 - share):.0f} % of wall")
        runs = []
        for jobs in sorted({1, args.jobs}):
            par = run_jobs(site, store, args.days, jobs)
            runs.append((par, report_jobs(args.year_branches, args.days, par)))
        year_history(store, args.days, YEAR_DAYS)
        w0, c0 = time.perf_counter(), time.process_time()
        findings = diagnose_site(site, store, now=START + timedelta(days=YEAR_DAYS))
        diag_wall, diag_cpu = time.perf_counter() - w0, time.process_time() - c0
        report_year(serial, args.days, runs, diag_wall, diag_cpu, len(store.read_fits()),
                    len(findings))
        store.close()


if __name__ == "__main__":
    main()
