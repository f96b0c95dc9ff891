"""A simulated day of the daemon's work against a source that misbehaves (issue 13).

The example site (`config/example-site.toml`) is simulated for one day at 1-minute
samples. A historian exporter drops a wide CSV export into the inbox every 15 minutes,
and the daemon's ingest job (`monitor.app.alarm_watch.ingest_and_watch`, what `run` calls on its
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

``--live SECONDS`` runs the real daemon instead (``branchwatch run`` in a process of its
own, ingest every 10 s) against an exporter writing 5-second samples in wall-clock time,
with the same misbehaviour compressed into the run — an outage, a late back-fill, two
poisoned files — and two SIGKILLs of the daemon, each followed by a restart. Printed:
readings exported, stored, lost, doubled; ingest runs and the longest gap between them;
when the stale-data alarm came against when the data stopped.
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
from monitor.app.demo import simulate_site  # noqa: E402
from monitor.site.config import Site, load_site  # noqa: E402

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


def live(args: argparse.Namespace) -> int:
    """The real daemon for *args.live* seconds against a wall-clock exporter."""
    import signal
    import subprocess

    total = float(args.live)
    folder = args.folder or Path(tempfile.mkdtemp(prefix="bw-live-"))
    if folder.exists():
        shutil.rmtree(folder)
    (folder / "inbox").mkdir(parents=True)
    path = _site_file(folder, args.store, args.stale_after)
    text = path.read_text(encoding="utf-8").replace(
        "[analysis]\n", '[schedule]\ningest_every = "10 s"\n\n[analysis]\n', 1)
    path.write_text(text, encoding="utf-8")
    site = load_site(path)
    step = 5.0
    t_start = datetime.now(UTC).replace(microsecond=0)
    sim = simulate_site(site, t_start - timedelta(minutes=30),
                        t_start + timedelta(seconds=total + 60), step_s=step, seed=13)
    times = pd.DatetimeIndex(sim.times).tz_localize("UTC")
    frame = pd.DataFrame({t: v for t, v in sim.values.items() if t in site.tags}, index=times)
    inbox = folder / "inbox"
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    log_file = (folder / "daemon.log").open("ab")

    def start() -> subprocess.Popen[bytes]:
        return subprocess.Popen(
            [sys.executable, "-m", "monitor.app.cli", "--log", "run", str(path)],
            env=env, cwd=ROOT, stdout=log_file, stderr=log_file)

    outage = (t_start + timedelta(seconds=0.30 * total), t_start + timedelta(seconds=0.50 * total))
    backfill_at = t_start + timedelta(seconds=0.65 * total)
    poison_at = t_start + timedelta(seconds=0.75 * total)
    kills = [t_start + timedelta(seconds=f * total) for f in (0.55, 0.85)]
    _export(site, frame[frame.index <= t_start], inbox / "loopB_history.csv")
    exported = [frame[frame.index <= t_start]]
    last = t_start
    daemon = start()
    backfilled = poisoned = False
    data_stop: datetime | None = None
    killed = 0
    try:
        while (now := datetime.now(UTC)) < t_start + timedelta(seconds=total):
            chunk = frame[(frame.index > last) & (frame.index <= now)]
            if outage[0] <= now < outage[1]:
                data_stop = data_stop or last
            elif len(chunk):
                _export(site, chunk, inbox / f"loopB_{now:%H%M%S}.csv")
                exported.append(chunk)
            last = pd.Timestamp(chunk.index[-1]).to_pydatetime() if len(chunk) else last
            if not backfilled and now >= backfill_at:
                gap = frame[(frame.index > outage[0]) & (frame.index < outage[1])]
                _export(site, gap, inbox / "loopB_backfill.csv")
                exported.append(gap)
                backfilled = True
            if not poisoned and now >= poison_at:
                (inbox / "loopB_poison_long.csv").write_bytes(b"timestamp," + b"9" * 2_000_000)
                (inbox / "loopB_poison_binary.csv").write_bytes(bytes(range(256)) * 64)
                for p in ("loopB_poison_long.csv", "loopB_poison_binary.csv"):
                    os.utime(inbox / p, (time.time() - 3600,) * 2)
                poisoned = True
            if killed < len(kills) and now >= kills[killed]:
                daemon.send_signal(signal.SIGKILL)
                daemon.wait()
                killed += 1
                daemon = start()
            time.sleep(2.0)
        time.sleep(25.0)  # the last files: settled and ingested
    finally:
        daemon.send_signal(signal.SIGTERM)
        daemon.wait(timeout=300)
        log_file.close()

    store = open_store(site.store_url, schema=site.store_schema)
    try:
        generated = pd.concat(exported)
        expected = int(generated.notna().sum().sum())
        stored = store.read_readings(list(site.tags), t_start - timedelta(hours=1),
                                     t_start + timedelta(seconds=total + 120))
        doubled = int(stored.duplicated(["tag", "time"]).sum())
        runs = store.job_runs(limit=10_000, job="ingest")
        events = store.alarm_events()
        quarantine = store.quarantine_counts()
    finally:
        store.close()
    starts = pd.DatetimeIndex(runs["started"]).sort_values()
    longest = starts.to_series().diff().max()
    print(f"live soak: {total:.0f} s of the real daemon, ingest every 10 s, {killed} SIGKILLs "
          f"and restarts; work folder {folder}")
    print(f"readings: {expected} exported, {len(stored)} stored, {expected - len(stored)} lost,"
          f" {doubled} doubled")
    print(f"ingest runs: {len(runs)} ({dict(runs['status'].value_counts())}); longest gap "
          f"between two: {longest.total_seconds():.0f} s")
    stale = events[events["condition"].astype(str).str.startswith("stale")]
    for e in stale.itertuples():
        print(f"  {e.time:%H:%M:%S} {e.branch} {e.condition}: {e.from_state} -> {e.to_state}")
    ok_stale = False
    if data_stop is not None:
        due = data_stop + timedelta(seconds=site.analysis.stale_after or 0)
        first = stale[(stale["to_state"] == "unack") & (stale["time"] >= data_stop)]
        if len(first):
            at = pd.Timestamp(first["time"].iloc[0]).to_pydatetime()
            delay = (at - due).total_seconds()
            ok_stale = delay <= 10.0 + 5.0  # one ingest interval (+ the file's settling)
            print(f"  data stopped after {data_stop:%H:%M:%S}, stale from {due:%H:%M:%S}, "
                  f"alarm at {at:%H:%M:%S} ({delay:.0f} s after it was due)")
        else:
            print("  no stale-data alarm after the data stopped")
    print("quarantine:", quarantine)
    ok = (expected == len(stored) and doubled == 0 and ok_stale
          and any("not a text CSV" in r for r in quarantine))
    print("goals:", "met" if ok else "MISSED")
    return 0 if ok else 1


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--folder", type=Path, help="work folder (default: a temporary one)")
    ap.add_argument("--step-s", type=float, default=60.0, help="sample period [s]")
    ap.add_argument("--store", help="store URL (default: SQLite in the work folder)")
    ap.add_argument("--stale-after", default=None,
                    help="[analysis] stale_after (default 10 min; 25 s with --live)")
    ap.add_argument("--live", type=float, metavar="SECONDS",
                    help="run the real daemon this long instead of the simulated day")
    args = ap.parse_args()
    if args.stale_after is None:
        args.stale_after = "25 s" if args.live else "10 min"
    if args.live:
        return live(args)

    from monitor.app.alarm_watch import ingest_and_watch
    from monitor.app.ingest import open_source
    from monitor.app.jobs import catch_up
    from monitor.app.morning_report import write_report

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

    store = open_store(site.store_url, schema=site.store_schema)
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
            store = open_store(site.store_url, schema=site.store_schema)
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
