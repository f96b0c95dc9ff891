"""The daemon: APScheduler 3.x wiring around the jobs in `monitor.jobs`.

Three jobs, each an idempotent function of (site, store, source, time):

* ``ingest``  every ``schedule.ingest_every`` (default 15 min): new readings in, low-flow
  alarms evaluated on what arrived;
* ``analyze`` daily at ``schedule.analyze_at`` site time: fit the windows that closed
  since the last run (catching up after downtime), diagnose, store findings;
* ``report``  daily at ``schedule.report_at`` site time: the morning report.

APScheduler pitfalls handled here (its user guide and issue tracker): every job has an
explicit id and ``replace_existing=True``, so a restart does not add copies;
``misfire_grace_time`` is set (the default of 1 s silently skips late runs) and
``coalesce=True`` folds a backlog of missed runs into one; one scheduler per process and
no persistent job store (the schedule is rebuilt from the site file at each start). The
daily jobs run in the site's zone, outside 01:00–04:00 (config validation refuses that
band), and are idempotent on their date, so a DST change cannot double or drop a day.

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
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from types import FrameType
from typing import Any

from apscheduler.events import EVENT_JOB_ERROR, EVENT_JOB_EXECUTED, EVENT_JOB_MISSED, JobEvent
from apscheduler.schedulers.background import BackgroundScheduler
from apscheduler.triggers.cron import CronTrigger
from apscheduler.triggers.interval import IntervalTrigger

from monitor.config import Site

log = logging.getLogger(__name__)

__all__ = ["Daemon", "DaemonStats"]

MISFIRE_GRACE_S = 3600  # a daily job up to an hour late still runs (e.g. after a reboot)


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

    *jobs* maps a job id to a zero-argument callable (the CLI binds site, store and source
    into them), which keeps this class free of any knowledge of data or physics.
    """

    def __init__(
        self, site: Site, jobs: dict[str, Callable[[], Any]], *, health_file: Path | None = None
    ) -> None:
        self.site = site
        self.jobs = jobs
        self.health_file = health_file
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
        triggers: dict[str, Any] = {
            "ingest": IntervalTrigger(seconds=max(10, int(sched.ingest_every))),
            "analyze": _daily(sched.analyze_at, self.site.timezone),
            "report": _daily(sched.report_at, self.site.timezone),
        }
        for job_id, func in self.jobs.items():
            trigger = triggers.get(job_id)
            if trigger is None:
                raise ValueError(f"no schedule for job {job_id!r}; known: {sorted(triggers)}")
            extra: dict[str, Any] = {}
            if job_id == "ingest":
                extra["next_run_time"] = datetime.now(UTC)  # catch up at once on start
            # (never pass next_run_time=None: APScheduler takes that as "paused")
            self.scheduler.add_job(
                func, trigger, id=job_id, name=job_id, replace_existing=True, **extra
            )
        log.info("scheduled %s for site %r", ", ".join(self.jobs), self.site.name)

    def run(self, *, duration_s: float | None = None) -> DaemonStats:
        """Run until SIGTERM/SIGINT (or *duration_s* seconds, for tests and trials)."""
        self._install_signals()
        self.scheduler.start(paused=True)
        self.schedule()
        self.scheduler.resume()
        for job in self.scheduler.get_jobs():
            log.info("job %s: next run %s", job.id, job.next_run_time)
        deadline = None if duration_s is None else time.monotonic() + duration_s
        try:
            while not self._stop.is_set():
                self._write_health()
                left = None if deadline is None else deadline - time.monotonic()
                if left is not None and left <= 0:
                    break
                self._stop.wait(5.0 if left is None else min(5.0, left))
        finally:
            log.info("stopping: waiting for the running job to finish")
            self.scheduler.shutdown(wait=True)
            self._write_health()
        return self.stats

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
        now = datetime.now(UTC).isoformat()
        if event.code == EVENT_JOB_MISSED:
            s.missed[job] = s.missed.get(job, 0) + 1
            log.warning("job %s missed its run time %s", job, event.scheduled_run_time)
            return
        s.runs[job] = s.runs.get(job, 0) + 1
        exc = getattr(event, "exception", None)
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
                for j in self.scheduler.get_jobs()} if self.scheduler.running else {}
        payload = {"site": self.site.name, "written": datetime.now(UTC).isoformat(),
                   "next_runs": jobs, **self.stats.__dict__}
        tmp = self.health_file.with_suffix(".tmp")
        tmp.parent.mkdir(parents=True, exist_ok=True)
        tmp.write_text(json.dumps(payload, indent=2))
        tmp.replace(self.health_file)


def _daily(clock: str, timezone: str) -> CronTrigger:
    hour, minute = (int(x) for x in clock.split(":"))
    return CronTrigger(hour=hour, minute=minute, timezone=timezone)
