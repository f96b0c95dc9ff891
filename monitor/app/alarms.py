"""Near-real-time alarms with the ISA-18.2 / IEC 62682 alarm life cycle.

Five conditions, each its own alarm: **low flow** per branch, **frozen** transmitter per
flow and pressure tag, **stale data** (communication loss) per tag and per source, the
high-priority **back-flow hazard** per branch without a check valve (the header below the
branch's static back-pressure, `evaluate_backflow`) and, where enabled, the **flow drop**
of a branch against its own recent level (`evaluate_flow_drop`: flow only, no model).
The checks run on every ingest — independent of the daily fit, and the stale-data check
also when the ingest failed, which is when it matters. Everything here is a pure
function of its inputs: the caller keeps the `AlarmState` (in the results store) and
passes it back in with the next samples.

This module holds what every alarm shares: the state and journal types, the life cycle
and the operator's actions on it, the loop over new samples, and the words of the
messages. The evaluators live beside it: `monitor.app.alarm_process` (low flow, flow drop,
back-flow hazard), `monitor.app.alarm_instruments` (frozen meter, stale data);
`monitor.app.alarm_rates` computes the EEMUA 191 figures of a journal.

Life cycle (ISA-18.2 state names)::

    NORMAL ──condition true (after on-delay)──▶ UNACK ──acknowledge──▶ ACK
      ▲                                          │                      │
      │                      condition clears (after off-delay)   condition clears
      │                                          ▼                      │
      └──────────acknowledge──────────────── RTN_UNACK                  │
      └─────────────────────────────────────────────────────────────────┘
    any ──shelve(until)──▶ SHELVED ──expiry / unshelve──▶ UNACK (if active) or NORMAL
    any ──remove_from_service──▶ OUT_OF_SERVICE ──return_to_service──▶ NORMAL

A *latching* alarm does not return by itself: once the condition clears it stays UNACK
or ACK until an operator acknowledges and `reset` s it.
"""

from __future__ import annotations

import dataclasses
import logging
import math
from collections.abc import Callable
from dataclasses import dataclass
from datetime import datetime, timedelta
from typing import Literal

import pandas as pd

from adapters.records import AlarmStateName
from adapters.units import from_si

__all__ = [
    "AlarmEvent",
    "AlarmState",
    "State",
    "acknowledge",
    "describe_condition",
    "format_age",
    "format_pair",
    "priority_of",
    "remove_from_service",
    "reset",
    "return_to_service",
    "shelve",
    "unshelve",
]

logger = logging.getLogger(__name__)


#: The ISA-18.2 alarm states (defined once, beside the results store's interface, which
#: keeps them).
State = AlarmStateName


@dataclass(frozen=True)
class AlarmState:
    """Everything the alarm remembers between ingests.

    ``active`` is the debounced process condition; ``state`` the annunciation state.
    ``pending_since``/``clear_since`` run the on- and off-delays; ``last_sample`` makes a
    re-ingest of the same samples change nothing.
    """

    branch: str
    condition: str = "low_flow"
    state: State = State.NORMAL
    active: bool = False
    pending_since: datetime | None = None
    clear_since: datetime | None = None
    last_sample: datetime | None = None
    activated_at: datetime | None = None
    acknowledged_at: datetime | None = None
    acknowledged_by: str = ""
    shelved_until: datetime | None = None
    last_value: float = math.nan
    message: str = ""


@dataclass(frozen=True)
class AlarmEvent:
    """One entry of the alarm journal."""

    time: datetime
    branch: str
    condition: str
    action: str  # activated, returned, acknowledged, shelved, unshelved, reset,
    #              removed_from_service, returned_to_service
    state: State  # the state after the action
    value: float = math.nan
    message: str = ""
    by: str = ""


def _event(s: AlarmState, t: datetime, action: str, by: str = "") -> AlarmEvent:
    return AlarmEvent(t, s.branch, s.condition, action, s.state, s.last_value, s.message, by)


def format_pair(value: float, limit: float, *, digits: int = 1, most: int = 6) -> tuple[str, str]:
    """*value* and *limit* with the fewest decimals (at least *digits*) that keep the
    comparison between them as it is: a value below the limit never reads equal to or
    above it after rounding.

    >>> format_pair(31.5, 30.0), format_pair(29.96, 30.0)
    (('31.5', '30.0'), ('29.96', '30.00'))
    """
    for d in range(digits, most + 1):
        a, b = f"{value:.{d}f}", f"{limit:.{d}f}"
        if (float(a) < float(b)) == (value < limit) and (float(a) > float(b)) == (value > limit):
            return a, b
    return f"{value:.{most}f}", f"{limit:.{most}f}"


def in_unit(value_si: float, unit: str, kind: str) -> float:
    """An SI value in the tag's own unit (the identity when the unit is SI already)."""
    return float(from_si(value_si, unit, kind))


def site_time(t: datetime, timezone: str) -> str:
    """A time as the site reads it: '2026-03-04 02:40 site time' in the site's zone."""
    return f"{pd.Timestamp(t).tz_convert(timezone):%Y-%m-%d %H:%M} site time"


#: Alarm priority per condition (ISA-18.2 priorities: what an operator answers first).
#: Back-flow can contaminate the supply: high. Low flow overheats equipment: high too
#: when it lasts, but the tool advises and its limit is an engineering minimum: medium.
#: A flow drop against the branch's own level: medium, as low flow.
#: Instrument and communication alarms: low (our choice).
PRIORITIES: dict[str, str] = {"backflow": "high", "low_flow": "medium", "flow_drop": "medium"}


def priority_of(condition: str) -> str:
    """'high', 'medium' or 'low' for an alarm condition (see `PRIORITIES`)."""
    return PRIORITIES.get(condition, "low")


def annunciate_on(s: AlarmState, t: datetime, message: str) -> tuple[AlarmState, list[AlarmEvent]]:
    """The condition became active at *t*: annunciated (unacknowledged, with an
    "activated" journal entry) unless the alarm is shelved."""
    s = dataclasses.replace(s, active=True, pending_since=None, activated_at=t, message=message)
    if s.state in (State.NORMAL, State.RTN_UNACK):
        s = dataclasses.replace(s, state=State.UNACK, acknowledged_at=None, acknowledged_by="")
        return s, [_event(s, t, "activated")]
    return s, []  # shelved: tracked, not annunciated


def annunciate_off(
    s: AlarmState, t: datetime, latching: bool, message: str = ""
) -> tuple[AlarmState, list[AlarmEvent]]:
    """The condition cleared: *message* says so (it replaces the activation text, which
    it should quote where that helps; the journal's "returned" entry carries it)."""
    s = dataclasses.replace(s, active=False, clear_since=None, message=message or s.message)
    if latching or s.state == State.SHELVED:
        return s, []
    if s.state == State.UNACK:
        s = dataclasses.replace(s, state=State.RTN_UNACK)
        return s, [_event(s, t, "returned")]
    if s.state == State.ACK:
        s = dataclasses.replace(s, state=State.NORMAL)
        return s, [_event(s, t, "returned")]
    return s, []


def expire_shelf(s: AlarmState, t: datetime) -> tuple[AlarmState, list[AlarmEvent]]:
    """A shelved alarm whose shelf time has run out by *t*, unshelved at that time."""
    if s.state == State.SHELVED and s.shelved_until is not None and t >= s.shelved_until:
        return unshelve(s, now=s.shelved_until)
    return s, []


def _new_samples(
    series: pd.Series, state: AlarmState, now: datetime
) -> tuple[pd.Series, pd.Timestamp]:
    """The samples of *series* not yet judged: after ``state.last_sample``, up to *now*,
    not NaN, in time order, indexed in UTC; and *now* as a timestamp.

    The input checks every sample-driven alarm shares: a Series on aware times and an
    aware *now*.
    """
    if not isinstance(series, pd.Series):
        raise TypeError(f"series must be a pandas Series, got {type(series).__name__}")
    index = pd.DatetimeIndex(series.index)
    if index.tz is None:
        raise ValueError("series must be indexed by timezone-aware (UTC) times")
    t_now = require_aware(now, "now")
    data = pd.Series(series.to_numpy(dtype=float), index=index.tz_convert("UTC")).sort_index()
    if state.last_sample is not None:
        data = data[data.index > pd.Timestamp(state.last_sample)]
    return data[(data.index <= t_now) & data.notna()], t_now


def at_times(mask: pd.Series | None, index: pd.DatetimeIndex) -> list[bool]:
    """*mask* (bool, on UTC times) looked up at *index*: the newest mask value at or
    before each time; False where there is none (or no mask)."""
    if mask is None or mask.empty or len(index) == 0:
        return [False] * len(index)
    m = pd.Series(mask.to_numpy(dtype=bool), index=pd.DatetimeIndex(mask.index).tz_convert("UTC"))
    m = m[~m.index.duplicated(keep="last")].sort_index()
    return [bool(x) for x in m.reindex(index, method="ffill").fillna(False).to_numpy(dtype=bool)]


def require_aware(when: datetime, name: str) -> pd.Timestamp:
    """*when* as a timestamp; a naive time is a `ValueError` naming the argument *name*."""
    t = pd.Timestamp(when)
    if t.tzinfo is None:
        raise ValueError(f"{name} must be timezone-aware (UTC), got {when!r}")
    return t


def delay_held(s: AlarmState, t: datetime, mark: Literal["pending_since", "clear_since"],
          delay: timedelta) -> tuple[AlarmState, datetime, bool]:
    """An on- or off-delay at sample time *t*: the state with *mark* set (kept when it
    was), since when the condition has held, and whether *delay* has passed."""
    if mark == "pending_since":
        since = s.pending_since or t
        s = dataclasses.replace(s, pending_since=since)
    else:
        since = s.clear_since or t
        s = dataclasses.replace(s, clear_since=since)
    return s, since, t - since >= delay


#: One judged sample: the state before it, its time, its value and its flag (see
#: `judge_samples`); returns the state after it and the events it caused.
SampleStep = Callable[[AlarmState, datetime, float, bool], tuple[AlarmState, list[AlarmEvent]]]


def judge_samples(
    series: pd.Series, state: AlarmState, now: datetime, step: SampleStep, *,
    max_gap: timedelta | None = None, out_of_service_clears_pending: bool = False,
    flags: pd.Series | None = None,
) -> tuple[AlarmState, list[AlarmEvent]]:
    """The loop every sample-driven alarm shares, around its own *step*.

    Takes the new samples of *series* (`_new_samples`: the input checks), and for each:
    ends an expired shelf; out of service, only notes the sample (and forgets a pending
    run with *out_of_service_clears_pending*); after a gap longer than *max_gap* restarts
    the delays; then calls *step* with the sample's flag: *flags* (bool, on UTC times,
    e.g. "the branch cannot flow") at the sample's time (`at_times`). A shelf that
    expires by *now* ends too. Returns the state and the events in time order.
    """
    data, t_now = _new_samples(series, state, now)
    marks = at_times(flags, pd.DatetimeIndex(data.index))
    s, events = state, []
    for ts, v, flag in zip(data.index, data.to_numpy(), marks, strict=True):
        t = ts.to_pydatetime()
        value = float(v)
        s, ev = expire_shelf(s, t)
        events += ev
        if s.state == State.OUT_OF_SERVICE:
            s = dataclasses.replace(s, last_sample=t, last_value=value)
            if out_of_service_clears_pending:
                s = dataclasses.replace(s, pending_since=None)
            continue
        if max_gap is not None and s.last_sample is not None and t - s.last_sample > max_gap:
            s = dataclasses.replace(s, pending_since=None, clear_since=None)
        s, ev = step(s, t, value, flag)
        events += ev
    s, ev = expire_shelf(s, t_now.to_pydatetime())
    return s, events + ev


def format_age(seconds: float) -> str:
    """An age as a person says it: '45 s', '12 min', '3 h 10 min', '95 d 4 h'.

    >>> format_age(3 * 3600 + 10 * 60 + 20), format_age(95 * 86400 + 4 * 3600 + 59)
    ('3 h 10 min', '95 d 4 h')
    """
    if not math.isfinite(seconds):
        return "unknown age"
    s = max(int(seconds), 0)
    days, rest = divmod(s, 86_400)
    hours, rest = divmod(rest, 3600)
    minutes, secs = divmod(rest, 60)
    if days:
        return f"{days} d {hours} h" if hours else f"{days} d"
    if hours:
        return f"{hours} h {minutes} min" if minutes else f"{hours} h"
    return f"{minutes} min" if minutes else f"{secs} s"


def describe_condition(branch: str, condition: str) -> str:
    """Which alarm, in words: 'low flow on B2', 'frozen PT-100', 'stale FT-203',
    'stale source (no tag has fresh data)'."""
    if condition == "low_flow":
        return f"low flow on {branch}"
    if condition == "backflow":
        return f"back-flow hazard on {branch}"
    if condition == "flow_drop":
        return f"flow drop on {branch}"
    if condition == "stale source":
        return "stale source (no tag has fresh data)"
    return condition.replace("_", " ")


def acknowledge(state: AlarmState, now: datetime, by: str) -> tuple[AlarmState, list[AlarmEvent]]:
    """Operator acknowledges: UNACK → ACK, RTN_UNACK → NORMAL; otherwise nothing."""
    if state.state == State.UNACK:
        s = dataclasses.replace(state, state=State.ACK, acknowledged_at=now, acknowledged_by=by)
    elif state.state == State.RTN_UNACK:
        s = dataclasses.replace(state, state=State.NORMAL, acknowledged_at=now, acknowledged_by=by)
    else:
        return state, []
    return s, [_event(s, now, "acknowledged", by)]


def reset(state: AlarmState, now: datetime, by: str) -> tuple[AlarmState, list[AlarmEvent]]:
    """Reset a latched alarm whose condition has cleared and which was acknowledged."""
    if state.state == State.ACK and not state.active:
        s = dataclasses.replace(state, state=State.NORMAL)
        return s, [_event(s, now, "reset", by)]
    return state, []


def shelve(
    state: AlarmState, until: datetime, *, now: datetime, by: str = ""
) -> tuple[AlarmState, list[AlarmEvent]]:
    """Shelve the alarm until ``until`` (UTC): annunciation stops, tracking goes on."""
    if until <= now:
        raise ValueError(f"until must be after now ({now.isoformat()}), got {until.isoformat()}")
    if state.state == State.OUT_OF_SERVICE:
        return state, []
    s = dataclasses.replace(state, state=State.SHELVED, shelved_until=until)
    return s, [_event(s, now, "shelved", by)]


def unshelve(
    state: AlarmState, *, now: datetime, by: str = ""
) -> tuple[AlarmState, list[AlarmEvent]]:
    """End a shelf: an active condition comes back unacknowledged."""
    if state.state != State.SHELVED:
        return state, []
    new = State.UNACK if state.active else State.NORMAL
    s = dataclasses.replace(state, state=new, shelved_until=None)
    return s, [_event(s, now, "unshelved", by)]


def remove_from_service(
    state: AlarmState, *, now: datetime, by: str = ""
) -> tuple[AlarmState, list[AlarmEvent]]:
    """Take the alarm out of service (maintenance): no tracking, no annunciation."""
    s = dataclasses.replace(
        state, state=State.OUT_OF_SERVICE, active=False, pending_since=None,
        clear_since=None, shelved_until=None,
    )  # fmt: skip
    return s, [_event(s, now, "removed_from_service", by)]


def return_to_service(
    state: AlarmState, *, now: datetime, by: str = ""
) -> tuple[AlarmState, list[AlarmEvent]]:
    """Back in service, NORMAL: the next samples are judged afresh (with the on-delay)."""
    if state.state != State.OUT_OF_SERVICE:
        return state, []
    s = dataclasses.replace(state, state=State.NORMAL, active=False)
    return s, [_event(s, now, "returned_to_service", by)]
