"""Window alignment: every window in one local day, starting at the site's local midnight.

The rule (`monitor.app.windows.windows`): sub-day windows must divide 24 h; they start at local
midnight and follow at their size in elapsed time; a day that is not a whole number of
windows long (a DST change day) has its last window cut at the next local midnight. The
zone offsets and DST dates are those of the IANA tz database that zoneinfo reads
(Asia/Kolkata +05:30 all year; Australia/Adelaide +09:30/+10:30, changing on the first
Sundays of April and October; Australia/Lord_Howe +10:30/+11, a 30-minute change;
Europe/Berlin on the last Sundays of March and October).
"""

from __future__ import annotations

import tomllib
from datetime import UTC, datetime, timedelta
from itertools import pairwise
from zoneinfo import ZoneInfo

import pandas as pd
import pytest

from monitor.app.windows import current_fits, windows
from monitor.site.config import ConfigError, parse_site
from tests.monitor.rig_recording import site_toml

ZONES = ("UTC", "Asia/Kolkata", "Australia/Adelaide", "Australia/Lord_Howe",
         "Europe/Berlin", "Asia/Kathmandu", "America/Santiago")
SIZES = (timedelta(minutes=1), timedelta(minutes=45), timedelta(hours=1),
         timedelta(hours=2), timedelta(hours=8), timedelta(days=1))


def _span(zone: str) -> tuple[datetime, datetime]:
    """A fortnight around each zone's 2026 clock change (or any fortnight in UTC)."""
    around = {"Australia/Adelaide": datetime(2026, 4, 5), "Australia/Lord_Howe":
              datetime(2026, 4, 5), "Europe/Berlin": datetime(2026, 3, 29),
              "America/Santiago": datetime(2026, 4, 5)}.get(zone, datetime(2026, 3, 29))
    t = around.replace(tzinfo=UTC)
    return t - timedelta(days=3, minutes=17), t + timedelta(days=3, hours=5)


@pytest.mark.parametrize("zone", ZONES)
@pytest.mark.parametrize("size", SIZES, ids=str)
def test_windows_tile_the_local_days_without_gap_or_overlap(zone: str,
                                                            size: timedelta) -> None:
    start, end = _span(zone)
    if size >= timedelta(hours=8) and zone != "UTC":
        start -= timedelta(days=4)  # a few whole windows either side of the change
    ws = list(windows(start, end, size, zone))
    assert ws and ws[0][0] >= start and ws[-1][1] <= end
    tz = ZoneInfo(zone)
    for (_, b), (c, _) in pairwise(ws):
        assert b == c  # each window ends where the next begins: none doubled or skipped
    for a, b in ws:
        local_a, local_b = a.astimezone(tz), b.astimezone(tz)
        midnight = datetime.combine(local_a.date(), datetime.min.time(), tz).astimezone(UTC)
        assert (a - midnight) % size == timedelta(0)  # k windows after local midnight
        assert timedelta(0) < b - a <= size + timedelta(hours=1)
        if b - a != size and size < timedelta(days=1):  # only a day's last window is cut
            assert local_b.time() == datetime.min.time() or (
                local_b.date() > local_a.date())
    # the first window after the start is not missed either
    assert ws[0][0] - start < size + timedelta(hours=1)


def test_half_hour_zones_get_windows_on_their_own_whole_hours() -> None:
    start = datetime(2026, 6, 1, tzinfo=UTC)
    for zone in ("Asia/Kolkata", "Australia/Adelaide"):
        ws = list(windows(start, start + timedelta(days=1), timedelta(hours=1), zone))
        assert {a.astimezone(ZoneInfo(zone)).minute for a, _ in ws} == {0}


def test_a_dst_day_has_its_last_window_cut_and_no_double() -> None:
    # Europe/Berlin, 2026-10-25: 25 hours; 2-hour windows: 12 whole and one of 1 h
    tz = ZoneInfo("Europe/Berlin")
    day = datetime(2026, 10, 25, tzinfo=tz).astimezone(UTC)
    nxt = datetime(2026, 10, 26, tzinfo=tz).astimezone(UTC)
    ws = list(windows(day, nxt, timedelta(hours=2), "Europe/Berlin"))
    assert [(b - a) / timedelta(hours=1) for a, b in ws] == [2.0] * 12 + [1.0]
    ones = list(windows(day, nxt, timedelta(hours=1), "Europe/Berlin"))
    assert len(ones) == 25 and len({a for a, _ in ones}) == 25


def test_resuming_after_the_last_window_gives_the_same_windows() -> None:
    # what catch_up does: analyse to some point, then resume from the last window's end
    start, end = _span("Australia/Lord_Howe")
    size = timedelta(hours=2)
    whole = list(windows(start, end, size, "Australia/Lord_Howe"))
    for cut in (start + timedelta(days=2, minutes=7), start + timedelta(days=3, hours=5)):
        first = list(windows(start, cut, size, "Australia/Lord_Howe"))
        rest = list(windows(first[-1][1], end, size, "Australia/Lord_Howe"))
        assert first + rest == whole


def test_cut_windows_count_as_the_present_size() -> None:
    site = parse_site(tomllib.loads(
        site_toml(window="2 h").replace('"Europe/Vienna"', '"Europe/Berlin"')), path="r.toml")
    tz = ZoneInfo("Europe/Berlin")
    ws = list(windows(datetime(2026, 10, 25, tzinfo=tz).astimezone(UTC),
                      datetime(2026, 10, 26, tzinfo=tz).astimezone(UTC), site.window,
                      site.timezone))
    one_hour = (ws[0][0], ws[0][0] + timedelta(hours=1))  # an old 1-h window: not kept
    rows = [*ws, one_hour]
    fits = pd.DataFrame({"branch": "loop A", "window_start": [a for a, _ in rows],
                         "window_end": [b for _, b in rows]})
    kept = current_fits(site, fits)
    assert len(kept) == len(ws) == 13


@pytest.mark.parametrize("window", ["7 min", "25 h", "11 min", "1.5 days"])
def test_a_window_that_does_not_divide_a_day_is_refused_in_one_line(window: str) -> None:
    with pytest.raises(ConfigError) as err:
        parse_site(tomllib.loads(site_toml(window=window)), path="rig.toml")
    text = str(err.value)
    assert "\n" not in text
    assert "analysis.window" in text and "divides 24 h" in text


def test_windows_refuses_a_size_that_does_not_divide_a_day() -> None:
    with pytest.raises(ValueError, match="does not divide 24 h"):
        list(windows(datetime(2026, 1, 1, tzinfo=UTC), datetime(2026, 1, 2, tzinfo=UTC),
                     timedelta(minutes=7), "UTC"))
