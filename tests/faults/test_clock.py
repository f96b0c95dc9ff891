"""The system clock stepped back an hour and forward an hour while the daemon's jobs run
(issue 9 part 2): no analysis window is analysed twice, none is skipped, none is analysed
before its readings are in.

The jobs take their time as an argument (`monitor.app.jobs.catch_up(..., now=...)`,
`ingest_and_watch(..., clock=...)`), so the test drives them with a clock that jumps while
an exporter drops the readings of each quarter hour of real time. Every write of a
window's results is counted (`store_window` wrapped): each window must be written once,
and with all the readings it has in the export files.
"""

from __future__ import annotations

from collections import Counter
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import pandas as pd

from adapters.base import open_store
from monitor.app.alarm_watch import ingest_and_watch
from monitor.app.demo import simulate_site
from monitor.app.ingest import open_source
from monitor.app.jobs import catch_up
from monitor.site.config import load_site
from tests.faults.harness import export, site_text

START = datetime(2026, 6, 10, tzinfo=UTC)  # any day: the clock below is virtual
TICK = timedelta(minutes=15)
HOUR = timedelta(hours=1)


def _offset(i: int) -> timedelta:
    """The wall clock's error at tick *i*: right, then an hour slow (stepped back), then
    right again (stepped forward), then an hour fast, then right."""
    if 12 <= i < 20:
        return -HOUR
    if 28 <= i < 36:
        return HOUR
    return timedelta(0)


def test_clock_steps_neither_repeat_nor_skip_a_window(tmp_path: Path) -> None:
    folder = tmp_path / "site"
    (folder / "inbox").mkdir(parents=True)
    text = site_text().replace('window = "1 day"', 'window = "1 h"')
    (folder / "site.toml").write_text(text, encoding="utf-8")
    site = load_site(folder / "site.toml")
    ticks = 48  # 12 h of real time
    sim = simulate_site(site, START, START + TICK * (ticks + 1), step_s=60.0, seed=5)
    times = pd.DatetimeIndex(sim.times).tz_localize("UTC")
    frame = pd.DataFrame({t: v for t, v in sim.values.items() if t in site.tags}, index=times)

    store = open_store(site.store_url)
    source = open_source(site)
    writes: Counter[pd.Timestamp] = Counter()
    samples: dict[pd.Timestamp, int] = {}
    real_store_window = store.store_window

    def counting(**kw: Any) -> Any:
        for fit in kw["fits"]:
            if fit.branch == site.branches[0].name:
                key = pd.Timestamp(fit.window_start)
                writes[key] += 1
                samples[key] = fit.samples
        return real_store_window(**kw)

    store.store_window = counting  # type: ignore[method-assign]
    try:
        for i in range(1, ticks + 1):
            real = START + TICK * i
            part = frame[(frame.index >= real - TICK) & (frame.index < real)]
            export(site, part, folder / "inbox" / f"loopB_{i:03d}.csv")
            wall = real + _offset(i)
            def clock(w: datetime = wall) -> datetime:
                return w

            ingest_and_watch(site, store, source, clock=clock)
            catch_up(site, store, source, now=wall)
        fits = store.read_fits(branch=site.branches[0].name)
    finally:
        source.close()
        store.close()

    # the hourly windows whose readings were all in by the last tick: a window is whole
    # once a reading at or after its end has arrived (common practice)
    first = pd.Timestamp(fits["window_start"].min())
    newest = frame.index[frame.index < START + TICK * ticks].max()
    expected = pd.date_range(first, newest.floor("1h") - HOUR, freq="1h", tz="UTC")
    got = pd.DatetimeIndex(fits["window_start"]).tz_convert("UTC")
    assert list(got) == list(expected)  # none skipped, none doubled in the fits table
    assert first <= START + HOUR  # analysis started at the first closed window
    twice = {str(k): n for k, n in writes.items() if n > 1}
    assert twice == {}  # no window analysed twice
    # no window analysed before its readings arrived: each fit saw the samples a window
    # of 1-minute data holds (60; the simulator's pump stops may remove some, never many)
    # (a window before the first exported reading has none to wait for)
    thin = {str(k): n for k, n in samples.items() if n < 30 and k >= pd.Timestamp(START)}
    assert thin == {}
