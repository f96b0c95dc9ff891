"""Backfills on a Dask distributed cluster: many sites and years, across machines.

`analyze_on_cluster` does what `monitor.app.jobs.analyze` does for one site, for any number
of sites at once, with the work spread over the workers of a Dask scheduler:

* A **task** is (site, branch group, month): the windows of one local calendar month,
  for a group of the site's branches (`branch_groups`; by default all of them). The
  task reads only its own windows' readings — from the store where files were ingested,
  from the site's SQL source by time range where the source keeps them — analyses them
  (`monitor.analysis.window.analyze_window`) and writes each window's rows itself, one
  transaction per window. No process ever holds more than one window of one group.
* Writes are **idempotent**: the store upserts fits, screening counts, balance and data
  health on their natural keys, replacing what is there. A task retried after its worker
  died part-way writes the same rows again; nothing is doubled, nothing lost.
* A site's **diagnosis** is one more task that waits for all of that site's window
  tasks, then runs `monitor.app.site_diagnosis.diagnose_site` over the stored history
  in window order, exactly as the one-machine path does after its last window.

The store must be one every worker can open (`ResultsStore.shared`: a database server
such as PostgreSQL). A SQLite file is refused: it lives on one machine's disk, and
SQLite's file locking is not safe over network file systems.

Exceptions::

    ClusterError (RuntimeError)
    ├── SchedulerUnreachable (ConnectionError)   no scheduler answers at the address
    ├── StoreNotShared (ValueError)              the store is a file the workers cannot share
    └── TaskFailed                               a task raised; windows stored before it stay
"""

from __future__ import annotations

import atexit
import logging
import pickle
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import datetime
from typing import Any

import pandas as pd

from adapters.base import ReadingsSource, ResultsStore
from adapters.credentials import mask_secrets
from monitor.analysis.diagnose import Finding
from monitor.analysis.window import analyze_window
from monitor.app.ingest import open_source, read_tags
from monitor.app.jobs import AnalyzeSummary
from monitor.app.site_diagnosis import diagnose_site, diagnosis_time
from monitor.app.windows import windows
from monitor.site.config import Site

log = logging.getLogger(__name__)

__all__ = [
    "CONNECT_TIMEOUT_S",
    "ClusterError",
    "SchedulerUnreachable",
    "SiteRun",
    "StoreNotShared",
    "Task",
    "TaskFailed",
    "analyze_on_cluster",
    "branch_groups",
    "connect",
    "month_tasks",
]

#: How long `connect` waits for a scheduler to answer [s].
CONNECT_TIMEOUT_S = 10.0
#: A task that raised is run again this often before the run fails: a database that
#: dropped a connection for a moment should not end a fleet's backfill. A worker that
#: died is a different matter: the scheduler reschedules its tasks itself.
TASK_RETRIES = 2


class ClusterError(RuntimeError):
    """A backfill on a cluster could not be done."""


class SchedulerUnreachable(ClusterError, ConnectionError):
    """No Dask scheduler answers at the address given."""


class StoreNotShared(ClusterError, ValueError):
    """The site's store cannot be opened by workers on other machines."""


class TaskFailed(ClusterError):
    """One task (site, branch group, month) raised; windows stored before it stay."""


# ---------------------------------------------------------------------------------------
# connecting


def _need_distributed() -> Any:
    try:
        import distributed
    except ImportError:
        raise ClusterError(
            "--executor dask needs Dask distributed: pip install 'branchwatch[fleet]'"
        ) from None
    return distributed


@contextmanager
def connect(scheduler: str | None, *, workers: int = 2,
            timeout_s: float = CONNECT_TIMEOUT_S) -> Iterator[Any]:
    """A `distributed.Client` of the scheduler at *scheduler* (``tcp://host:8786``), or,
    with None, of a cluster of *workers* processes on this machine, closed on exit.

    A scheduler that does not answer within *timeout_s* raises `SchedulerUnreachable`
    with what to do; nothing has been analysed then.
    """
    distributed = _need_distributed()
    if scheduler is None:
        cluster = distributed.LocalCluster(
            n_workers=workers, threads_per_worker=1, processes=True,
            dashboard_address=":0",  # any free port: a second run must not collide
        )
        try:
            with distributed.Client(cluster) as client:
                yield client
        finally:
            cluster.close()
        return
    try:
        client = distributed.Client(scheduler, timeout=f"{timeout_s}s")
    except (OSError, TimeoutError, ValueError) as exc:
        raise SchedulerUnreachable(
            f"no Dask scheduler answers at {scheduler!r} within {timeout_s:g} s "
            f"({type(exc).__name__}); start one with 'dask scheduler' and workers with "
            f"'dask worker {scheduler}', or give the right --scheduler address; nothing "
            "was analysed"
        ) from None
    with client:
        yield client


# ---------------------------------------------------------------------------------------
# tasks


@dataclass(frozen=True)
class Task:
    """One unit of work: the windows *spans* (of local *month*) of branches *group* of
    site number *site* in the run; *header* when this group also does the header's
    share (balance, header tags' screening counts and health, an unmetered branch)."""

    site: int
    group: tuple[str, ...]
    header: bool
    spans: tuple[tuple[datetime, datetime], ...]
    month: str  # the site's local month of the windows, e.g. "2026-03"


def branch_groups(site: Site, size: int | None = None) -> list[tuple[str, ...]]:
    """The site's branches in groups of at most *size* (None: one group of all).

    The first group does the header's share (see `Task`), so a branch without a flow
    meter, whose flow comes from the header balance, goes into it.
    """
    names = [b.name for b in site.branches]
    if size is not None and size < 1:
        raise ValueError(f"group size must be 1 or more, got {size}")
    unmetered = [b.name for b in site.branches if b.flow_tag is None]
    names = unmetered + [n for n in names if n not in unmetered]
    step = len(names) if size is None else size
    return [tuple(names[i:i + step]) for i in range(0, len(names), max(step, 1))] or [()]


def month_tasks(
    site: Site, index: int, start: datetime, end: datetime, *, group_size: int | None = None
) -> list[Task]:
    """The tasks of site number *index* over [start, end): one per branch group and local
    calendar month of the window starts, months in order."""
    months: dict[tuple[int, int], list[tuple[datetime, datetime]]] = {}
    zone = site.timezone
    for ws, we in windows(start, end, site.window, zone):
        local = pd.Timestamp(ws).tz_convert(zone)
        months.setdefault((local.year, local.month), []).append((ws, we))
    groups = branch_groups(site, group_size)
    return [
        Task(index, group, i == 0, tuple(spans), f"{year:04d}-{month:02d}")
        for (year, month), spans in sorted(months.items())
        for i, group in enumerate(groups)
    ]


def group_tags(site: Site, group: Sequence[str], header: bool) -> list[str]:
    """The tags a task reads: the header's, the group's branches' (flow and logged
    conditions) and, for the header group, every flow meter and every tag no branch
    names."""
    named: set[str] = set()
    wanted = {t for t in (site.header_pressure_tag, site.header_temperature_tag,
                          site.total_flow_tag, site.pump_speed_tag) if t}
    for b in site.branches:
        tags = {t for t in (b.flow_tag, *b.logged_conditions.values()) if t}
        named |= tags
        if b.name in group:
            wanted |= tags
        elif header and b.flow_tag:
            wanted.add(b.flow_tag)
    if header:
        wanted |= set(site.tags) - named
    return sorted(t for t in wanted if t in site.tags)


@dataclass(frozen=True)
class TaskResult:
    """What one task wrote."""

    windows: int
    fits: int
    fits_ok: int
    readings: int


#: Per worker process: stores and sources opened by earlier tasks, by what opens them.
_OPENED: dict[bytes, Any] = {}


def _opened_store(shipped: bytes) -> ResultsStore:
    store = _OPENED.get(shipped)
    if store is None:
        store = _OPENED[shipped] = pickle.loads(shipped)
        atexit.register(store.close)
    return store


def _opened_source(site: Site) -> ReadingsSource:
    key = pickle.dumps(("source", str(site.path)))
    source = _OPENED.get(key)
    if source is None:
        source = _OPENED[key] = open_source(site)
        atexit.register(source.close)
    return source


def run_task(site: Site, shipped: bytes, own_source: bool, task: Task) -> TaskResult:
    """Read, analyse and store each window of *task* (in a worker). Runs again from the
    start when retried: each window's rows replace what a first try stored."""
    store = _opened_store(shipped)
    source = _opened_source(site) if own_source else None
    tags = group_tags(site, task.group, task.header)
    n_fits = n_ok = n_read = 0
    for ws, we in task.spans:
        readings = (read_tags(site, store, source, tags, ws, we) if source is not None
                    else store.read_readings(tags, ws, we))
        result = analyze_window(site, readings, ws, we, branches=task.group,
                                header=task.header)
        store.store_window(fits=result.fits, screening=result.screening,
                           balance=result.balance, health=result.health)
        n_read += result.samples
        n_fits += len(result.fits)
        n_ok += sum(1 for f in result.fits if f.counts)
    return TaskResult(len(task.spans), n_fits, n_ok, n_read)


def run_diagnosis(site: Site, shipped: bytes, own_source: bool, start: datetime,
                  end: datetime, *_windows_done: TaskResult) -> list[Finding]:
    """The site's diagnosis (in a worker), once every window task of the site is done
    (their results are its arguments, so the scheduler runs it after them)."""
    store = _opened_store(shipped)
    source = _opened_source(site) if own_source else None
    return diagnose_site(site, store, now=diagnosis_time(store, end), source=source,
                         since=start)


# ---------------------------------------------------------------------------------------
# the run


@dataclass(frozen=True)
class SiteRun:
    """One site of a cluster run: its site, store and readings source."""

    site: Site
    store: ResultsStore
    source: ReadingsSource


def check_shared(run: SiteRun) -> None:
    """Refuse a store the workers cannot open (`StoreNotShared`)."""
    if not run.store.shared:
        raise StoreNotShared(
            f"{run.site.path}: the store {mask_secrets(repr(run.store))} is a SQLite file, "
            "which workers on other machines cannot share; use a PostgreSQL store "
            "([store] url_env) for --executor dask, or --executor local"
        )


def analyze_on_cluster(
    client: Any,
    runs: Sequence[SiteRun],
    start: datetime,
    end: datetime,
    *,
    group_size: int | None = None,
    progress: Callable[[int, int], None] | None = None,
) -> list[AnalyzeSummary]:
    """Fit every branch of every site over every whole window in [start, end) on the
    cluster of *client*, then diagnose each site; one `AnalyzeSummary` per site, in the
    order of *runs*, with the same numbers `monitor.app.jobs.analyze` gives.

    The ``readings`` of a summary count the readings read: with groups of branches,
    each group reads the header's tags again. *progress* is called with (tasks done,
    tasks in all) as tasks finish. A task that
    fails (after `TASK_RETRIES` retries) raises `TaskFailed` naming the site, group and
    month; the windows already stored stay, and a rerun rewrites them unchanged.
    """
    distributed = _need_distributed()
    for run in runs:
        check_shared(run)
    window_futures: list[list[Any]] = []
    tasks: dict[str, Task] = {}
    diagnoses = []
    for i, run in enumerate(runs):
        shipped = pickle.dumps(run.store)
        own = run.source.keeps_readings
        futures = []
        for task in month_tasks(run.site, i, start, end, group_size=group_size):
            future = client.submit(run_task, run.site, shipped, own, task, pure=False,
                                   retries=TASK_RETRIES)
            tasks[future.key] = task
            futures.append(future)
        window_futures.append(futures)
        diagnoses.append(client.submit(run_diagnosis, run.site, shipped, own, start, end,
                                       *futures, pure=False, retries=TASK_RETRIES))
    every = [f for fs in window_futures for f in fs] + diagnoses
    done = 0
    try:
        for future in distributed.as_completed(every):
            if future.status == "error":
                raise _failed(runs, tasks.get(future.key), future)
            if future.status != "finished":  # cancelled: the scheduler went away
                raise ClusterError(
                    f"the cluster dropped its tasks ({future.status}): the scheduler went "
                    "away or was restarted; the windows stored so far are kept, and a "
                    "rerun writes the rest")
            done += 1
            if progress is not None:
                progress(done, len(every))
        summaries = []
        for run, futures, diagnosis in zip(runs, window_futures, diagnoses, strict=True):
            parts: list[TaskResult] = client.gather(futures)
            findings: list[Finding] = diagnosis.result()
            summaries.append(AnalyzeSummary(
                windows=len(list(windows(start, end, run.site.window, run.site.timezone))),
                fits=sum(p.fits for p in parts), fits_ok=sum(p.fits_ok for p in parts),
                readings=sum(p.readings for p in parts), findings=findings,
            ))
            log.info("cluster analysis of %s %s .. %s: %d tasks, %d fits, %d findings",
                     run.site.name, start, end, len(futures), summaries[-1].fits,
                     len(findings))
        return summaries
    finally:
        client.cancel([f for f in every if not f.done()])


def _failed(runs: Sequence[SiteRun], task: Task | None, future: Any) -> TaskFailed:
    exc = future.exception()
    if task is None:
        return TaskFailed(f"a site's diagnosis failed: {type(exc).__name__}: {exc}")
    site = runs[task.site].site
    return TaskFailed(
        f"{site.path}: the windows of {task.month} for branches {', '.join(task.group)} "
        f"failed: {type(exc).__name__}: {mask_secrets(str(exc))}; the windows stored "
        "before it are kept, and a rerun writes the rest"
    )

