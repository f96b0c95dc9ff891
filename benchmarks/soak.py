"""A simulated day of the daemon's work against a source that misbehaves (issue 13).

The example site (`config/example-site.toml`) is simulated for one day at 1-minute
samples. A historian exporter drops a wide CSV export into the inbox every 15 minutes,
and the daemon's ingest job (`monitor.jobs.ingest_and_watch`, what `run` calls on its
schedule) runs every 15 minutes on a virtual clock, then the daily analysis and the
morning report run as `run` runs them. On the way the source misbehaves:

* 08:00–11:00 the exporter stops (communication loss): nothing arrives;
* 11:00 it comes back with new data only;
* 13:00 the store-and-forward back-fill of 08:00–11:00 arrives late, as files of its own;
* 15:00 two poisoned files land: a 2 MB export on one line, and a binary file;
* 17:00 the daemon is "restarted": store and source closed and opened again.

Printed: readings generated, stored, lost and doubled; when the data-freshness alarm
activated against when the data stopped (goal: within one ingest interval after the data's
age passed ``[analysis] stale_after``) and when it returned to normal; the quarantine
rows of the poisoned files; every alarm event of the day; fits and findings of the day;
whether the report was written and shows the data's age. Exit status 1 when a goal is
missed.

    .venv/bin/python benchmarks/soak.py [--folder DIR] [--step-s 60] [--store URL]
"""

from __future__ import annotations

import argparse
import os
import re
import shutil
import sys
import tempfile
import time
from datetime import UTC, datetime, timedelta
from pathlib import Path

import numpy as np
import pandas as pd

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from adapters.base import open_store  # noqa: E402
from adapters.units import from_si  # noqa: E402
from monitor.config import Site, load_site  # noqa: E402
from monitor.demo import simulate_site  # noqa: E402

DAY = datetime(2026, 6, 10, tzinfo=UTC)
INGEST = timedelta(minutes=15)
OUTAGE = (timedelta(hours=8), timedelta(hours=11))
BACKFILL_AT = timedelta(hours=13)
POISON_AT = timedelta(hours=15)
RESTART_AT = timedelta(hours=17)


def _site_file(folder: Path, store_url: str | None, stale_after: str) -> Path:
    text = (ROOT / "config" / "example-site.toml").read_text(encoding="utf-8")
    text = text.replace('timezone = "Europe/Berlin"', 'timezone = "UTC"')
    if store_url:
        text = re.sub(r'(?m)^url = "sqlite:///var/branchwatch.db"',
                      f'url = "{store_url}"', text)
    text = text.replace('[analysis]\n', f'[analysis]\nstale_after = "{stale_after}"\n', 1)
    path = folder / "site.toml"
    path.write_text(text, encoding="utf-8")
    return path


def _export(site: Site, frame: pd.DataFrame, path: Path) -> int:
    """Write *frame* (SI values, UTC index) as a wide CSV in plant units; rows written."""
    out = pd.DataFrame(index=frame.index)
    for tag in frame.columns:
        spec = site.tags[tag]
        out[tag] = np.round(from_si(frame[tag].to_numpy(float), spec.unit, spec.kind), 4)
    out.index = out.index.map(lambda t: t.isoformat())
    out.index.name = "timestamp"
    path.write_text(out.to_csv(na_rep=""), encoding="utf-8")
    settled = time.time() - 3600  # an export that landed long ago: settled
    os.utime(path, (settled, settled))
    return len(out)


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--folder", type=Path, help="work folder (default: a temporary one)")
    ap.add_argument("--step-s", type=float, default=60.0, help="sample period [s]")
    ap.add_argument("--store", help="store URL (default: SQLite in the work folder)")
    ap.add_argument("--stale-after", default="10 min",
                    help="[analysis] stale_after (the exports land every 15 min, on time)")
    args = ap.parse_args()

    from monitor.jobs import catch_up, ingest_and_watch, open_source, write_report

    folder = args.folder or Path(tempfile.mkdtemp(prefix="bw-soak-"))
    if folder.exists():
        shutil.rmtree(folder)
    (folder / "inbox").mkdir(parents=True)
    site = load_site(_site_file(folder, args.store, args.stale_after))
    stale_after = timedelta(seconds=site.analysis.stale_after)
    sim = simulate_site(site, DAY - timedelta(hours=1), DAY + timedelta(days=1, hours=1),
                        step_s=args.step_s, seed=11)
    times = pd.DatetimeIndex(sim.times).tz_localize("UTC")
    frame = pd.DataFrame({t: v for t, v in sim.values.items() if t in site.tags}, index=times)
    inbox = folder / "inbox"

    store = open_store(site.store_url)
    source = open_source(site)
    t0 = time.perf_counter()
    exported: list[pd.DataFrame] = []
    events: list[tuple[datetime, str, str, str]] = []
    ingest_errors = 0
    stop_last: datetime | None = None
    now = DAY
    while now <= DAY + timedelta(days=1):
        since = now - DAY
        chunk = frame[(frame.index > now - INGEST) & (frame.index <= now)]
        if not (OUTAGE[0] < since <= OUTAGE[1]):
            _export(site, chunk, inbox / f"loopB_{now:%Y%m%dT%H%M}.csv")
            exported.append(chunk)
        elif stop_last is None:
            stop_last = (now - INGEST).replace(tzinfo=UTC)
        if since == BACKFILL_AT:
            gap = frame[(frame.index > DAY + OUTAGE[0]) & (frame.index <= DAY + OUTAGE[1])]
            _export(site, gap, inbox / f"loopB_backfill_{now:%Y%m%dT%H%M}.csv")
            exported.append(gap)
        if since == POISON_AT:
            (inbox / "loopB_poison_long.csv").write_bytes(b"timestamp," + b"9" * 2_000_000)
            (inbox / "loopB_poison_binary.csv").write_bytes(bytes(range(256)) * 64)
            for p in ("loopB_poison_long.csv", "loopB_poison_binary.csv"):
                os.utime(inbox / p, (time.time() - 3600,) * 2)
        if since == RESTART_AT:
            source.close()
            store.close()
            store = open_store(site.store_url)
            source = open_source(site)
        result = ingest_and_watch(site, store, source, clock=lambda t=now: t)
        if result.error:
            ingest_errors += 1
        events += [(e.time, e.branch, e.condition, e.action) for e in result.events]
        now += INGEST
    analysis_now = DAY + timedelta(days=1, hours=5, minutes=30)
    summary = catch_up(site, store, source, now=analysis_now)
    report = write_report(site, store, day=DAY, now=analysis_now)
    elapsed = time.perf_counter() - t0

    generated = pd.concat(exported)
    expected = int(generated.notna().sum().sum())
    stored = store.read_readings(list(site.tags), DAY - timedelta(hours=1),
                                 DAY + timedelta(days=1, hours=1))
    n_stored = len(stored)
    doubled = int(stored.duplicated(["tag", "time"]).sum())
    quarantine = store.quarantine_counts()
    fits = store.read_fits(start=DAY, end=DAY + timedelta(days=1))
    findings = store.read_findings()
    html = report.read_text(encoding="utf-8")

    print(f"soak of one simulated day ({len(generated)} samples per tag, "
          f"{args.step_s:.0f} s) in {elapsed:.1f} s wall; work folder {folder}")
    print(f"readings: {expected} exported, {n_stored} stored, {expected - n_stored} lost, "
          f"{doubled} doubled; ingests that failed: {ingest_errors}")
    stale = [e for e in events if e[2].startswith("stale")]
    print("data-freshness alarm events:")
    for e in stale:
        print(f"  {e[0]:%H:%M} {e[1]} {e[2]} {e[3]}")
    goal_stale = False
    if stop_last is not None:
        due = stop_last + stale_after
        first = next((e[0] for e in stale if e[3] == "activated" and e[0] >= stop_last), None)
        if first is not None:
            delay = first - due
            goal_stale = timedelta(0) <= delay <= INGEST
            print(f"  data stopped after {stop_last:%H:%M}; stale from {due:%H:%M}; alarm at "
                  f"{first:%H:%M} ({delay.total_seconds() / 60:.0f} min after it was due; "
                  f"goal ≤ {INGEST.total_seconds() / 60:.0f} min)")
        else:
            print("  no data-freshness alarm after the data stopped: goal missed")
    other = [e for e in events if not e[2].startswith("stale")]
    print(f"other alarm events: {len(other)}")
    for e in other:
        print(f"  {e[0]:%H:%M} {e[1]} {e[2]} {e[3]}")
    print("quarantine (reason: rows):")
    for reason, count in sorted(quarantine.items()):
        print(f"  {count:>5}  {reason}")
    print(f"fits of the day: {len(fits)} (branches {site.branches and len(site.branches)}); "
          f"windows analysed {summary.windows}; findings {len(findings)}")
    print(f"report {report.name}: {'shows' if 'Data up to' in html else 'does NOT show'} "
          "the data's age")
    poisoned = " ".join(quarantine)
    ok = (expected == n_stored and doubled == 0 and goal_stale
          and "longer than" in poisoned and "not a text CSV" in poisoned
          and len(fits) >= len(site.branches) - 1 and "Data up to" in html)
    print("goals:", "met" if ok else "MISSED")
    source.close()
    store.close()
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
