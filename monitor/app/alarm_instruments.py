"""The instrument and communication alarms: the **frozen** transmitter per flow and
pressure tag (`evaluate_frozen`) and **stale data** (communication loss) per tag and per
source (`evaluate_stale`), on the life cycle of `monitor.app.alarms`. The stale-data check
runs also when the ingest failed, which is when it matters.

The stale-data alarm has no on-delay (its age limit is the delay) and an off-delay
that defaults to zero: it is judged once per ingest, and fresh data stays fresh for the
whole age limit, so it cannot chatter faster than that.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass
from datetime import datetime, timedelta

import pandas as pd

from monitor.app.alarms import (
    AlarmEvent,
    AlarmState,
    State,
    annunciate_off,
    annunciate_on,
    expire_shelf,
    format_age,
    in_unit,
    judge_samples,
    require_aware,
    site_time,
)

__all__ = [
    "FrozenSettings",
    "StaleSettings",
    "evaluate_frozen",
    "evaluate_stale",
]


@dataclass(frozen=True)
class FrozenSettings:
    """Frozen-meter alarm settings of one tag.

    hold : how long the reading may stay exactly the same before the meter counts as
        frozen [s]; a live flow or pressure transmitter always wanders by a few counts
    tolerance : a change of at most this much counts as "the same" [SI]
    ignore_zero : a reading of exactly zero is not judged (magnetic flow meters cut low
        flows to zero on purpose: common practice)
    """

    hold: timedelta = timedelta(hours=1)
    tolerance: float = 0.0
    ignore_zero: bool = True

    def __post_init__(self) -> None:
        if self.hold <= timedelta(0):
            raise ValueError(f"hold must be positive, got {self.hold}")
        if not self.tolerance >= 0:
            raise ValueError(f"tolerance must be >= 0, got {self.tolerance}")


def evaluate_frozen(
    series: pd.Series,
    state: AlarmState,
    settings: FrozenSettings,
    now: datetime,
    *,
    tag: str,
    unit_label: str = "",
    scale: float = 1.0,
    kind: str | None = None,
    timezone: str = "UTC",
    no_flow: pd.Series | None = None,
    near_zero: float = 0.0,
) -> tuple[AlarmState, list[AlarmEvent]]:
    """Run the frozen-meter check over new samples of one tag (near real time).

    The alarm comes on once the reading has not changed by more than the tolerance for
    ``settings.hold``, and returns to normal at the first sample that moves. The state
    keeps the held value (``last_value``) and since when it has been held
    (``pending_since``), so the check carries over from one ingest to the next. Same
    life cycle as `evaluate_low_flow`; *scale* and *unit_label* only shape the message
    (e.g. 3600 and "m3/h" for a flow in m³/s); with *kind* (``flow``, ``pressure``…) the
    value is converted from SI to *unit_label* by the unit library instead. *timezone*:
    the site's zone, for the time in the message.

    *no_flow* (flow meters): True at the times the branch cannot flow (the header at or
    below its threshold pressure). A reading there within *near_zero* [SI] of zero is what
    a healthy meter shows, so those samples are not judged: they end a held run instead of
    lengthening it, as a moving reading would.
    """
    def shown(v: float) -> str:
        shown_v = in_unit(v, unit_label, kind) if kind is not None else v * scale
        return f"{shown_v:.4g}"

    def step(s: AlarmState, t: datetime, v: float, resting: bool
             ) -> tuple[AlarmState, list[AlarmEvent]]:
        rest = resting and abs(v) <= near_zero
        held = (
            not rest
            and s.last_sample is not None
            and math.isfinite(s.last_value)
            and abs(v - s.last_value) <= settings.tolerance
            and not (settings.ignore_zero and v == 0.0)
        )
        if not held:
            s = dataclasses.replace(s, last_sample=t, last_value=v, pending_since=None)
            if not s.active:
                return s, []
            why = ("the branch cannot flow now and the meter rests near zero" if rest
                   else f"it reads {shown(v)} {unit_label}".replace("  ", " "))
            return annunciate_off(s, t, False, f"{tag} on {s.branch} is no longer held at "
                                   f"{site_time(t, timezone)}: {why}")
        since = s.pending_since or s.last_sample
        s = dataclasses.replace(s, last_sample=t, pending_since=since)
        if s.active or since is None or t - since < settings.hold:
            return s, []
        return annunciate_on(s, t, (
            f"{tag} on {s.branch} has read exactly {shown(v)} {unit_label} since "
            f"{site_time(since, timezone)}: the transmitter looks frozen; check it "
            "before trusting this reading").replace("  ", " "))

    return judge_samples(series, state, now, step, out_of_service_clears_pending=True,
                          flags=no_flow)


@dataclass(frozen=True)
class StaleSettings:
    """Data-freshness (communication loss) alarm settings.

    stale_after : a tag whose newest reading is older than this is stale [s]
    off_delay : how long the data must have been fresh again, judged at successive
        evaluations, before the alarm returns [s] (default 0: see the module notes)
    """

    stale_after: timedelta
    off_delay: timedelta = timedelta(0)

    def __post_init__(self) -> None:
        if self.stale_after <= timedelta(0):
            raise ValueError(f"stale_after must be positive, got {self.stale_after}")
        if self.off_delay < timedelta(0):
            raise ValueError(f"off_delay must not be negative, got {self.off_delay}")


def evaluate_stale(
    newest: datetime | None,
    state: AlarmState,
    settings: StaleSettings,
    now: datetime,
    *,
    subject: str,
    timezone: str = "UTC",
) -> tuple[AlarmState, list[AlarmEvent]]:
    """Judge the age of the newest reading at *now* (one evaluation per ingest).

    Parameters
    ----------
    newest : time of the newest reading known of the tag (or of any tag of the source);
        None when none is known. The state keeps the newest seen (``last_sample``), so a
        store or source that cannot be read now still ages the data it delivered before.
    state : the alarm's state after the previous call
    settings : age limit and off-delay
    now : evaluation time (UTC)
    subject : what the message names, e.g. "FT-203 (CW-3)" or "source csv:inbox"
    timezone : the site's zone, for the time in the message

    The condition is ``now - newest > stale_after`` (or nothing ever read); it comes on at
    once (no on-delay: the age limit is the delay) and clears after ``off_delay`` of fresh
    data. ``last_value`` holds the age [s] (NaN when nothing was ever read).
    """
    t_now = require_aware(now, "now").to_pydatetime()
    known = state.last_sample
    if newest is not None:
        t_new = require_aware(newest, "newest").to_pydatetime()
        known = t_new if known is None else max(known, t_new)
    age = (t_now - known) if known is not None else None
    s, events = expire_shelf(state, t_now)
    s = dataclasses.replace(
        s, last_sample=known, last_value=math.nan if age is None else age.total_seconds()
    )
    if s.state == State.OUT_OF_SERVICE:
        return s, events
    stale = age is None or age > settings.stale_after
    if stale:
        s = dataclasses.replace(s, clear_since=None)
        if not s.active:
            s, ev = annunciate_on(s, t_now, _stale_message(subject, known, age, settings,
                                                            timezone))
            events += ev
        return s, events
    if s.active:
        since = s.clear_since or t_now
        s = dataclasses.replace(s, clear_since=since)
        if t_now - since >= settings.off_delay:
            assert known is not None and age is not None  # not stale: data is known
            msg = (f"Data from {subject} fresh again at {site_time(t_now, timezone)}: the "
                   f"newest reading is {format_age(age.total_seconds())} old, within the "
                   f"{format_age(settings.stale_after.total_seconds())} allowed")
            s, ev = annunciate_off(s, t_now, False, msg)
            events += ev
    return s, events


def _stale_message(
    subject: str, known: datetime | None, age: timedelta | None, settings: StaleSettings,
    timezone: str,
) -> str:
    limit = format_age(settings.stale_after.total_seconds())
    if known is None or age is None:
        return (f"No data from {subject} yet: nothing read since this check began (limit "
                f"{limit}); check that the historian export or database link delivers it")
    local = pd.Timestamp(known).tz_convert(timezone)
    return (f"No new data from {subject} since {local:%Y-%m-%d %H:%M} site time: "
            f"{format_age(age.total_seconds())} old, more than the {limit} allowed, and the "
            "low-flow and frozen-meter checks see nothing after it: check the historian "
            "export or database link")
