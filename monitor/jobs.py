"""The daemon's jobs: one function each, pure apart from the store and source they are given.

Each job is a function of (site, store, source, time window) that can be run again with
the same arguments and change nothing the second time: readings are upserted on
(tag, time), fits on (branch, window), findings on (branch, kind, start). The daemon
(`monitor.daemon`) calls them on schedule; the CLI calls them once (`ingest`, `analyze`);
a backfill maps the window analysis over days, in worker processes (`analyze_windows`).
"""

from __future__ import annotations

import atexit
import ctypes
import logging
import math
import multiprocessing
import os
import pickle
import signal
import sys
import threading
import time
from collections import Counter, deque
from collections.abc import Callable, Iterator, Mapping, Sequence
from concurrent.futures import Future, ProcessPoolExecutor
from contextlib import contextmanager, suppress
from dataclasses import dataclass, field, replace
from datetime import UTC, date, datetime, timedelta
from itertools import islice
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd

from adapters.base import (
    BatchWrite,
    BranchwatchAdapterError,
    ReadingsSource,
    ResultsStore,
    StoreError,
    source_class,
)
from monitor.alarm_instruments import (
    FrozenSettings,
    StaleSettings,
    evaluate_frozen,
    evaluate_stale,
)
from monitor.alarm_process import (
    BackflowAlarmSettings,
    FlowDropSettings,
    LowFlowSettings,
    evaluate_backflow,
    evaluate_flow_drop,
    evaluate_low_flow,
)
from monitor.alarms import AlarmEvent, AlarmState, State, priority_of
from monitor.analysis import WindowAnalysis, analyze_window
from monitor.backflow import (
    cannot_flow,
    hazard_branches,
    hazard_samples,
    near_zero,
    settings_for,
    static_margin,
    termination_words,
)
from monitor.config import DAY_S, BranchConfig, Site, window_problem
from monitor.cost import J_PER_KWH, RESISTANCE_KINDS, branch_cost
from monitor.diagnose import (
    BranchSettings,
    DiagnosisSettings,
    Finding,
    diagnose,
)
from monitor.quality import resolution_by_tag

log = logging.getLogger(__name__)

__all__ = [
    "PARALLEL_AFTER_S",
    "AnalyzeSummary",
    "IngestSummary",
    "ReportWriteError",
    "WatchPass",
    "alarm_checks",
    "analyze",
    "analyze_windows",
    "catch_up",
    "corrected_windows",
    "diagnose_site",
    "diagnosis_settings",
    "evaluate_alarms",
    "ingest",
    "ingest_and_watch",
    "newest_readings",
    "open_source",
    "pending_corrections",
    "replay_alarms",
    "stale_after",
    "tag_owners",
    "windows",
    "write_report",
]


# ---------------------------------------------------------------------------------------
# sources


def open_source(site: Site) -> ReadingsSource:
    """The readings source the site file names, with paths resolved beside the file."""
    if site.source is None:
        raise ValueError(f"{site.path}: the site file has no [source] section")
    sec = site.source
    # the concrete class is looked up by alias; its options are the section's keys
    cls: Callable[..., ReadingsSource] = source_class(sec.kind)
    quality = {code: True for code in sec.good_quality}
    if sec.kind == "csv":
        assert sec.path is not None
        folder = (site.path.parent / sec.path).resolve()
        return cls(
            site.tags.values(), path=folder, layout=sec.layout, delimiter=sec.delimiter,
            decimal=sec.decimal, timezone=site.timezone, quality_map=quality, pattern=sec.pattern,
            settle_seconds=sec.settle_seconds, name=f"csv:{folder.name}",
        )
    return cls(
        site.tags.values(), url_env=sec.url_env, secrets_file=sec.secrets_file, table=sec.table,
        schema=sec.schema_name, layout="wide" if sec.layout == "wide" else "long",
        time_column=sec.time_column,
        tag_column=sec.tag_column, value_column=sec.value_column,
        quality_column=sec.quality_column, timezone=site.timezone, quality_map=quality,
        overlap=timedelta(seconds=sec.overlap), name=f"sql:{sec.table}",
    )


# ---------------------------------------------------------------------------------------
# ingest


@dataclass(frozen=True)
class IngestSummary:
    """What one ingest pass did.

    ``stored`` counts readings new to the store and ``duplicates`` those it already had
    (a SQL source re-reads its overlap on every pass); ``quarantined`` and
    ``quarantine_reasons`` count quarantine rows new to the store in this pass, by the
    reason without its detail, at most `SUMMARY_REASONS` of them (the rest summed under
    "other reasons"), so that the summary stays one short line per reason.
    """

    read: int
    stored: int
    duplicates: int
    quarantined: int
    quarantine_reasons: dict[str, int]
    notes: dict[str, int]
    batches: int
    cursors: dict[str, dict[str, Any]] = field(default_factory=dict)
    #: stored readings this pass brought with another value, by what the site's
    #: ``[source] corrections`` policy did (refused ones met before are not counted)
    corrections_applied: int = 0
    corrections_refused: int = 0

    def to_json_dict(self) -> dict[str, Any]:
        return {
            "read": self.read,
            "stored": self.stored,
            "duplicates": self.duplicates,
            "corrections_applied": self.corrections_applied,
            "corrections_refused": self.corrections_refused,
            "quarantined": self.quarantined,
            "quarantine_reasons": self.quarantine_reasons,
            "notes": self.notes,
            "batches": self.batches,
            "cursors": self.cursors,
        }


#: Reasons listed one by one in an ingest summary; the rest are summed.
SUMMARY_REASONS = 10


def ingest(site: Site, store: ResultsStore, source: ReadingsSource) -> IngestSummary:
    """One pass: every batch the source has not delivered yet goes into the store.

    Each batch (readings, quarantine, cursor) is stored in one transaction, so a kill at
    any point loses nothing that was stored and the next pass resumes at the last stored
    cursor. Readings already stored are not doubled (upsert on tag and time), nor are
    quarantine rows; the summary counts what is new (see `IngestSummary`).
    """
    read = stored = n = applied = refused = 0
    notes: Counter[str] = Counter()
    started = datetime.now(UTC)
    policy = site.source.corrections if site.source is not None else "refuse"
    for batch in source.batches(store.cursors(source.name)):
        n += 1
        wrote = store.write_batch(batch, source=source.name, corrections=policy)
        read += len(batch.readings)
        stored += wrote.stored
        applied += wrote.applied
        refused += wrote.refused
        notes.update(batch.notes)
        log.debug("batch %s: %d readings, %d new", batch.cursor_key, len(batch.readings),
                  wrote.stored)
        _log_corrections(batch.cursor_key, wrote)
    reasons: Counter[str] = Counter()
    if n:
        for reason, count in store.quarantine_counts(source.name, since=started).items():
            reasons[_reason_kind(reason)] += count
    quarantined = sum(reasons.values())
    summary = IngestSummary(
        read=read,
        stored=stored,
        duplicates=read - stored,
        quarantined=quarantined,
        quarantine_reasons=_top_reasons(reasons),
        notes={k: v for k, v in notes.items() if k != "quarantined"},
        batches=n,
        cursors=store.cursors(source.name),
        corrections_applied=applied,
        corrections_refused=refused,
    )
    log.info(
        "ingest from %s: %d read, %d stored, %d duplicates, %d quarantined",
        source.name, read, stored, read - stored, quarantined,
    )
    return summary


def _log_corrections(origin: str, wrote: BatchWrite) -> None:
    """One line per batch that changed stored readings: the count and a first example."""
    if wrote.applied:
        log.warning("%s: %d stored readings corrected (e.g. %s); [source] corrections = "
                    "\"apply\": the new values replace them and their analysed windows are "
                    "fitted again at the next analysis", origin, wrote.applied, wrote.example)
    if wrote.refused:
        log.warning("%s: %d stored readings come with another value (e.g. %s); kept as first "
                    "stored and journalled ([source] corrections = \"refuse\"; \"apply\" "
                    "takes the new values)", origin, wrote.refused, wrote.example)


def _reason_kind(reason: str) -> str:
    """The reason without its detail: 'not a number: "abc"' → 'not a number'."""
    return reason.split(":", 1)[0].strip()


def _top_reasons(reasons: Counter[str]) -> dict[str, int]:
    """The `SUMMARY_REASONS` most frequent reasons, the rest summed as 'other reasons'.

    >>> _top_reasons(Counter({f"r{i}": i for i in range(1, 13)}))["other reasons (2 kinds)"]
    3
    """
    top = reasons.most_common(SUMMARY_REASONS)
    out = dict(top)
    rest = len(reasons) - len(top)
    if rest:
        out[f"other reasons ({rest} kinds)"] = sum(reasons.values()) - sum(out.values())
    return out


# ---------------------------------------------------------------------------------------
# windows


def windows(
    start: datetime, end: datetime, size: timedelta, timezone: str
) -> Iterator[tuple[datetime, datetime]]:
    """Analysis windows covering [start, end), as UTC pairs.

    Every window belongs to one local day of the site. Windows of whole days run from
    the site's local midnight to the local midnight *size* later (a DST day is 23 or 25
    hours long, as the plant lived it). Shorter windows, whose size must divide 24 h
    (`window_problem`), start at the local midnight and follow each other at *size* of
    elapsed time; on a day whose length is not a whole number of windows (a DST change
    day: 23 or 25 h, or 23.5 h at Lord Howe Island) the last window of the day is cut at
    the next local midnight. So a zone with a half- or quarter-hour offset (Asia/Kolkata,
    Australia/Adelaide, Asia/Kathmandu) gets windows on its own clock's whole hours, and a
    clock change neither doubles nor skips a window: each window ends where the next
    begins. Only windows that lie whole in [start, end) are returned.

    Why not any size, with a cut window at every day's end: a 7-minute window would leave
    a 5-minute stub each day, a window of another size in every trend; a size that
    divides the day is always near the one wanted.

    >>> ws = list(windows(datetime(2026, 3, 28, tzinfo=UTC), datetime(2026, 3, 31, tzinfo=UTC),
    ...                   timedelta(days=1), "Europe/Berlin"))
    >>> [(a.isoformat(), (b - a).total_seconds() / 3600) for a, b in ws]
    [('2026-03-28T23:00:00+00:00', 23.0), ('2026-03-29T22:00:00+00:00', 24.0)]
    >>> t0 = datetime(2026, 3, 29, 0, tzinfo=UTC)
    >>> ws = list(windows(t0, t0 + timedelta(hours=3), timedelta(hours=1), "Asia/Kolkata"))
    >>> [a.strftime("%H:%M") for a, _ in ws]
    ['00:30', '01:30']
    """
    if start.tzinfo is None or end.tzinfo is None:
        raise ValueError("windows() needs timezone-aware start and end")
    seconds = size.total_seconds()
    problem = window_problem(seconds)
    if problem is not None:
        raise ValueError(f"window size {size}: {problem}")
    zone = ZoneInfo(timezone)
    days = max(1, int(seconds // DAY_S))

    def midnight(day: date) -> datetime:
        return _local_midnight(day, zone)

    day = start.astimezone(zone).date()
    if days > 1 and midnight(day) < start:
        day += timedelta(1)  # whole-day windows start at the first midnight in the span
    while midnight(day) < end:
        a, day_end = midnight(day), midnight(day + timedelta(days))
        while a < day_end:
            b = min(a + size, day_end)
            if b > end:
                return
            if a >= start:
                yield a, b
            a = b
        day += timedelta(days)


def _local_midnight(day: date, zone: ZoneInfo) -> datetime:
    """The UTC instant the local *day* begins (in a zone whose clocks skip midnight, the
    first instant of the day)."""
    return datetime.combine(day, datetime.min.time(), zone).astimezone(UTC)


def window_length_ok(site: Site, starts: pd.Series, ends: pd.Series) -> np.ndarray:
    """True where [start, end) is a window of the site's present size (`windows`): whole
    days with their DST slack, or a full sub-day window, or the cut last window of a
    local day (it ends at a local midnight and is as long as the day's remainder)."""
    size = site.window.total_seconds()
    length = (ends - starts).dt.total_seconds().to_numpy(float)
    if size >= DAY_S:
        slack = 3600.0 * (size // DAY_S)
        return np.abs(length - size) <= slack
    full = np.abs(length - size) <= 1.0
    if full.all():
        return full
    zone = ZoneInfo(site.timezone)
    stubs: dict[pd.Timestamp, float] = {}
    for t in pd.unique(ends[~full]):
        end = pd.Timestamp(t).to_pydatetime()
        day = end.astimezone(zone).date()
        if end == _local_midnight(day, zone):
            length_of_day = (end - _local_midnight(day - timedelta(1), zone)).total_seconds()
            stubs[pd.Timestamp(t)] = length_of_day % size
    stub = np.array([stubs.get(pd.Timestamp(t), 0.0) for t in ends], dtype=float)
    cut = (stub > 0) & (np.abs(length - stub) <= 1.0)
    return full | cut


def current_fits(site: Site, fits: pd.DataFrame) -> pd.DataFrame:
    """The rows of *fits* whose window has the site's present ``[analysis] window``.

    The store keeps the fits of every window size it was ever run with (a changed
    setting does not throw the old ones away), but a diagnosis, a report or an export
    reads one size only: mixing daily and hourly fits would make one trend of two
    sampling rates. Windows of whole days are local days, so 23 or 25 hours long on a
    daylight-saving day, and the last sub-day window of such a day is cut at local
    midnight (`windows`); they count as the same size (`window_length_ok`).
    """
    if fits.empty:
        return fits
    keep = pd.Series(window_length_ok(site, pd.to_datetime(fits["window_start"], utc=True),
                                      pd.to_datetime(fits["window_end"], utc=True)))
    if not keep.all():
        log.info("%d fits of windows of another size than [analysis] window (%s) set aside",
                 int((~keep).sum()), site.window)
    return fits[keep.to_numpy()].reset_index(drop=True)


# ---------------------------------------------------------------------------------------
# analyze


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


def read_window(
    site: Site, store: ResultsStore, source: ReadingsSource, start: datetime, end: datetime
) -> pd.DataFrame:
    """Readings of every site tag in [start, end): from the source when it keeps its data
    (SQL), else from the store (ingested files)."""
    return read_tags(site, store, source, list(site.tags), start, end)


#: Worker processes start only when the remaining windows would take at least this long
#: in this process, judged by the first window [s]: each worker spends a few seconds on
#: imports before its first window, which a short run never wins back.
PARALLEL_AFTER_S = 10.0


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
        n_ok += sum(1 for f in result.fits if f.get("status") in ("ok", "not_identifiable"))
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


def analyze_windows(
    site: Site,
    store: ResultsStore,
    source: ReadingsSource,
    spans: Sequence[tuple[datetime, datetime]],
    *,
    jobs: int = 1,
    parallel_after_s: float = PARALLEL_AFTER_S,
) -> Iterator[WindowAnalysis]:
    """Read and analyse each window of *spans*, yielding the results in window order.

    With *jobs* > 1, the first window is analysed here and timed; when the rest would
    take longer than *parallel_after_s* at that pace, worker processes do them: each
    opens its own store connection (the store pickles as a way to reopen it; SQL stores
    reopen their URL) and, where the source keeps the readings (SQL), its own source from
    the site file (`open_source`). At most two windows per worker are in flight, so
    memory stays bounded on a long backfill. A store that cannot be reopened elsewhere
    (an in-memory database) is served in this process throughout.

    Results come in window order even when a later window finishes first: the caller
    writes them in that order, so the stored windows of an interrupted run have no holes
    and `catch_up`, which resumes after the last stored window, misses none. An error in
    a window is raised when its turn comes, after every earlier window was yielded.
    """
    rest = list(spans)
    # Workers for two windows or more after the first: one alone would gain nothing.
    shipped = _reopenable(store) if jobs > 1 and len(rest) > 2 else None
    if shipped is not None:
        ws, we = rest.pop(0)
        started = time.perf_counter()
        yield analyze_window(site, read_window(site, store, source, ws, we), ws, we)
        if (time.perf_counter() - started) * len(rest) < parallel_after_s:
            shipped = None
    if shipped is None:
        for ws, we in rest:
            yield analyze_window(site, read_window(site, store, source, ws, we), ws, we)
        return
    yield from _in_workers(site, shipped, source.keeps_readings, rest, min(jobs, len(rest)))


def _in_workers(
    site: Site, shipped: bytes, own_source: bool, spans: Sequence[tuple[datetime, datetime]],
    workers: int,
) -> Iterator[WindowAnalysis]:
    """`analyze_windows` in *workers* processes, results in window order."""
    with worker_pool(site, shipped, own_source, workers) as pool:
        pending: deque[Future[WindowAnalysis]] = deque()
        todo = iter(spans)
        try:
            with _sigint_ignored():  # the workers start on the first submits
                for span in islice(todo, 2 * workers):
                    pending.append(pool.submit(_worker_window, span))
            while pending:
                result = pending.popleft().result()
                for span in islice(todo, 1):
                    pending.append(pool.submit(_worker_window, span))
                yield result
        finally:
            for future in pending:
                future.cancel()


def worker_pool(site: Site, shipped: bytes, own_source: bool, workers: int
                ) -> ProcessPoolExecutor:
    """The process pool of a backfill: *workers* spawned processes, each with the site,
    its own store connection (*shipped*: the pickled store) and, when *own_source*, its
    own source; each exits when this process dies (`_die_with_parent`)."""
    context = multiprocessing.get_context("spawn")  # no inherited connections or threads
    return ProcessPoolExecutor(
        workers, mp_context=context, initializer=_worker_start,
        initargs=(site, shipped, own_source, os.getpid()),
    )


#: prctl option that asks the kernel for a signal when the parent dies (linux/prctl.h).
_PR_SET_PDEATHSIG = 1
#: How often the portable fallback looks for its parent [s].
PARENT_CHECK_S = 1.0


def _die_with_parent(parent_pid: int) -> None:
    """Make this worker end when *parent_pid* (the process that started it) dies.

    A worker outliving its parent (the parent killed with SIGKILL, or crashed) holds its
    memory and a database connection for as long as its last window takes and then idles
    for ever. On Linux the kernel sends SIGKILL at the parent's death
    (``prctl(PR_SET_PDEATHSIG)``); everywhere a daemon thread also checks every second
    that the parent is still this process's parent and exits when it is not. A parent
    already gone before either was set up is caught by the first check.
    """
    if sys.platform.startswith("linux"):
        try:
            libc = ctypes.CDLL(None, use_errno=True)
            if libc.prctl(_PR_SET_PDEATHSIG, int(signal.SIGKILL), 0, 0, 0) != 0:
                log.debug("prctl(PR_SET_PDEATHSIG) failed: errno %d", ctypes.get_errno())
        except (OSError, AttributeError) as exc:
            log.debug("prctl not available (%s): the parent check alone", exc)

    def watch() -> None:
        while True:
            if os.getppid() != parent_pid:
                os._exit(1)  # the parent is gone: nobody will read this worker's results
            time.sleep(PARENT_CHECK_S)

    if os.getppid() != parent_pid:
        os._exit(1)
    threading.Thread(target=watch, name="parent-watch", daemon=True).start()


@contextmanager
def _sigint_ignored() -> Iterator[None]:
    """Processes started inside are born with SIGINT ignored (the setting survives exec).

    Ctrl-C reaches the whole process group: only this process should act on it — stop
    handing out windows and wait for the ones in hand — not the workers, whose
    interrupted imports would print tracebacks and break the pool.
    """
    if threading.current_thread() is not threading.main_thread():
        yield  # signals are the main thread's; the daemon's jobs run elsewhere
        return
    previous = signal.signal(signal.SIGINT, signal.SIG_IGN)
    try:
        yield
    finally:
        signal.signal(signal.SIGINT, previous)


def _reopenable(store: ResultsStore) -> bytes | None:
    """The store pickled for the workers, or None when it cannot be reopened elsewhere."""
    try:
        return pickle.dumps(store)
    except (TypeError, AttributeError, pickle.PicklingError) as exc:
        log.info("windows analysed in this process: the store cannot be reopened (%s)", exc)
        return None


#: What a worker process works with: set once by `_worker_start`.
_WORKER: dict[str, Any] = {}


def _worker_start(site: Site, store: bytes, own_source: bool, parent_pid: int) -> None:
    _die_with_parent(parent_pid)
    _WORKER["site"] = site
    _WORKER["store"] = opened = pickle.loads(store)
    atexit.register(opened.close)
    # Ingested readings are in the store: no source needed (nor opened) then.
    _WORKER["source"] = source = open_source(site) if own_source else None
    if source is not None:
        atexit.register(source.close)


def _worker_window(span: tuple[datetime, datetime]) -> WindowAnalysis:
    site, store, source = _WORKER["site"], _WORKER["store"], _WORKER["source"]
    ws, we = span
    if source is None:
        readings = store.read_readings(list(site.tags), ws, we)
    else:
        readings = read_window(site, store, source, ws, we)
    return analyze_window(site, readings, ws, we)


def diagnosis_settings(site: Site) -> DiagnosisSettings:
    """Diagnosis thresholds with the site's per-branch limits, their spans from
    ``[diagnosis]`` converted to windows of ``[analysis] window``; messages state flows
    in each flow tag's own unit."""
    def unit(tag: str | None) -> str:
        return site.tags[tag].unit if tag is not None and tag in site.tags else "m3/h"

    spans = site.diagnosis
    return DiagnosisSettings.for_window(
        site.window.total_seconds(), baseline_s=spans.baseline, level_s=spans.level,
        trend_min_s=spans.trend_shortest, trend_max_s=spans.trend_longest,
        branches={
            b.name: BranchSettings(
                cleaning_limit_r=b.cleaning_limit,
                min_flow_m3s=b.min_flow_m3s if b.min_flow_m3s > 0 else None,
                flow_unit=unit(b.flow_tag),
            )
            for b in site.branches
        },
        timezone=site.timezone,
        clear_after_s=float(site.analysis.clear_after),
        balance_flow_unit=unit(site.total_flow_tag),
    )


def diagnosis_time(store: ResultsStore, end: datetime) -> datetime:
    """The time the diagnosis after an analysis up to *end* runs to: *end*, or the end of
    the newest analysed window where one later than *end* is stored. Analysing a past
    period again (a late file, a correction) must not wind the stored findings back to
    that period's end: they stay the diagnosis of the whole analysed history."""
    ends = pd.to_datetime(store.watermarks().fits["last_window_end"], utc=True)
    if ends.empty or pd.isna(ends.max()):
        return end
    return max(end, ends.max().to_pydatetime())


def diagnose_site(
    site: Site, store: ResultsStore, *, now: datetime, source: ReadingsSource | None = None,
    since: datetime | None = None,
) -> list[Finding]:
    """Diagnose the stored history up to *now*, cost the findings, store them.

    The back-flow hazard findings read the readings themselves (from *source* when it
    keeps them, else from the store): over the whole history, or — with *since*, the
    start of the period just analysed — from the earliest of *since*, the start of an
    open back-flow finding and one finding-clear time (`BackflowFindingSettings`) before
    *now*: a daily run then reads days, not the years behind it, and an open finding
    keeps its start."""
    history = current_fits(site, store.read_fits(end=now))
    if history.empty:
        return []
    findings = diagnose(
        history,
        maintenance=store.maintenance(),
        settings=diagnosis_settings(site),
        now=now,
        screening=store.read_screening(end=now),
        balance=store.read_balance(end=now),
        backflow=_backflow_inputs(site, store, source, history, now, since),
    )
    findings = [_with_cost(site, history, f) for f in findings]
    rows = [_finding_row(f) for f in findings]
    store.upsert_findings(rows + _superseded(store, findings, now))
    return findings


def _superseded(store: ResultsStore, findings: Sequence[Finding], now: datetime
                ) -> list[dict[str, Any]]:  # fmt: skip
    """Stored open findings the diagnosis of the whole history no longer makes (a store
    written before one condition became one finding holds a row per day of it): closed
    at *now*, marked ``superseded`` in their evidence, so no condition keeps two open
    rows. The diagnosis replays the whole history each run, so a finding it still makes
    has the same (branch, kind, start) and is updated in place instead; one first
    reported after *now* is left alone."""
    def key(branch: Any, kind: Any, start: Any) -> tuple[str, str, pd.Timestamp]:
        t = pd.Timestamp(start)
        return str(branch), str(kind), t.tz_localize("UTC") if t.tzinfo is None else t

    made = {key(f.branch, f.kind, f.start) for f in findings}
    out = []
    day = f"{pd.Timestamp(now):%Y-%m-%d}"
    for r in store.read_findings(open_only=True).to_dict(orient="records"):
        if key(r["branch"], r["kind"], r["start"]) in made or key(
            "", "", r["detected"])[2] > pd.Timestamp(now):
            continue  # still made, or first reported after *now* (a diagnosis of the past)
        out.append({
            **{k: r[k] for k in ("branch", "kind", "start", "detected", "confidence")},
            "end": now, "evidence": {**dict(r.get("evidence") or {}), "superseded": 1.0},
            "message": f"{r['message']} (Not found again by the diagnosis of {day} over the "
                       "whole stored history: closed.)",
        })
        log.info("finding %s %s from %s superseded", r["branch"], r["kind"], r["start"])
    return out


def _backflow_inputs(
    site: Site, store: ResultsStore, source: ReadingsSource | None, history: pd.DataFrame,
    now: datetime, since: datetime | None,
) -> tuple[pd.DataFrame, Any] | None:
    """The hazard samples over the analysed history, for the ``backflow_hazard`` findings
    (None when no branch can run back: every branch has a check valve or ends open)."""
    branches = hazard_branches(site)
    if not branches:
        return None
    start = pd.Timestamp(history["window_start"].min()).to_pydatetime()
    settings = settings_for(site, branches)
    if since is not None:
        stored = store.read_findings()
        opened = [pd.Timestamp(t).to_pydatetime() for t in stored["start"][
            (stored["kind"] == "backflow_hazard") & stored["end"].isna()]] if not stored.empty \
            else []
        start = max(start, min([since, now - settings.clear_after - site.window, *opened]))
    tags = {site.header_pressure_tag, site.header_temperature_tag, site.total_flow_tag,
            site.pump_speed_tag}
    for b in branches:
        tags |= {b.level_tag, b.end_pressure_tag}
    wanted = sorted(t for t in tags if t is not None)
    readings = (read_tags(site, store, source, wanted, start, now) if source is not None
                else store.read_readings(wanted, start, now))
    return hazard_samples(site, readings), settings


def _finding_row(f: Finding) -> dict[str, Any]:
    return {
        "branch": f.branch, "kind": f.kind, "start": f.start, "detected": f.detected,
        "end": f.end, "confidence": f.confidence, "evidence": dict(f.evidence),
        "message": f.message,
    }


def _with_cost(site: Site, history: pd.DataFrame, f: Finding) -> Finding:
    """Add lost flow and extra pump energy (`monitor.cost`, at the newest fit) to a
    resistance finding's evidence, in the units the evidence is stored in."""
    if f.kind not in RESISTANCE_KINDS:
        return f
    try:
        branch = site.branch(f.branch)
    except KeyError:
        return f
    rows = history[(history["branch"] == f.branch) & history["r"].notna()]
    if rows.empty:
        return f
    last = rows.iloc[-1]
    p_s = float(last.get("header_pressure_pa", math.nan))
    q_now = float(last.get("mean_flow_m3s", math.nan))
    r_now = float(last["r"])
    t_c = float(last.get("temperature_c", site.design_temperature_c))
    if not all(math.isfinite(v) for v in (p_s, q_now, r_now, t_c)):
        return f
    end_p = last.get("end_pressure_pa")
    r_base = float(f.evidence.get("r_baseline", 1.0))
    if not math.isfinite(r_base) or r_base <= 0:
        r_base = 1.0
    c = branch_cost(site, branch, header_pressure_pa=p_s, flow_m3s=q_now, r_now=r_now,
                    temperature_c=t_c, r_baseline=r_base,
                    end_pressure_pa=float(end_p) if end_p is not None
                    and math.isfinite(float(end_p)) else None)
    evidence = {
        **f.evidence,
        "lost_flow_m3h": c.lost_flow_m3s * 3600.0,
        "lost_flow_fraction": c.lost_flow_fraction,
        "extra_dp_bar": c.extra_dp_pa / 1e5,
        "extra_energy_kwh_per_day": c.extra_energy_j_per_day / J_PER_KWH,
    }
    return replace(f, evidence=evidence)


# ---------------------------------------------------------------------------------------
# low-flow alarms


#: How far back the first low-flow evaluation of a branch looks [s].
ALARM_FIRST_LOOKBACK_S = 86_400.0


def alarm_state_from_row(row: Mapping[Any, Any]) -> AlarmState:
    """The alarm's state as stored (see `alarm_row`)."""
    def t(key: str) -> datetime | None:
        value = row.get(key)
        return None if value is None or pd.isna(value) else pd.Timestamp(value).to_pydatetime()

    value = row.get("value")
    return AlarmState(
        branch=str(row["branch"]),
        condition=str(row["condition"]),
        state=State(str(row["state"])),
        active=bool(row.get("active") or False),
        pending_since=t("pending_since"),
        clear_since=t("clear_since"),
        last_sample=t("last_sample"),
        activated_at=t("activated"),
        acknowledged_at=t("acknowledged"),
        acknowledged_by=str(row.get("acknowledged_by") or ""),
        shelved_until=t("shelved_until"),
        last_value=math.nan if value is None or pd.isna(value) else float(value),
        message=str(row.get("message") or ""),
    )


def alarm_row(state: AlarmState, *, limit_m3s: float | None, now: datetime) -> dict[str, Any]:
    """A store row for *state* (the store journals every change of ``state``)."""
    return {
        "branch": state.branch, "condition": state.condition, "state": state.state.value,
        "activated": state.activated_at, "acknowledged": state.acknowledged_at,
        "shelved_until": state.shelved_until, "value": state.last_value,
        "limit_value": limit_m3s, "message": state.message, "updated": now,
        "active": state.active, "pending_since": state.pending_since,
        "clear_since": state.clear_since, "last_sample": state.last_sample,
        "acknowledged_by": state.acknowledged_by or None,
        "priority": priority_of(state.condition),
    }


def low_flow_settings(site: Site, branch: BranchConfig) -> LowFlowSettings:
    """Low-flow alarm settings of *branch*: limit and delays from the site file; the
    deadband is 5 % of the meter range (ISA-18.2 table for flow, from memory), the range
    taken from the tag's configured high limit or else twice the minimum flow."""
    assert branch.flow_tag is not None
    high = site.tags[branch.flow_tag].high
    span = high if high is not None and high > 0 else 2.0 * branch.min_flow_m3s
    return LowFlowSettings(
        min_flow_m3s=branch.min_flow_m3s,
        range_m3s=max(span, 1e-6),
        on_delay=timedelta(seconds=site.analysis.low_flow_on_delay),
        off_delay=timedelta(seconds=site.analysis.low_flow_off_delay),
        latching=site.analysis.low_flow_latching,
        max_gap=timedelta(seconds=max(900.0, 3 * site.analysis.sample_period)),
    )


def evaluate_alarms(
    site: Site, store: ResultsStore, source: ReadingsSource, *, now: datetime
) -> list[AlarmEvent]:
    """Run the near-real-time checks over the samples not yet seen; called after ingest.

    Three conditions, each an ISA-18.2 alarm with its own state: **low flow** per metered
    branch, **frozen meter** per flow and pressure transmitter (a reading that has not
    moved at all for ``[analysis] frozen_hold``), and **stale data** per tag and per
    source (`stale_after`). The alarms' memory (delays, held value, last sample) is
    stored, so a restart neither repeats nor drops an alarm; a low-flow message names the
    likely cause from the latest open findings.

    A source that cannot be read now (unreachable database) leaves the low-flow and
    frozen alarms as they were — there is nothing new to judge — and is logged; the
    stale-data alarms are judged all the same, on the newest readings stored. Only a
    results store that cannot be read or written stops the evaluation (raised).
    """
    stored = store.read_alarms()
    states = {
        (str(r["branch"]), str(r["condition"])): alarm_state_from_row(r)
        for r in stored.to_dict(orient="records")
    }
    rows: list[dict[str, Any]] = []
    events: list[AlarmEvent] = []
    try:
        _sample_alarms(site, store, source, states, now, rows, events)
    except (BranchwatchAdapterError, ConnectionError, OSError) as exc:
        if isinstance(exc, StoreError):
            raise
        log.warning("low-flow and frozen alarms not judged now: the readings of %s cannot be "
                    "read (%s); the stale-data alarms are judged all the same",
                    source.name, exc)
    _stale_alarms(site, store, source, states, now, rows, events)
    _store_alarms(store, rows, events)
    for e in events:
        log.warning("alarm %s %s %s: %s", e.branch, e.condition, e.action, e.message)
    return events


def _store_alarms(
    store: ResultsStore, rows: list[dict[str, Any]], events: Sequence[AlarmEvent]
) -> None:
    """Store the alarms' new states so that the journal gets every event at its own time.

    The store journals a change of state with the row's ``updated`` time; an alarm that
    came on and returned within one evaluation would otherwise leave only its last state,
    stamped with the evaluation time. So each earlier event of an alarm is written first,
    in time order, and the final row carries the time of its last event.
    """
    final = {(r["branch"], r["condition"]): r for r in rows}
    by_key: dict[tuple[str, str], list[AlarmEvent]] = {}
    for e in events:
        by_key.setdefault((e.branch, e.condition), []).append(e)
    steps: list[tuple[datetime, dict[str, Any]]] = []
    for key, evs in by_key.items():
        row = final.get(key)
        if row is None:
            continue
        steps += [(e.time, {**row, "state": e.state.value, "message": e.message,
                            "value": e.value, "updated": e.time}) for e in evs[:-1]]
        row["updated"] = evs[-1].time
    for _, step in sorted(steps, key=lambda item: item[0]):
        store.upsert_alarms([step])
    if rows:
        store.upsert_alarms(rows)


def replay_alarms(
    site: Site, store: ResultsStore, source: ReadingsSource, start: datetime, end: datetime
) -> list[AlarmEvent]:
    """Judge the sample-driven alarms (low flow, frozen meter, back-flow, flow drop) over
    a past period [start, end): what `evaluate_alarms` does at each ingest, for readings that
    arrived late (a backfill of older files), which the live checks never see — they
    look back only `ALARM_FIRST_LOOKBACK_S` before the wall clock.

    Each event is journalled at its own historic time (the sample that caused it), not
    at the time of the replay, and messages name their historic times: nothing reads as
    new today. A check continues from the last sample it judged; one that has already
    judged samples at or after *end* has nothing to replay (logged). The stale-data
    alarms are not replayed: they judge when data arrived, which a backfill cannot know.
    """
    if end <= start:
        raise ValueError(f"end must be after start, got {start.isoformat()} .. {end.isoformat()}")
    stored = store.read_alarms()
    states = {
        (str(r["branch"]), str(r["condition"])): alarm_state_from_row(r)
        for r in stored.to_dict(orient="records")
    }
    ahead = sorted(f"{b} {c}" for (b, c), st in states.items()
                   if st.last_sample is not None and st.last_sample >= end
                   and not c.startswith("stale"))  # fmt: skip
    if ahead:
        log.info("alarm replay %s .. %s: already judged past its end, left as they are: %s",
                 start, end, ", ".join(ahead))
    rows: list[dict[str, Any]] = []
    events: list[AlarmEvent] = []
    _sample_alarms(site, store, source, states, end, rows, events, first_lookback=start)
    _store_alarms(store, rows, events)
    for e in events:
        log.info("alarm replayed %s %s %s at %s: %s", e.branch, e.condition, e.action,
                 e.time, e.message)
    return events


def _sample_alarms(
    site: Site, store: ResultsStore, source: ReadingsSource,
    states: Mapping[tuple[str, str], AlarmState], now: datetime,
    rows: list[dict[str, Any]], events: list[AlarmEvent],
    *, first_lookback: datetime | None = None,
) -> None:
    """The low-flow, frozen and back-flow checks over the new samples (appends to rows,
    events). *first_lookback*: where a check never judged before starts (default
    `ALARM_FIRST_LOOKBACK_S` before *now*)."""
    findings = _open_findings(store)
    checks = alarm_checks(site)
    first = first_lookback or now - timedelta(seconds=ALARM_FIRST_LOOKBACK_S)
    tags = sorted({tag for _, _, tag, _ in checks} | set(_condition_tags(site)))
    since_all = min(
        ((states[(b, c)].last_sample or first) if (b, c) in states else first)
        for b, c, _, _ in checks
    ) if checks else now
    # the condition tags' newest reading before the first new header sample counts too,
    # and a flow-drop check needs its reference span before its first new sample
    lag = max([_condition_lag(site)] + [
        flow_drop_settings(site, site.branch(b)).lookback.total_seconds()
        for b, c, _, _ in checks if c == "flow_drop"])
    readings = read_tags(site, store, source, tags, since_all - timedelta(seconds=lag), now)
    good = readings[readings["good"].to_numpy(bool)]
    by_tag = {str(t): part for t, part in good.groupby("tag")}
    frozen = FrozenSettings(hold=timedelta(seconds=site.analysis.frozen_hold))
    resting = cannot_flow(site, good)
    for branch, condition, tag, limit in checks:
        key = (branch, condition)
        state = states.get(key, AlarmState(branch=branch, condition=condition))
        part = by_tag.get(tag)
        series = (pd.Series(part["value"].to_numpy(float), index=pd.DatetimeIndex(part["time"]))
                  if part is not None else pd.Series([], dtype=float,
                                                    index=pd.DatetimeIndex([], tz="UTC")))
        if state.last_sample is None and not series.empty and condition != "flow_drop":
            series = series[series.index >= pd.Timestamp(first)]
        spec = site.tags[tag]
        if condition == "flow_drop":
            # the whole series: the level needs the samples before the first judged one
            judged = state if state.last_sample is not None else replace(
                state, last_sample=first - timedelta(microseconds=1))
            b = site.branch(branch)
            frozen_now = _frozen_spans(states, events, tag)
            new, happened = evaluate_flow_drop(
                series, judged, flow_drop_settings(site, b), now, unit=spec.unit,
                timezone=site.timezone, resting=_either(resting.get(tag), frozen_now),
                driving=driving_pressure(site, b, good))
            if new.last_sample == judged.last_sample:
                new = state  # nothing new judged: nothing to store
        elif condition == "low_flow":
            new, happened = evaluate_low_flow(
                series, state, low_flow_settings(site, site.branch(branch)), now,
                diagnosis=[f for f in findings if f.branch == branch],
                unit=spec.unit, timezone=site.timezone,
            )
        elif condition == "backflow":
            b = site.branch(branch)
            samples = static_margin(site, b, good)
            if state.last_sample is None:
                samples = samples[samples.index >= pd.Timestamp(first)]
            new, happened = evaluate_backflow(samples, state, backflow_settings(site, b), now)
        else:
            new, happened = evaluate_frozen(
                series, state, frozen, now, tag=tag, unit_label=spec.unit, kind=spec.kind,
                timezone=site.timezone, no_flow=resting.get(tag),
                near_zero=near_zero(site, tag),
            )
        events.extend(happened)
        if new != state or key not in states:
            rows.append(alarm_row(new, limit_m3s=limit, now=now))


def _frozen_spans(states: Mapping[tuple[str, str], AlarmState],
                  events: Sequence[AlarmEvent], tag: str) -> pd.Series | None:
    """True while the frozen-meter alarm of *tag* is active (from its stored state and
    this evaluation's events), None when it never was: a frozen meter's flat reading
    against a moving header is the frozen alarm's business, so the flow-drop check
    leaves those samples alone (designed suppression, ISA-18.2)."""
    condition = f"frozen {tag}"
    before = next((st for (_, c), st in states.items() if c == condition), None)
    flips = [(e.time, e.action == "activated") for e in events
             if e.condition == condition and e.action in ("activated", "returned")]
    if not flips and not (before is not None and before.active):
        return None
    start = pd.Timestamp("1970-01-01", tz="UTC")
    times = [start] + [pd.Timestamp(t) for t, _ in flips]
    values = [bool(before is not None and before.active)] + [on for _, on in flips]
    return pd.Series(values, index=pd.DatetimeIndex(times))


def _either(a: pd.Series | None, b: pd.Series | None) -> pd.Series | None:
    """The OR of two step masks (bool, on UTC times, each holding until its next time)."""
    if a is None or b is None:
        return a if b is None else b
    index = pd.DatetimeIndex(a.index).union(pd.DatetimeIndex(b.index))

    def on(m: pd.Series) -> np.ndarray:
        m = m[~pd.DatetimeIndex(m.index).duplicated(keep="last")].sort_index()
        return m.astype(float).reindex(index, method="ffill").fillna(0.0).to_numpy() > 0.5

    return pd.Series(on(a) | on(b), index=index)


def _condition_tags(site: Site) -> list[str]:
    """Tags the back-flow check and the frozen exemption need besides the checked ones."""
    tags = {site.header_pressure_tag, site.header_temperature_tag, site.total_flow_tag,
            site.pump_speed_tag}
    for b in site.branches:
        tags |= {b.level_tag, b.end_pressure_tag}
    return sorted(t for t in tags if t is not None)


def _condition_lag(site: Site) -> float:
    """How far before the first new sample the condition tags are read [s]."""
    return max(900.0, 3.0 * site.analysis.sample_period)


#: The header gauge must resolve the branch's driving pressure to this share for the
#: flow-drop alarm to follow the header (our choice: a step of 2 % of the driving pressure
#: moves the expected flow by 1 %, a fifth of the default alarm fraction).
FOLLOW_HEADER_SHARE = 0.02


def driving_pressure(site: Site, branch: BranchConfig, readings: pd.DataFrame
                     ) -> pd.Series | None:
    """The header pressure less the branch's static back-pressure [Pa] at each header
    sample where the pumps run, for the flow-drop alarm to follow the header; None when
    ``follow_header`` is off or the header gauge is too coarse for it (its resolution,
    estimated from the readings, above `FOLLOW_HEADER_SHARE` of the median driving
    pressure: a test rig's 0.05-bar gauge at 0.07 bar)."""
    if branch.flow_drop is None or not branch.flow_drop.follow_header:
        return None
    m = static_margin(site, branch, readings)
    if m.empty:
        return None
    drive = (m["header_pa"] - m["static_pa"]).dropna()
    drive = drive[drive > 0]
    if drive.empty:
        return None
    head = readings[readings["tag"] == site.header_pressure_tag]
    step = resolution_by_tag(head).get(site.header_pressure_tag, 0.0)
    if step > FOLLOW_HEADER_SHARE * float(drive.median()):
        return None
    return drive


def flow_drop_settings(site: Site, branch: BranchConfig) -> FlowDropSettings:
    """Flow-drop alarm settings of *branch* (its ``flow_drop`` resolved with the site's
    ``[flow_drop]``; the branch must have it enabled)."""
    fd = branch.flow_drop
    if fd is None:
        raise ValueError(f"branch {branch.name!r} has no flow_drop alarm enabled")
    return FlowDropSettings(
        fraction=fd.fraction, reference=timedelta(seconds=fd.reference_s),
        hold=timedelta(seconds=fd.hold_s), deadband=fd.deadband,
        off_delay=timedelta(seconds=fd.off_delay_s),
        max_gap=timedelta(seconds=_condition_lag(site)),
    )


def backflow_settings(site: Site, branch: BranchConfig) -> BackflowAlarmSettings:
    """Back-flow alarm settings of *branch*: the header tag's unit and the site's zone; the
    on-delay none beyond two samples in a row, so the alarm comes within one ingest
    interval of the condition; the off-delay the site's low-flow off-delay."""
    return BackflowAlarmSettings(
        off_delay=timedelta(seconds=site.analysis.low_flow_off_delay),
        max_gap=timedelta(seconds=_condition_lag(site)),
        unit=site.tags[site.header_pressure_tag].unit, timezone=site.timezone,
        termination=termination_words(branch),
    )


#: The branch name under which the source-wide stale-data alarm is kept.
SOURCE_ALARM_BRANCH = "source"
SOURCE_ALARM_CONDITION = "stale source"


def _stale_alarms(
    site: Site, store: ResultsStore, source: ReadingsSource,
    states: Mapping[tuple[str, str], AlarmState], now: datetime,
    rows: list[dict[str, Any]], events: list[AlarmEvent],
) -> None:
    """The stale-data checks: one per tag, one for the source (appends to rows, events).

    While no tag has fresh data the source alarm stands for them all and the per-tag
    alarms are left as they were: one alarm for one lost link, not one per tag (an alarm
    flood is what EEMUA 191 warns of). They are judged again once any data flows.
    """
    settings = StaleSettings(stale_after=timedelta(seconds=stale_after(site)))
    newest = newest_readings(store)
    owners = tag_owners(site)
    key = (SOURCE_ALARM_BRANCH, SOURCE_ALARM_CONDITION)
    src_state = states.get(key, AlarmState(branch=key[0], condition=key[1]))
    known = [t for t in newest.values()] + [
        s.last_sample for k, s in states.items()
        if k[1].startswith("stale ") and k != key and s.last_sample is not None
    ]
    new_src, happened = evaluate_stale(
        max(known) if known else None, src_state, settings, now,
        subject=f"any tag of source {source.name}", timezone=site.timezone,
    )
    events.extend(happened)
    if new_src != src_state or key not in states:
        rows.append(alarm_row(new_src, limit_m3s=settings.stale_after.total_seconds(), now=now))
    if new_src.active:
        return
    for tag, branch in owners.items():
        k = (branch, f"stale {tag}")
        state = states.get(k, AlarmState(branch=branch, condition=k[1]))
        subject = f"{tag} ({branch})" if branch != "header" else f"{tag} (header)"
        new, happened = evaluate_stale(newest.get(tag), state, settings, now,
                                       subject=subject, timezone=site.timezone)
        events.extend(happened)
        if new != state or k not in states:
            rows.append(alarm_row(new, limit_m3s=settings.stale_after.total_seconds(), now=now))


def stale_after(site: Site) -> float:
    """Age at which a tag's newest reading counts as stale [s].

    ``[analysis] stale_after`` when given; else max(1 h, 4 x ``[schedule] ingest_every``,
    3 x ``[analysis] sample_period``): an hour is long enough that an export written
    hourly is not flagged between files, four ingest intervals ride out a late or
    failed ingest or two, and three sample periods a slowly logged tag (our choice).
    A tag the historian logs only on change (exception reporting) can sit unchanged
    longer: give such a site a larger ``stale_after``.
    """
    given = site.analysis.stale_after
    if given is not None:
        return float(given)
    return max(3600.0, 4.0 * site.schedule.ingest_every, 3.0 * site.analysis.sample_period)


def newest_readings(store: ResultsStore) -> dict[str, datetime]:
    """Tag → time of its newest stored reading (every ingested source stores its readings)."""
    marks = store.watermarks().readings
    return {str(t): pd.Timestamp(v).to_pydatetime()
            for t, v in zip(marks["tag"], marks["last"], strict=True) if pd.notna(v)}


def tag_owners(site: Site) -> dict[str, str]:
    """Every site tag → the branch it belongs to (the first that names it), else "header"."""
    owner: dict[str, str] = {}
    for b in site.branches:
        for tag in (b.flow_tag, b.end_pressure_tag, b.level_tag, b.valve_position_tag):
            if tag is not None:
                owner.setdefault(tag, b.name)
    for tag in site.tags:
        owner.setdefault(tag, "header")
    return dict(sorted(owner.items()))


@dataclass(frozen=True)
class WatchPass:
    """One ingest followed by the alarm checks.

    ``summary`` is None when the ingest failed; ``error`` then says why.
    """

    summary: IngestSummary | None
    error: BaseException | None
    events: list[AlarmEvent]


def ingest_and_watch(
    site: Site, store: ResultsStore, source: ReadingsSource,
    *, run_ingest: Callable[[], IngestSummary] | None = None,
    clock: Callable[[], datetime] = lambda: datetime.now(UTC),
) -> WatchPass:
    """Ingest, then evaluate the alarms — also when the ingest failed.

    A failed ingest (source unreachable, store refused a batch) is logged and returned,
    not raised: the alarm checks run after it all the same, the stale-data check first of
    all (this is when data stops). *run_ingest* lets the caller wrap the ingest (the CLI
    records it as a job run); by default it is `ingest`. An error of the alarm checks
    themselves (the store is down) is raised.
    """
    error: BaseException | None = None
    summary: IngestSummary | None = None
    try:
        summary = run_ingest() if run_ingest is not None else ingest(site, store, source)
    except Exception as exc:  # recorded and logged; the alarms are judged all the same
        error = exc
        log.error("ingest from %s failed (%s: %s); the alarm checks run all the same",
                  source.name, type(exc).__name__, exc)
    events = evaluate_alarms(site, store, source, now=clock())
    return WatchPass(summary=summary, error=error, events=events)


def alarm_checks(site: Site) -> list[tuple[str, str, str, float | None]]:
    """(branch, condition, tag, limit) of every near-real-time check of the site.

    ``backflow`` (a high-priority alarm) on every branch that can run back
    (`monitor.backflow.hazard_branches`: no check valve, a termination that holds water or
    pressure), judged on the header pressure against the branch's static back-pressure.
    ``flow_drop`` on every metered branch whose ``flow_drop`` alarm is enabled.

    A tag shared by several branches (a common return header) is judged once, under
    the first branch that names it.
    """
    checks: list[tuple[str, str, str, float | None]] = []
    owner: dict[str, str] = {}
    for b in site.branches:
        if b.flow_tag is not None and b.min_flow_m3s > 0:
            checks.append((b.name, "low_flow", b.flow_tag, b.min_flow_m3s))
        for tag in (b.flow_tag, b.end_pressure_tag):
            if tag is not None:
                owner.setdefault(tag, b.name)
    for tag in (site.header_pressure_tag, site.total_flow_tag):
        if tag is not None:
            owner.setdefault(tag, "header")
    checks += [(branch, f"frozen {tag}", tag, None) for tag, branch in owner.items()]
    checks += [(b.name, "backflow", site.header_pressure_tag, None)
               for b in hazard_branches(site)]
    checks += [(b.name, "flow_drop", b.flow_tag, None) for b in site.branches
               if b.flow_drop is not None and b.flow_tag is not None]
    return checks


def read_tags(
    site: Site, store: ResultsStore, source: ReadingsSource, tags: list[str],
    start: datetime, end: datetime,
) -> pd.DataFrame:
    """Readings of *tags* in [start, end), from wherever the site's readings live."""
    if source.keeps_readings:
        return source.read(tags, start, end)
    return store.read_readings(tags, start, end)


def _open_findings(store: ResultsStore) -> list[Finding]:
    frame = store.read_findings()
    out = []
    for r in frame.to_dict(orient="records"):
        if r.get("end") is not None and not pd.isna(r["end"]):
            continue
        out.append(Finding(
            branch=str(r["branch"]), kind=str(r["kind"]),
            start=pd.Timestamp(r["start"]).to_pydatetime(),
            detected=pd.Timestamp(r["detected"]).to_pydatetime(), end=None,
            confidence=float(r["confidence"]), evidence=dict(r.get("evidence") or {}),
            message=str(r["message"]),
        ))
    return out


# ---------------------------------------------------------------------------------------
# the daily job


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


# ---------------------------------------------------------------------------------------
# the morning report


def _report_time(site: Site, day_end: datetime) -> datetime:
    """When the daemon writes the morning report of the day ending at *day_end*:
    ``[schedule] report_at`` site time on the next day."""
    hour, minute = (int(x) for x in site.schedule.report_at.split(":"))
    local = pd.Timestamp(day_end).tz_convert(site.timezone).normalize()
    at = local.replace(hour=hour, minute=minute)
    return at.tz_convert("UTC").to_pydatetime()


def _given_up(store: ResultsStore, *, since: datetime) -> pd.DataFrame:
    """Messages the outbox gave up on that were queued at or after *since*."""
    failed = store.outbox(status="failed")
    if failed.empty:
        return failed
    return failed[pd.to_datetime(failed["created"], utc=True) >= pd.Timestamp(since)]


def write_report(site: Site, store: ResultsStore, *, day: datetime, now: datetime) -> Path:
    """Write the morning report for the site-local day containing *day*; returns its path.

    Named by the day, so a second run the same day replaces the file (idempotent).
    """
    from monitor.monthly import latest_monthly
    from monitor.report import ReportInputs, build_report, history_start, report_day_bounds

    day_start, day_end = report_day_bounds(site, day)
    fits = current_fits(site, store.read_fits(start=history_start(day_end), end=day_end))
    findings = store.read_findings()
    if not findings.empty:
        findings = findings[findings["start"] < pd.Timestamp(day_end)]
    inputs = ReportInputs(
        site=site, day=day_start, fits=fits, findings=findings, alarms=store.read_alarms(),
        quarantine=store.quarantine_counts(), health=store.data_health(day_start, day_end),
        generated=now, newest_reading=max(newest_readings(store).values(), default=None),
        stale_after_s=stale_after(site), maintenance=store.maintenance(include_withdrawn=True),
        monthly=latest_monthly(site.report_folder, before=day_end, site=site),
        as_of=min(now, _report_time(site, day_end)),
        failed_messages=_given_up(store, since=day_start - timedelta(days=6)),
    )
    local = pd.Timestamp(day_start).tz_convert(site.timezone)
    path = site.report_folder / f"morning-{local:%Y-%m-%d}.html"
    text = build_report(inputs)
    tmp = path.with_suffix(".tmp")
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        tmp.write_text(text, encoding="utf-8")
        tmp.replace(path)
    except OSError as exc:  # disk full, read-only: the previous file stays as it was
        with suppress(OSError):
            tmp.unlink(missing_ok=True)  # a cut temp file would hold the space it took
        raise ReportWriteError(
            f"the morning report {path.name} could not be written in {path.parent} "
            f"({exc.strerror or type(exc).__name__}); any earlier report there is kept: free "
            "space on that disk or make the folder writable ([report] folder in the site "
            "file), then run 'report' again", errno=exc.errno) from exc
    log.info("morning report written to %s", path)
    return path


class ReportWriteError(OSError):
    """The report folder refused the report (full, read-only, gone); one line."""

    def __init__(self, message: str, *, errno: int | None = None) -> None:
        super().__init__(message)
        self.errno = errno
