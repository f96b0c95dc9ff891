"""The morning report of a site-local day, written from the store into the report folder
(`write_report`; `monitor.app.report` builds the page).
"""

from __future__ import annotations

import logging
from contextlib import suppress
from datetime import datetime, timedelta
from pathlib import Path

import pandas as pd

from adapters.base import ResultsStore
from monitor.app.alarm_points import stale_after
from monitor.app.alarm_watch import newest_readings
from monitor.app.windows import current_fits
from monitor.site.config import Site

log = logging.getLogger(__name__)

__all__ = [
    "ReportWriteError",
    "write_report",
]


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
    from monitor.app.monthly import latest_monthly
    from monitor.app.report import ReportInputs, build_report, history_start, report_day_bounds

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
