"""Analysis windows on the site's clock: the local days, or the divisions of a day, that
an analysis fits (`windows`), and the stored fits of the present ``[analysis] window``
size (`current_fits`).
"""

from __future__ import annotations

import logging
from collections.abc import Iterator
from datetime import UTC, date, datetime, timedelta
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd

from monitor.site.config import Site
from monitor.site.site_sections import DAY_S, window_problem

log = logging.getLogger(__name__)

__all__ = [
    "current_fits",
    "window_length_ok",
    "windows",
]


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
