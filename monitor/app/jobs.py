"""The daemon's analysis jobs: a period analysed (`analyze`, with the windows an applied
correction changed fitted again) and the daily catch-up (`catch_up`).

Each job is a function of (site, store, source, time window) that can be run again with
the same arguments and change nothing the second time: readings are upserted on
(tag, time), fits on (branch, window), findings on (branch, kind, start). The daemon
(`monitor.app.daemon`) calls them on schedule; the CLI calls them once (`ingest`, `analyze`);
a backfill maps the window analysis over days, in worker processes
(`monitor.app.backfill.analyze_windows`).

The other jobs have modules of their own: `monitor.app.ingest`, `monitor.app.alarm_watch`
(`evaluate_alarms`), `monitor.app.site_diagnosis` (`diagnose_site`) and
`monitor.app.morning_report`. `ingest`, `evaluate_alarms` and `diagnose_site` can still be
imported from here: the contract in DEVELOPERS.md names them with `analyze` and `catch_up`.
"""

from __future__ import annotations

import logging
from collections.abc import Callable
from dataclasses import dataclass
from datetime import datetime, timedelta
from typing import Any

import numpy as np
import pandas as pd

from adapters.base import ReadingsSource, ResultsStore
from monitor.analysis.diagnose import Finding
from monitor.app.alarm_watch import evaluate_alarms
from monitor.app.backfill import PARALLEL_AFTER_S, analyze_windows
from monitor.app.ingest import ingest
from monitor.app.site_diagnosis import diagnose_site, diagnosis_time
from monitor.app.windows import current_fits, windows
from monitor.site.config import Site

log = logging.getLogger(__name__)

__all__ = [
    "AnalyzeSummary",
    "analyze",
    "catch_up",
    "corrected_windows",
    "diagnose_site",
    "evaluate_alarms",
    "ingest",
    "pending_corrections",
]


@dataclass(frozen=True)
class AnalyzeSummary:
    """What one analysis run did."""

    windows: int
    fits: int
    fits_ok: int
    readings: int
    findings: list[Finding]
    #: windows analysed before whose inputs an applied correction changed, fitted again
    refitted: int = 0
    #: applied corrections marked re-analysed by this run
    corrections: int = 0

    def to_json_dict(self) -> dict[str, Any]:
        return {"windows": self.windows, "fits": self.fits, "fits_ok": self.fits_ok,
                "readings": self.readings, "findings": len(self.findings),
                "refitted": self.refitted, "corrections": self.corrections}


def analyze(
    site: Site,
    store: ResultsStore,
    source: ReadingsSource,
    start: datetime,
    end: datetime,
    *,
    progress: Callable[[int, int], None] | None = None,
    jobs: int = 1,
    parallel_after_s: float = PARALLEL_AFTER_S,
) -> AnalyzeSummary:
    """Fit every branch over every whole window in [start, end), then diagnose.

    Each window's fits, screening counts, balance and data health are written in one
    transaction, in window order, so an interrupted backfill keeps every window up to the
    first unfinished one and a rerun rewrites the same rows. The diagnosis then runs over
    the whole analysed history (`diagnosis_time`: up to *end*, or to the newest analysed
    window where one later than *end* is stored) and upserts its findings on
    (branch, kind, start).

    With *jobs* > 1, a backfill long enough to gain from it (*parallel_after_s*) has its
    windows read and analysed in that many worker processes (see `analyze_windows`); the
    results are the same.

    Windows analysed before (inside the period or not) that hold a reading changed by an
    applied correction (`pending_corrections`) are analysed again too, first; their rows
    are replaced, and the corrections of each window are marked re-analysed once its new
    results are stored. The diagnosis then reads from the earliest of them.
    """
    if jobs < 1:
        raise ValueError(f"jobs must be >= 1, got {jobs}")
    spans = list(windows(start, end, site.window, site.timezone))
    pending = pending_corrections(site, store)
    corrected = corrected_windows(site, store, pending)
    in_period = set(spans)
    todo = [w for w in corrected if w not in in_period] + spans
    n_fits = n_ok = n_read = n_refit = n_marked = 0
    results = analyze_windows(site, store, source, todo, jobs=jobs,
                              parallel_after_s=parallel_after_s)
    for i, result in enumerate(results):
        store.store_window(
            fits=result.fits, screening=result.screening, balance=result.balance,
            health=result.health,
        )
        # marked once the window's new fits are committed: a kill in between leaves the
        # corrections pending, and the next run fits the window again (same rows)
        ws, we = todo[i]
        n_marked += store.mark_reanalysed(_inside(pending, ws, we))
        n_refit += (ws, we) in corrected
        n_read += result.samples
        n_fits += len(result.fits)
        n_ok += sum(1 for f in result.fits if f.counts)
        if progress is not None:
            progress(i + 1, len(todo))
    since = min([start, *(ws for ws, _ in corrected)])
    findings = diagnose_site(site, store, now=diagnosis_time(store, end), source=source,
                             since=since)
    log.info(
        "analysis %s .. %s: %d windows, %d fits (%d usable), %d findings",
        start, end, len(spans), n_fits, n_ok, len(findings),
    )
    if corrected:
        log.info("%d analysed windows fitted again for %d corrected readings (%s .. %s)",
                 n_refit, n_marked, corrected[0][0], corrected[-1][1])
    return AnalyzeSummary(
        windows=len(spans), fits=n_fits, fits_ok=n_ok, readings=n_read, findings=findings,
        refitted=n_refit, corrections=n_marked,
    )


def pending_corrections(site: Site, store: ResultsStore) -> pd.DataFrame:
    """Applied corrections of the site's tags not re-analysed yet (id, time, …)."""
    pending = store.read_corrections(pending=True)
    return pending[pending["tag"].isin(list(site.tags))].reset_index(drop=True)


def corrected_windows(
    site: Site, store: ResultsStore, pending: pd.DataFrame
) -> list[tuple[datetime, datetime]]:
    """The analysed windows (of the present ``[analysis] window``, those with stored
    fits) that hold a reading of *pending*, in time order."""
    if pending.empty:
        return []
    times = np.sort(pd.DatetimeIndex(pending["time"]).asi8)
    first, last = pd.Timestamp(times[0], tz="UTC"), pd.Timestamp(times[-1], tz="UTC")
    fits = current_fits(site, store.read_fits(
        start=(first - 2 * site.window).to_pydatetime(),
        end=(last + pd.Timedelta(microseconds=1)).to_pydatetime()))
    if fits.empty:
        return []
    spans = sorted({(pd.Timestamp(a).to_pydatetime(), pd.Timestamp(b).to_pydatetime())
                    for a, b in zip(fits["window_start"], fits["window_end"], strict=True)})
    lo = np.array([pd.Timestamp(a).value for a, _ in spans], dtype="int64")
    hi = np.array([pd.Timestamp(b).value for _, b in spans], dtype="int64")
    at = np.searchsorted(times, lo, side="left")  # the first correction at or after start
    holds = (at < len(times)) & (times[np.minimum(at, len(times) - 1)] < hi)
    return [span for span, hit in zip(spans, holds, strict=True) if hit]


def _inside(pending: pd.DataFrame, start: datetime, end: datetime) -> list[int]:
    """Ids of the corrections in *pending* whose reading time is in [start, end)."""
    if pending.empty:
        return []
    t = pd.DatetimeIndex(pending["time"])
    hit = (t >= pd.Timestamp(start)) & (t < pd.Timestamp(end))
    return [int(i) for i in pending["id"][hit]]


#: On a first run with no fits, analyse at most this far back [days].
CATCH_UP_MAX_DAYS = 400


def catch_up(
    site: Site, store: ResultsStore, source: ReadingsSource, *, now: datetime
) -> AnalyzeSummary:
    """Analyse every whole window that closed since the last analysed one.

    The daily job: after downtime it catches up on all missed windows; run twice it
    re-fits nothing new (the last window is already stored) and re-diagnoses. Windows
    whose readings an applied correction changed since are fitted again (`analyze`).
    """
    marks = store.watermarks()
    if not marks.fits.empty:
        start = pd.Timestamp(marks.fits["last_window_end"].min()).to_pydatetime()
    elif not marks.readings.empty:
        start = pd.Timestamp(marks.readings["last"].min()).to_pydatetime()
        # the last whole window before the newest reading (the end is capped there)
        start = max(start - 2 * site.window, now - timedelta(days=CATCH_UP_MAX_DAYS))
    else:
        start = now - site.window * 2
    end = now
    if not source.keeps_readings and not marks.readings.empty:
        # a window is whole once a reading at or after its end is stored: a clock stepped
        # forward (or an export running late) must not fit a window before its data is in
        end = min(now, pd.Timestamp(marks.readings["last"].max()).to_pydatetime())
    return analyze(site, store, source, start, max(start, end))
