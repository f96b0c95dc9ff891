"""The daemon: APScheduler 3.x wiring around the jobs in `monitor.app.jobs`.

Four jobs, each an idempotent function of (site, store, source, time):

* ``ingest``  every ``schedule.ingest_every`` (default 15 min): new readings in, alarms
  evaluated on what arrived (also when the ingest failed: stale data is then the news);
* ``analyze`` daily at ``schedule.analyze_at`` site time: fit the windows that closed
  since the last run (catching up after downtime), diagnose, store findings;
* ``report``  daily at ``schedule.report_at`` site time: the morning report;
* ``monthly`` on the 1st of each month at ``schedule.report_at`` site time: the monthly
  report of the month before (idempotent on its month: the file is named by it).

APScheduler pitfalls handled here (its user guide and issue tracker): every job has an
explicit id and ``replace_existing=True``, so a restart does not add copies;
``misfire_grace_time`` is set (the default of 1 s silently skips late runs) and
``coalesce=True`` folds a backlog of missed runs into one; one scheduler per process and
no persistent job store (the schedule is rebuilt from the site file at each start). The
daily jobs run in the site's zone, outside 01:00–04:00 (config validation refuses that
band), and are idempotent on their date, so a DST change cannot double or drop a day.

On start, one **start-up pass** runs at once, in order: an ingest, then each daily job
whose last successful run (``last_ok``, from the store's job runs) is older than its
last scheduled time — a morning report missed while the machine was down is written
then, after the analysis it needs. The regular schedule goes on from there.

`wait_for` opens what the daemon cannot start without (the results store) with retries
and a growing wait, so a daemon started before its database server waits for it instead
of exiting; each try is one log line, with the password masked
(`adapters.credentials.mask_secrets`).

A job that raises is logged, recorded as a failed run in the store and counted; it does
not stop the loop. SIGTERM and SIGINT stop the scheduler after the running job ends; each
job writes in transactions, so a kill at any moment loses at most the uncommitted batch,
which the next run reads again.
"""

from __future__ import annotations

import json
import logging
import signal
import threading
import time
import urllib.parse
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from pathlib import Path
from types import FrameType
from typing import Any, TypeVar

from apscheduler.events import EVENT_JOB_ERROR, EVENT_JOB_EXECUTED, EVENT_JOB_MISSED, JobEvent
from apscheduler.schedulers.background import BackgroundScheduler
from apscheduler.triggers.cron import CronTrigger
from apscheduler.triggers.date import DateTrigger
from apscheduler.triggers.interval import IntervalTrigger

from adapters.base import ReadingsSource, ResultsStore
from adapters.credentials import mask_secrets, remember_secret
from monitor.site.config import Site

log = logging.getLogger(__name__)

__all__ = ["Daemon", "DaemonStats", "last_ok_run", "site_daemon", "site_jobs", "wait_for"]

T = TypeVar("T")

#: a change of the wall clock against the monotonic clock larger than this is a step [s]
CLOCK_STEP_S = 30.0
#: the jobs run on an interval (re-run at once after the clock was set back)
INTERVAL_JOBS = ("ingest", "notify")
#: how often the outbox is looked at [s] (never less often than ingest)
NOTIFY_EVERY_S = 60
MISFIRE_GRACE_S = 3600  # a daily job up to an hour late still runs (e.g. after a reboot)
#: The shortest ingest interval the scheduler accepts [s].
MIN_INTERVAL_S = 10
#: The id of the one-off job that runs at start (ingest, then missed daily jobs).
STARTUP_JOB = "start-up"
#: Daily (and monthly) jobs that are made up for at start when missed, in this order.
DAILY_JOBS = ("analyze", "report", "monthly")
#: How far back the last scheduled time of each job is looked for at start.
_HORIZON = {"monthly": timedelta(days=32)}


@dataclass
class DaemonStats:
    """Counters for the health file."""

    started: str = field(default_factory=lambda: datetime.now(UTC).isoformat())
    runs: dict[str, int] = field(default_factory=dict)
    failures: dict[str, int] = field(default_factory=dict)
    missed: dict[str, int] = field(default_factory=dict)
    last_ok: dict[str, str] = field(default_factory=dict)
    last_error: dict[str, str] = field(default_factory=dict)


class Daemon:
    """Runs the site's jobs on schedule until stopped.

    *jobs* maps a job id to a zero-argument callable (`site_jobs` binds site, store and
    source into them), which keeps this class free of any knowledge of data or physics.
    """

    def __init__(
        self, site: Site, jobs: dict[str, Callable[[], Any]], *, health_file: Path | None = None,
        last_ok: Callable[[str], datetime | None] | None = None,
    ) -> None:
        """*last_ok* gives the start time of a job's last successful run (None: never);
        without it, missed daily runs are not made up at start."""
        self.site = site
        self.jobs = jobs
        self.health_file = health_file
        self.last_ok = last_ok
        self.stats = DaemonStats()
        self._stop = threading.Event()
        self.scheduler = BackgroundScheduler(
            timezone=site.timezone,
            job_defaults={"coalesce": True, "max_instances": 1,
                          "misfire_grace_time": MISFIRE_GRACE_S},
        )
        self.scheduler.add_listener(
            self._on_event, EVENT_JOB_EXECUTED | EVENT_JOB_ERROR | EVENT_JOB_MISSED
        )

    def schedule(self) -> None:
        """Add the jobs with explicit ids; safe to call again."""
        sched = self.site.schedule
        every = max(MIN_INTERVAL_S, int(sched.ingest_every))
        triggers: dict[str, Any] = {
            "ingest": IntervalTrigger(seconds=every),
            "analyze": _daily(sched.analyze_at, self.site.timezone),
            "report": _daily(sched.report_at, self.site.timezone),
            # the outbox: a message waits at most this long after it is queued
            "notify": IntervalTrigger(seconds=min(NOTIFY_EVERY_S, every)),
            "monthly": _monthly(sched.report_at, self.site.timezone),
        }
        now = datetime.now(UTC)
        for job_id, func in self.jobs.items():
            trigger = triggers.get(job_id)
            if trigger is None:
                raise ValueError(f"no schedule for job {job_id!r}; known: {sorted(triggers)}")
            extra: dict[str, Any] = {}
            if job_id == "ingest":  # the start-up pass ingests now
                extra["next_run_time"] = now + timedelta(seconds=every)
            # (never pass next_run_time=None: APScheduler takes that as "paused")
            self.scheduler.add_job(
                func, trigger, id=job_id, name=job_id, replace_existing=True, **extra
            )
        first = [j for j in ("ingest", *DAILY_JOBS) if j in self.jobs
                 and (j == "ingest" or self.missed(j, triggers[j], now))]
        if first:
            self.scheduler.add_job(
                self._startup, DateTrigger(run_date=now), args=(first,), id=STARTUP_JOB,
                name=STARTUP_JOB, replace_existing=True,
            )
        log.info("scheduled %s for site %r; at start: %s", ", ".join(self.jobs),
                 self.site.name, ", ".join(first) or "nothing")

    def missed(self, job_id: str, trigger: Any, now: datetime) -> bool:
        """True when *job_id* last succeeded before its last scheduled time (or never)."""
        if self.last_ok is None:
            return False
        due = last_fire_time(trigger, now, horizon=_HORIZON.get(job_id, timedelta(days=8)))
        if due is None:
            return False
        ok = self.last_ok(job_id)
        if ok is None or ok < due:
            log.info("job %s: last successful run %s is before its last scheduled time %s: "
                     "it runs now", job_id, ok.isoformat() if ok else "never", due.isoformat())
            return True
        return False

    def _startup(self, job_ids: list[str]) -> None:
        """The start-up pass: each job in turn, a failure logged and counted, not fatal."""
        for job_id in job_ids:
            try:
                self.jobs[job_id]()
            except Exception as exc:  # one job's failure must not skip the next
                self._count(job_id, exc)
            else:
                self._count(job_id, None)

    def run(self, *, duration_s: float | None = None) -> DaemonStats:
        """Run until SIGTERM/SIGINT (or *duration_s* seconds, for tests and trials)."""
        self._install_signals()
        self.scheduler.start(paused=True)
        self.schedule()
        self.scheduler.resume()
        for job in self.scheduler.get_jobs():
            log.info("job %s: next run %s", job.id, job.next_run_time)
        deadline = None if duration_s is None else time.monotonic() + duration_s
        offset = time.time() - time.monotonic()
        try:
            while not self._stop.is_set():
                self._write_health()
                offset = self._watch_clock(offset)
                left = None if deadline is None else deadline - time.monotonic()
                if left is not None and left <= 0:
                    break
                self._stop.wait(5.0 if left is None else min(5.0, left))
        finally:
            log.info("stopping: waiting for the running job to finish")
            self.scheduler.shutdown(wait=True)
            self._write_health()
        return self.stats

    def _watch_clock(self, offset: float) -> float:
        """Notice a step of the system clock (wall time against the monotonic clock).

        APScheduler waits until a job's next run time by the wall clock, so a clock set
        back an hour would hold ingest (and with it the stale-data alarm) back an hour:
        the interval jobs are run now instead. A step forward needs nothing (the missed
        runs are folded into one, at once); the daily jobs are idempotent on their date.
        Returns the new offset [s].
        """
        now_offset = time.time() - time.monotonic()
        step = now_offset - offset
        if abs(step) > CLOCK_STEP_S:
            log.warning("the system clock stepped by %+.0f s; interval jobs run now", step)
            if step < 0 and self.scheduler.running:
                for job_id in INTERVAL_JOBS:
                    if self.scheduler.get_job(job_id) is not None:
                        self.scheduler.modify_job(job_id, next_run_time=datetime.now(UTC))
        return now_offset

    def stop(self) -> None:
        self._stop.set()

    def _install_signals(self) -> None:
        if threading.current_thread() is not threading.main_thread():
            return

        def handler(signum: int, frame: FrameType | None) -> None:
            log.info("signal %s received", signal.Signals(signum).name)
            self.stop()

        signal.signal(signal.SIGTERM, handler)
        signal.signal(signal.SIGINT, handler)

    def _on_event(self, event: JobEvent) -> None:
        job = event.job_id
        s = self.stats
        if event.code == EVENT_JOB_MISSED:
            s.missed[job] = s.missed.get(job, 0) + 1
            log.warning("job %s missed its run time %s", job, event.scheduled_run_time)
            return
        if job == STARTUP_JOB:
            return  # counted per job by `_startup`
        self._count(job, getattr(event, "exception", None))

    def _count(self, job: str, exc: BaseException | None) -> None:
        s = self.stats
        now = datetime.now(UTC).isoformat()
        s.runs[job] = s.runs.get(job, 0) + 1
        if exc is not None:
            s.failures[job] = s.failures.get(job, 0) + 1
            s.last_error[job] = f"{now} {type(exc).__name__}: {exc}"
            log.error("job %s failed (%s: %s); the daemon carries on and retries on "
                      "its next run", job, type(exc).__name__, exc)
        else:
            s.last_ok[job] = now

    def _write_health(self) -> None:
        if self.health_file is None:
            return
        jobs = {j.id: (j.next_run_time.isoformat() if j.next_run_time else None)
                for j in self.scheduler.get_jobs()
                if j.id != STARTUP_JOB} if self.scheduler.running else {}
        payload = {"site": self.site.name, "written": datetime.now(UTC).isoformat(),
                   "next_runs": jobs, **self.stats.__dict__}
        tmp = self.health_file.with_suffix(".tmp")
        tmp.parent.mkdir(parents=True, exist_ok=True)
        tmp.write_text(json.dumps(payload, indent=2))
        tmp.replace(self.health_file)


def _daily(clock: str, timezone: str) -> CronTrigger:
    hour, minute = (int(x) for x in clock.split(":"))
    return CronTrigger(hour=hour, minute=minute, timezone=timezone)


def _monthly(clock: str, timezone: str) -> CronTrigger:
    """On the 1st of each month at *clock* (validated outside 01:00–04:00)."""
    hour, minute = (int(x) for x in clock.split(":"))
    return CronTrigger(day=1, hour=hour, minute=minute, timezone=timezone)


def last_fire_time(trigger: Any, now: datetime, *, horizon: timedelta = timedelta(days=8)
                   ) -> datetime | None:
    """The latest time at or before *now* at which *trigger* fires (None within
    *horizon*): stepped forward from *now* - *horizon* (a daily trigger fires daily)."""
    t = trigger.get_next_fire_time(None, now - horizon)
    last = None
    while t is not None and t <= now:
        last = t
        t = trigger.get_next_fire_time(t, t + timedelta(seconds=1))
    return None if last is None else last.astimezone(UTC)


def wait_for(
    opener: Callable[[], T],
    *,
    what: str,
    secret_url: str = "",
    stop: threading.Event | None = None,
    first_delay_s: float = 2.0,
    max_delay_s: float = 300.0,
    give_up_after_s: float | None = None,
    retry_on: tuple[type[BaseException], ...] = (Exception,),
) -> T | None:
    """Call *opener* until it returns, waiting longer after each failure (doubling from
    *first_delay_s* up to *max_delay_s*); one log line per failed try, the password of
    *secret_url* masked. Returns None when *stop* is set or *give_up_after_s* has passed.
    """
    if secret_url:  # written %-encoded in the URL; masked in every form
        raw = urllib.parse.urlsplit(secret_url).password
        remember_secret(urllib.parse.unquote(raw) if raw else None)
    delay = first_delay_s
    started = time.monotonic()
    attempt = 0
    stop = stop or threading.Event()
    while not stop.is_set():
        attempt += 1
        try:
            return opener()
        except retry_on as exc:
            reason = mask_secrets(str(exc).splitlines()[0] if str(exc) else
                                  type(exc).__name__)
            left = None if give_up_after_s is None else \
                give_up_after_s - (time.monotonic() - started)
            if left is not None and left <= 0:
                log.error("%s: not reachable after %d tries (%s); giving up", what, attempt,
                          reason)
                return None
            wait = delay if left is None else min(delay, left)
            log.warning("%s: not reachable (try %d: %s); next try in %.3g s", what, attempt,
                        reason, wait)
            stop.wait(wait)
            delay = min(delay * 2, max_delay_s)
    return None


def site_jobs(site: Site, store: ResultsStore, source: ReadingsSource, notifiers: Sequence[Any]
              ) -> dict[str, Callable[[], None]]:
    """The jobs the daemon runs for *site*, by name: ingest (and the alarms on it),
    analyze, report, monthly, and notify where there are *notifiers*; each recorded in
    the store's job log (`monitor.app.operations.run_recorded`)."""
    from monitor.app.alarm_watch import ingest_and_watch
    from monitor.app.ingest import ingest
    from monitor.app.jobs import catch_up
    from monitor.app.monthly import write_monthly
    from monitor.app.monthly_view import previous_month
    from monitor.app.morning_report import write_report
    from monitor.app.notifications import deliver, queue_alarms, queue_digest
    from monitor.app.operations import run_recorded

    def ingest_job() -> None:
        watch = ingest_and_watch(site, store, source, run_ingest=lambda: run_recorded(
            store, "ingest", lambda: ingest(site, store, source)))
        if notifiers:
            queue_alarms(site, store, now=datetime.now(UTC))
        if watch.error is not None:
            raise watch.error  # counted as a failed run; the alarms were judged

    def analyze_job() -> None:
        run_recorded(store, "analyze",
                     lambda: catch_up(site, store, source, now=datetime.now(UTC)))

    reports_lock = threading.Lock()

    def report_job() -> None:
        now = datetime.now(UTC)
        day = now - timedelta(days=1)
        with reports_lock:
            path = run_recorded(store, "report", lambda: write_report(
                site, store, day=day, now=now))
        if notifiers:
            queue_digest(site, store, path, day=day, now=now)

    def notify_job() -> None:
        deliver(site, store, notifiers, now=datetime.now(UTC))

    def monthly_job() -> None:
        # the month before this one; then the morning report of yesterday again, so that
        # whichever of the two ran first on the 1st, it links to the new monthly report
        now = datetime.now(UTC)
        with reports_lock:
            run_recorded(store, "monthly", lambda: write_monthly(
                site, store, month=previous_month(site, now), generated=now))
            write_report(site, store, day=now - timedelta(days=1), now=now)

    jobs = {"ingest": ingest_job, "analyze": analyze_job, "report": report_job,
            "monthly": monthly_job}
    if notifiers:
        jobs["notify"] = notify_job
    return jobs


def site_daemon(site: Site, store: ResultsStore, source: ReadingsSource, *,
                health_file: Path | None = None) -> Daemon:
    """The daemon of *site* on its opened store and source: `site_jobs` with the
    notifiers of its ``[notify]`` section, the last good run of each job from the store's
    job log, and the heartbeat in *health_file* (default: ``branchwatch-health.json`` in
    the report folder)."""
    from monitor.app.notifications import build_notifiers

    notifiers = build_notifiers(site)
    health = health_file or site.report_folder / "branchwatch-health.json"
    return Daemon(site, site_jobs(site, store, source, notifiers), health_file=health,
                  last_ok=last_ok_run(store))


def last_ok_run(store: ResultsStore) -> Callable[[str], datetime | None]:
    """For `Daemon`'s *last_ok*: when a job last ran to its end without failing."""
    import pandas as pd

    def last_ok(job: str) -> datetime | None:
        runs = store.job_runs(limit=50, job=job)
        ok = runs[runs["status"] == "ok"] if not runs.empty else runs
        return None if ok.empty else pd.Timestamp(ok["started"].max()).to_pydatetime()

    return last_ok
