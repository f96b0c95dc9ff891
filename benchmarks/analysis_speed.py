"""Speed of the daily analysis: read a window from the store, screen, fit, diagnose.

A synthetic site of N branches is built from the example site's six branches
(`config/example-site.toml`), repeated with new names and tags (the pump's flows are
scaled so that the header pressure stays where it is on the six-branch site). The
simulator makes 1-minute historian data, which goes into a SQLite store (a temp file)
through `SqlStore.store_batch`. Then, as `monitor.jobs.analyze` does per window:

* reading: `SqlStore.read_readings` of every site tag for the window;
* computing: `monitor.analysis.analyze_window`, and at the end `monitor.diagnose.diagnose`
  over the collected fits, screening counts and balance (as `monitor.jobs.diagnose_site`).

Two cases (issue 4 part 8): one day of a 500-branch site (goal ≤ 10 s) and a year of a
100-branch site (goal ≤ 5 min; measured on ``--days`` days and scaled to 365, which is
said in the output). Wall and CPU time are printed: the machine is shared.

    .venv/bin/python benchmarks/analysis_speed.py [--big 500] [--year-branches 100]
        [--days 30] [--profile]
"""

from __future__ import annotations

import argparse
import copy
import cProfile
import math
import pstats
import tempfile
import time
import tomllib
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from adapters.base import Batch, empty_quarantine
from adapters.migrations.tables import FIT_COLUMNS
from adapters.store import SqlStore
from model.simulate import Simulation
from monitor.analysis import analyze_window
from monitor.config import Site, parse_site
from monitor.demo import simulate_site
from monitor.diagnose import diagnose
from monitor.jobs import diagnosis_settings

EXAMPLE = Path(__file__).resolve().parent.parent / "config" / "example-site.toml"
START = datetime(2026, 4, 1, tzinfo=UTC)
GOAL_BIG_S = 10.0
GOAL_YEAR_S = 300.0
#: Tags every copy of a branch shares with the others (the common return header).
SHARED_TAGS = frozenset({"PT-150"})


def synthetic_site(n_branches: int) -> Site:
    """The example site with its branches repeated to *n_branches* (new names and tags)."""
    doc = tomllib.loads(EXAMPLE.read_text(encoding="utf-8"))
    base = doc.pop("branch")
    doc.pop("store", None)
    doc.pop("source", None)
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
    """Analyse *days* windows as `monitor.jobs.analyze` does, timing read and compute."""
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
        fits += [{k: f.get(k) for k in FIT_COLUMNS if k in f} for f in result.fits]
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
           goal_s: float) -> None:
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
    verdict = "met" if total <= goal_s else "NOT met"
    print(f"  goal <= {goal_s:.0f} s: {verdict} (wall {total:.1f} s, cpu {cpu:.1f} s)")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--big", type=int, default=500, help="branches of the one-day case")
    parser.add_argument("--year-branches", type=int, default=100)
    parser.add_argument("--days", type=int, default=30,
                        help="days of the year case actually run (scaled to 365)")
    parser.add_argument("--seed", type=int, default=11)
    parser.add_argument("--profile", action="store_true",
                        help="print a cProfile of the one-day case's compute")
    args = parser.parse_args()

    with tempfile.TemporaryDirectory(prefix="bw-speed-") as tmp:
        folder = Path(tmp)
        big = synthetic_site(args.big)
        (folder / "big").mkdir()
        store, rows = fill_store(big, 1, folder / "big", args.seed)
        print(f"one-day case: {len(big.tags)} tags, {rows} readings stored")
        run(big, store, 1)  # warm up imports and caches
        timing = run(big, store, 1)
        report("one day, big site", args.big, 1, timing, scale_to=None, goal_s=GOAL_BIG_S)
        store.close()
        if args.profile:
            prof = cProfile.Profile()
            prof.enable()
            run(big, store, 1)
            prof.disable()
            pstats.Stats(prof).sort_stats("cumulative").print_stats(25)

        site = synthetic_site(args.year_branches)
        (folder / "year").mkdir()
        store, rows = fill_store(site, args.days, folder / "year", args.seed)
        print(f"\nyear case: {len(site.tags)} tags, {rows} readings stored")
        timing = run(site, store, args.days)
        report("year, scaled", args.year_branches, args.days, timing, scale_to=365,
               goal_s=GOAL_YEAR_S)
        store.close()


if __name__ == "__main__":
    main()
