"""The synthetic test-rig recording through the real path, and the flow-drop alarm's figures.

    .venv/bin/python benchmarks/rig.py [--hours 3] [--window "1 min"] [--demo-days 365]
                                       [--no-rig] [--no-demo]

1. The rig (tests/monitor/rig_recording.py): ~3 h of 1-second samples, three branches,
   a 0.05-bar gauge at ~0.07 bar, L/min, a `;` CSV, no pump curve, 20 valve closures of
   about 7 min taking 5–40 % of a branch's flow. Site file → ingest → analyze (minute
   windows) → alarms replay with ``[flow_drop]`` enabled. Prints the window verdicts by
   cause, closures caught / 20, median and max delay from the closure's start, missed
   closures by depth, and false alarms (activations outside every closure of their
   branch).
2. The demo site over a year (`monitor.app.demo`, 120-s samples) with ``[flow_drop]``
   enabled at its defaults on every branch: the activations, split into those at the
   demo's own faults (a valve left throttled, a raised back-pressure) and the rest.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from collections import Counter
from datetime import timedelta
from pathlib import Path

import numpy as np
import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from adapters.base import open_store
from monitor.app.alarm_watch import replay_alarms
from monitor.app.demo import DEMO_START, demo_faults, prepare_demo
from monitor.app.ingest import ingest, open_source
from monitor.app.jobs import analyze
from monitor.site.config import load_site
from tests.monitor.rig_recording import START, closures_plan, record, site_toml


def rig(hours: float, window: str, folder: Path) -> None:
    path = folder / "rig.toml"
    path.write_text(site_toml(branches=3, window=window), encoding="utf-8")
    site = load_site(path)
    seconds = int(hours * 3600)
    plan = closures_plan(seconds, 3)
    t = time.perf_counter()
    rec = record(site, seconds=seconds, closures=plan)
    rec.write_csv(folder / "inbox")
    print(f"rig: {seconds} s x {len(site.branches)} branches, {len(plan)} closures "
          f"({min(c.length_s for c in plan)}-{max(c.length_s for c in plan)} s, depths "
          f"{min(c.depth for c in plan):.0%}-{max(c.depth for c in plan):.0%}), "
          f"made in {time.perf_counter() - t:.1f} s")
    store, source = open_store(site.store_url, schema=site.store_schema), open_source(site)
    t = time.perf_counter()
    got = ingest(site, store, source)
    print(f"  ingest: {got.stored} readings, {got.quarantined} quarantined "
          f"({time.perf_counter() - t:.1f} s)")
    end = START + timedelta(seconds=seconds)
    t = time.perf_counter()
    summary = analyze(site, store, source, START, end)
    print(f"  analyze ({window} windows): {summary.windows} windows, {summary.fits} fits "
          f"({time.perf_counter() - t:.1f} s)")
    fits = store.read_fits()
    causes = Counter(str(m).split(":")[0] + ": " + str(m).split(":")[1].split(",")[0]
                     for m in fits["message"])
    for cause, n in causes.most_common():
        print(f"    {n:5d} x {cause}")
    print(f"    every verdict names its cause: {bool(fits['message'].str.len().gt(0).all())}")
    t = time.perf_counter()
    events = [e for e in replay_alarms(site, store, source, START, end)
              if e.condition == "flow_drop" and e.action == "activated"]
    print(f"  alarm replay ({time.perf_counter() - t:.1f} s)")
    names = [b.name for b in site.branches]
    delays, missed, matched = [], [], set()
    for c in plan:
        a = START + timedelta(seconds=c.start_s)
        b = a + timedelta(seconds=c.length_s)
        hit = [e for e in events if e.branch == names[c.branch] and a <= e.time < b]
        if hit:
            delays.append((hit[0].time - a).total_seconds())
            matched |= {id(e) for e in hit}
        else:
            missed.append(c.depth)
    late = [e for e in events if id(e) not in matched]
    print(f"  closures caught within the closure: {len(delays)} / {len(plan)}")
    if delays:
        print(f"  delay from the closure's start: median {np.median(delays):.0f} s, "
              f"max {max(delays):.0f} s")
    if missed:
        print("  missed closures, depth: " + ", ".join(f"{d:.0%}" for d in sorted(missed)))
    print(f"  false alarms (outside every closure of the branch): {len(late)}")
    store.close()
    source.close()


def demo_year(folder: Path, days: int) -> None:
    t = time.perf_counter()
    paths = prepare_demo(folder / "demo", days=days, step_s=120.0)
    with paths.site_file.open("a", encoding="utf-8") as f:
        f.write("\n[flow_drop]\nenabled = true\n")
    site = load_site(paths.site_file)
    store, source = open_store(site.store_url, schema=site.store_schema), open_source(site)
    got = ingest(site, store, source)
    print(f"\ndemo, {days} days: {got.stored} readings ({time.perf_counter() - t:.0f} s to build "
          "and ingest)")
    t = time.perf_counter()
    end = DEMO_START + timedelta(days=days)
    on = [e for e in replay_alarms(site, store, source, DEMO_START, end)
          if e.condition == "flow_drop" and e.action == "activated"]
    watched = [b.name for b in site.branches if b.flow_drop is not None]
    print(f"  flow_drop at defaults on {len(watched)} of {len(site.branches)} branches "
          f"({', '.join(watched)}; a branch whose control valve logs its position is left "
          f"out): {len(on)} activations "
          f"({time.perf_counter() - t:.0f} s)")
    faults = {(f.branch, pd.Timestamp(f.time)) for f in demo_faults()  # type: ignore[attr-defined]
              if type(f).__name__ in ("StepRestriction", "BackPressureStep")}
    at_fault = [e for e in on if any(
        e.branch == b and abs((e.time - s).total_seconds()) < 3600 for b, s in faults)]
    print(f"  at the demo's throttled valve or raised back-pressure: {len(at_fault)}; "
          f"others (false): {len(on) - len(at_fault)}")
    for e in on[:12]:
        print(f"    {e.time:%Y-%m-%d %H:%M} {e.branch}: {e.message[:110]}")
    store.close()
    source.close()


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--hours", type=float, default=3.0)
    ap.add_argument("--window", default="1 min")
    ap.add_argument("--no-demo", action="store_true")
    ap.add_argument("--demo-days", type=int, default=365)
    ap.add_argument("--no-rig", action="store_true")
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        if not args.no_rig:
            rig(args.hours, args.window, Path(tmp))
        if not args.no_demo:
            demo_year(Path(tmp), args.demo_days)


if __name__ == "__main__":
    main()
