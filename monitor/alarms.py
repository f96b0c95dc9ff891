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

Chattering is kept down by a deadband (the condition clears only above
``min_flow + deadband·range``), an on-delay and an off-delay, and by annunciating one
alarm per condition, not one per sample. Defaults from memory of the ISA-18.2 tables
(REFERENCES.md): flow deadband 5 % of range, delays 15 s. Historian data often comes
every minute, so with the default delays a condition must be seen on two consecutive
samples; set the delays to suit the site's logging interval.

The stale-data alarm has no on-delay (its age limit is the delay) and an off-delay
that defaults to zero: it is judged once per ingest, and fresh data stays fresh for the
whole age limit, so it cannot chatter faster than that.

`alarm_rate_summary` computes the EEMUA 191 figures of an event log: floods (> 10
alarms in 10 min), chattering alarms (3 activations within 1 min) and stale alarms
(active > 24 h).
"""

from __future__ import annotations

import dataclasses
import logging
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from datetime import datetime, timedelta
from typing import Literal

import numpy as np
import pandas as pd

from adapters.base import AlarmStateName
from adapters.units import from_si
from monitor.diagnose import Finding

__all__ = [
    "AlarmEvent",
    "AlarmRateSummary",
    "AlarmState",
    "BackflowAlarmSettings",
    "FlowDropSettings",
    "FrozenSettings",
    "LowFlowSettings",
    "StaleSettings",
    "State",
    "acknowledge",
    "alarm_rate_summary",
    "describe_condition",
    "evaluate_backflow",
    "evaluate_flow_drop",
    "evaluate_frozen",
    "evaluate_low_flow",
    "evaluate_stale",
    "flow_level",
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

#: EEMUA 191 figures (REFERENCES.md): a flood is more than 10 alarms in 10 min; an alarm
#: that activates 3 times within a minute is chattering; in alarm over 24 h is stale.
FLOOD_COUNT = 10
FLOOD_WINDOW = timedelta(minutes=10)
CHATTER_COUNT = 3
CHATTER_WINDOW = timedelta(minutes=1)
STALE_AFTER = timedelta(hours=24)


def _not_negative(settings: object, *names: str) -> None:
    """Refuse a negative delay among *names* of *settings* (a settings dataclass)."""
    for name in names:
        if getattr(settings, name) < timedelta(0):
            raise ValueError(f"{name} must not be negative, got {getattr(settings, name)}")


#: The ISA-18.2 alarm states (defined once, beside the results store's interface, which
#: keeps them).
State = AlarmStateName


@dataclass(frozen=True)
class LowFlowSettings:
    """Low-flow alarm settings of one branch.

    min_flow_m3s : alarm limit [m^3/s]
    range_m3s : span of the flow meter, for the deadband [m^3/s]
    deadband_fraction : deadband as a fraction of the range [-] (5 %, ISA-18.2 table
        for flow, from memory)
    on_delay, off_delay : how long the condition must hold before it is annunciated /
        cleared [s] (15 s, same table, from memory)
    latching : the alarm stays in until acknowledged and reset
    max_gap : a longer gap between samples restarts the delays (no evidence in between)
    """

    min_flow_m3s: float
    range_m3s: float
    deadband_fraction: float = 0.05
    on_delay: timedelta = timedelta(seconds=15)
    off_delay: timedelta = timedelta(seconds=15)
    latching: bool = False
    max_gap: timedelta = timedelta(minutes=15)

    def __post_init__(self) -> None:
        if not (math.isfinite(self.min_flow_m3s) and self.min_flow_m3s >= 0):
            raise ValueError(f"min_flow_m3s must be >= 0, got {self.min_flow_m3s}")
        if not self.range_m3s > 0:
            raise ValueError(f"range_m3s must be positive, got {self.range_m3s}")
        if not 0 <= self.deadband_fraction < 1:
            raise ValueError(f"deadband_fraction must be in [0, 1), got {self.deadband_fraction}")
        _not_negative(self, "on_delay", "off_delay", "max_gap")

    @property
    def clear_level_m3s(self) -> float:
        """Flow above which the condition clears [m^3/s]."""
        return self.min_flow_m3s + self.deadband_fraction * self.range_m3s


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


def _in_unit(value_si: float, unit: str, kind: str) -> float:
    """An SI value in the tag's own unit (the identity when the unit is SI already)."""
    return float(from_si(value_si, unit, kind))


def _site_time(t: datetime, timezone: str) -> str:
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


def _cause(branch: str, diagnosis: Sequence[Finding] | None) -> str:
    """The likely cause named from the latest open finding of the branch."""
    if not diagnosis:
        return ""
    candidates = [f for f in diagnosis if f.branch == branch and f.end is None
                  and f.kind != "low_flow"]  # fmt: skip
    if not candidates:
        return "; no drift found on this branch: check the pump, header pressure and valves"
    f = max(candidates, key=lambda f: (f.detected, f.confidence))
    return (
        f"; likely cause: {f.kind.replace('_', '-')} found "
        f"{pd.Timestamp(f.detected):%Y-%m-%d} (confidence {f.confidence:.0%})"
    )


def _annunciate_on(s: AlarmState, t: datetime, message: str) -> tuple[AlarmState, list[AlarmEvent]]:
    s = dataclasses.replace(s, active=True, pending_since=None, activated_at=t, message=message)
    if s.state in (State.NORMAL, State.RTN_UNACK):
        s = dataclasses.replace(s, state=State.UNACK, acknowledged_at=None, acknowledged_by="")
        return s, [_event(s, t, "activated")]
    return s, []  # shelved: tracked, not annunciated


def _annunciate_off(
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


def _expire_shelf(s: AlarmState, t: datetime) -> tuple[AlarmState, list[AlarmEvent]]:
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
    t_now = _aware(now, "now")
    data = pd.Series(series.to_numpy(dtype=float), index=index.tz_convert("UTC")).sort_index()
    if state.last_sample is not None:
        data = data[data.index > pd.Timestamp(state.last_sample)]
    return data[(data.index <= t_now) & data.notna()], t_now


def _at_times(mask: pd.Series | None, index: pd.DatetimeIndex) -> list[bool]:
    """*mask* (bool, on UTC times) looked up at *index*: the newest mask value at or
    before each time; False where there is none (or no mask)."""
    if mask is None or mask.empty or len(index) == 0:
        return [False] * len(index)
    m = pd.Series(mask.to_numpy(dtype=bool), index=pd.DatetimeIndex(mask.index).tz_convert("UTC"))
    m = m[~m.index.duplicated(keep="last")].sort_index()
    return [bool(x) for x in m.reindex(index, method="ffill").fillna(False).to_numpy(dtype=bool)]


def _aware(when: datetime, name: str) -> pd.Timestamp:
    t = pd.Timestamp(when)
    if t.tzinfo is None:
        raise ValueError(f"{name} must be timezone-aware (UTC), got {when!r}")
    return t


def _held(s: AlarmState, t: datetime, mark: Literal["pending_since", "clear_since"],
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
#: `_judge_samples`); returns the state after it and the events it caused.
SampleStep = Callable[[AlarmState, datetime, float, bool], tuple[AlarmState, list[AlarmEvent]]]


def _judge_samples(
    series: pd.Series, state: AlarmState, now: datetime, step: SampleStep, *,
    max_gap: timedelta | None = None, out_of_service_clears_pending: bool = False,
    flags: pd.Series | None = None,
) -> tuple[AlarmState, list[AlarmEvent]]:
    """The loop every sample-driven alarm shares, around its own *step*.

    Takes the new samples of *series* (`_new_samples`: the input checks), and for each:
    ends an expired shelf; out of service, only notes the sample (and forgets a pending
    run with *out_of_service_clears_pending*); after a gap longer than *max_gap* restarts
    the delays; then calls *step* with the sample's flag: *flags* (bool, on UTC times,
    e.g. "the branch cannot flow") at the sample's time (`_at_times`). A shelf that
    expires by *now* ends too. Returns the state and the events in time order.
    """
    data, t_now = _new_samples(series, state, now)
    marks = _at_times(flags, pd.DatetimeIndex(data.index))
    s, events = state, []
    for ts, v, flag in zip(data.index, data.to_numpy(), marks, strict=True):
        t = ts.to_pydatetime()
        value = float(v)
        s, ev = _expire_shelf(s, t)
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
    s, ev = _expire_shelf(s, t_now.to_pydatetime())
    return s, events + ev


def evaluate_low_flow(
    series: pd.Series,
    state: AlarmState,
    settings: LowFlowSettings,
    now: datetime,
    *,
    diagnosis: Sequence[Finding] | None = None,
    unit: str = "m3/h",
    timezone: str = "UTC",
) -> tuple[AlarmState, list[AlarmEvent]]:
    """Run the low-flow check over new flow samples.

    Parameters
    ----------
    series : flow samples [m^3/s] indexed by UTC time; samples at or before
        ``state.last_sample`` or after ``now`` are ignored, NaN samples are gaps
    state : the alarm's state after the previous call
    settings : limit, deadband, delays
    now : evaluation time (UTC); also expires a shelf
    diagnosis : latest findings, to name the likely cause in the message
    unit, timezone : the flow tag's own unit and the site's zone, for the messages (the
        numbers get the decimals that keep the stated comparison true: `format_pair`)

    Returns
    -------
    (new state, events in time order)
    """
    def step(s: AlarmState, t: datetime, q: float, _flag: bool
             ) -> tuple[AlarmState, list[AlarmEvent]]:
        s = dataclasses.replace(s, last_sample=t, last_value=q)
        if not s.active:
            if q >= settings.min_flow_m3s:
                return dataclasses.replace(s, pending_since=None), []
            s, since, due = _held(s, t, "pending_since", settings.on_delay)
            if not due:
                return s, []
            v, lim = format_pair(_in_unit(q, unit, "flow"),
                                 _in_unit(settings.min_flow_m3s, unit, "flow"))
            return _annunciate_on(s, t, (
                f"Low flow on {s.branch}: {v} {unit}, below its minimum {lim} {unit} "
                f"since {_site_time(since, timezone)}{_cause(s.branch, diagnosis)}."))
        if q < settings.clear_level_m3s:
            return dataclasses.replace(s, clear_since=None), []
        s, since, due = _held(s, t, "clear_since", settings.off_delay)
        if not due:
            return s, []
        v, lim = format_pair(_in_unit(q, unit, "flow"),
                             _in_unit(settings.clear_level_m3s, unit, "flow"))
        return _annunciate_off(s, t, settings.latching, (
            f"Low flow on {s.branch} cleared at {_site_time(t, timezone)}: {v} {unit}, back "
            f"at or above {lim} {unit} (its minimum plus the deadband)"))

    return _judge_samples(series, state, now, step, max_gap=settings.max_gap)


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
        shown_v = _in_unit(v, unit_label, kind) if kind is not None else v * scale
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
            return _annunciate_off(s, t, False, f"{tag} on {s.branch} is no longer held at "
                                   f"{_site_time(t, timezone)}: {why}")
        since = s.pending_since or s.last_sample
        s = dataclasses.replace(s, last_sample=t, pending_since=since)
        if s.active or since is None or t - since < settings.hold:
            return s, []
        return _annunciate_on(s, t, (
            f"{tag} on {s.branch} has read exactly {shown(v)} {unit_label} since "
            f"{_site_time(since, timezone)}: the transmitter looks frozen; check it "
            "before trusting this reading").replace("  ", " "))

    return _judge_samples(series, state, now, step, out_of_service_clears_pending=True,
                          flags=no_flow)


@dataclass(frozen=True)
class FlowDropSettings:
    """Relative flow-drop alarm settings of one branch: flow only, no pump curve, no fit.

    fraction : the alarm's condition is a flow at least this share below the branch's own
        recent level [-] (0.05: 5 %)
    reference : the recent level is the median of the flow over this long before the
        drop began [s]; a median, so a drop shorter than half of it does not pull the
        level down with it
    hold : the drop must last this long before it is annunciated (the on-delay) [s]
    deadband : the condition clears once the flow is back above the level less
        ``fraction - deadband`` of it [-] (2 % of the level, our choice: above the
        scatter of a magnetic meter at steady flow)
    off_delay : and stays there this long [s]
    min_coverage : share of *reference* that must hold samples for a level to be
        trusted [-]; before that (a check just started) nothing is judged
    max_gap : a longer gap between samples restarts the delays
    """

    fraction: float = 0.05
    reference: timedelta = timedelta(minutes=30)
    hold: timedelta = timedelta(minutes=1)
    deadband: float = 0.02
    off_delay: timedelta = timedelta(seconds=30)
    min_coverage: float = 0.5
    max_gap: timedelta = timedelta(minutes=15)

    def __post_init__(self) -> None:
        if not 0 < self.fraction < 1:
            raise ValueError(f"fraction must be in (0, 1), got {self.fraction}")
        if not 0 <= self.deadband < self.fraction:
            raise ValueError(f"deadband must be in [0, fraction={self.fraction}), "
                             f"got {self.deadband}")
        if not 0 < self.min_coverage <= 1:
            raise ValueError(f"min_coverage must be in (0, 1], got {self.min_coverage}")
        if self.reference <= timedelta(0):
            raise ValueError(f"reference must be positive, got {self.reference}")
        _not_negative(self, "hold", "off_delay", "max_gap")

    @property
    def lookback(self) -> timedelta:
        """How far before the first new sample the flow must be given: a reference span
        before the start of a drop that may have begun up to a hold before it."""
        return self.reference + self.hold + self.max_gap


def flow_level(series: pd.Series, settings: FlowDropSettings, *,
               resting: pd.Series | None = None) -> pd.Series:
    """The branch's recent level at each sample of *series* [SI]: the median of the
    samples in the *reference* span before it (the sample itself left out), NaN where
    fewer than *min_coverage* of the span hold samples. Samples where *resting* is True
    (the branch cannot flow: pumps stopped) are left out of the level."""
    return _trailing_median(series, pd.Timedelta(settings.reference), settings.min_coverage,
                            resting=resting, closed="left")


def _trailing_median(series: pd.Series, span: pd.Timedelta, coverage: float, *,
                     resting: pd.Series | None = None,
                     closed: Literal["left", "both"] = "left") -> pd.Series:
    """Median of *series* over the *span* before each sample (``closed="left"``: the
    sample left out; ``"both"``: in), NaN where fewer than *coverage* of the span hold
    samples at the series' typical step; times in UTC, one value per time."""
    data = pd.Series(series.to_numpy(dtype=float),
                     index=pd.DatetimeIndex(series.index).tz_convert("UTC")).sort_index()
    data = data[~data.index.duplicated(keep="last")]
    if resting is not None:
        data = data.mask(np.asarray(_at_times(resting, pd.DatetimeIndex(data.index)), bool))
    data = data.dropna()
    if data.empty:
        return data
    roll = data.rolling(span, closed=closed)
    level = roll.median()
    steps = np.diff(pd.DatetimeIndex(data.index).as_unit("ns").asi8) / 1e9
    step_s = float(np.median(steps)) if len(steps) and np.median(steps) > 0 else 1.0
    need = coverage * span.total_seconds() / step_s
    return level.where(roll.count() >= max(need, 1.0))


def _newest_at(values: pd.Series) -> Callable[[datetime], float]:
    """A lookup of *values* (on UTC times): the newest value at or before a time (NaN
    before any)."""
    times = pd.DatetimeIndex(values.index).as_unit("ns").asi8
    arr = values.to_numpy(dtype=float)

    def at(t: datetime) -> float:
        i = int(np.searchsorted(times, pd.Timestamp(t).value, side="right")) - 1
        return float(arr[i]) if i >= 0 else math.nan

    return at


def evaluate_flow_drop(
    series: pd.Series,
    state: AlarmState,
    settings: FlowDropSettings,
    now: datetime,
    *,
    unit: str = "m3/h",
    timezone: str = "UTC",
    resting: pd.Series | None = None,
    driving: pd.Series | None = None,
) -> tuple[AlarmState, list[AlarmEvent]]:
    """Run the relative flow-drop check over new flow samples of one branch.

    The condition: the flow is at least ``fraction`` below the branch's recent level (the
    median over ``reference``, `flow_level`) for ``hold``. While a drop is pending or
    active the level is the one from before it began, so a long closure does not become
    the new normal and clear itself; it clears once the flow is back within
    ``fraction - deadband`` of that level for ``off_delay``. Needs no pump curve and no
    fit: it works on a rig or a branch without a model.

    Parameters
    ----------
    series : flow samples [m^3/s] by UTC time, including at least
        ``settings.lookback`` before the first new one (for the level); samples at or
        before ``state.last_sample`` or after *now* are not judged again
    state, now, unit, timezone : as for `evaluate_low_flow`
    resting : True where the branch cannot flow (pumps stopped, header at or below its
        threshold): those samples are neither judged nor part of the level; a stop is
        the low-flow alarm's business, not a drop against the level
    driving : the pressure that drives the branch, header minus its static
        back-pressure [Pa], by UTC time (None: not used). A flow change the header
        explains is not a drop: the level is scaled by √(driving now / driving at the
        level), the driving pressure taken as its median over the hold and over the
        reference span (a turbulent branch's flow goes with the square root of its
        pressure drop, Darcy–Weisbach with a constant friction factor). So a pump turned
        down at night lowers the level with the flow, and a closure, which raises the
        header a little, does not hide. Give it only where the header gauge resolves the
        driving pressure finely (`monitor.jobs` does it below 2 % of it).

    ``last_value`` is the flow [m^3/s]; ``pending_since`` / ``clear_since`` as usual. The
    level of an active alarm is taken from before ``activated_at - hold``.
    """
    hold = settings.hold
    level_at = _newest_at(flow_level(series, settings, resting=resting))
    d_ref: Callable[[datetime], float] | None = None
    d_now: Callable[[datetime], float] | None = None
    if driving is not None and not driving.empty:
        d_ref = _newest_at(_trailing_median(driving, pd.Timedelta(settings.reference),
                                            settings.min_coverage, closed="left"))
        d_now = _newest_at(_trailing_median(driving, pd.Timedelta(max(hold, timedelta(
            seconds=1))), 1e-9, closed="both"))

    def expected(anchor: datetime, t: datetime) -> float:
        """The level from before *anchor*, scaled to the driving pressure at *t*."""
        ref = level_at(anchor)
        if d_ref is None or d_now is None:
            return ref
        was, now_ = d_ref(anchor), d_now(t)
        if not (math.isfinite(was) and math.isfinite(now_) and was > 0 and now_ > 0):
            return ref
        return ref * math.sqrt(now_ / was)

    def shown(v: float) -> float:
        return _in_unit(v, unit, "flow")

    def step(s: AlarmState, t: datetime, q: float, rest: bool
             ) -> tuple[AlarmState, list[AlarmEvent]]:
        s = dataclasses.replace(s, last_sample=t, last_value=q)
        if rest:
            return dataclasses.replace(s, pending_since=None, clear_since=None), []
        if not s.active:
            since = s.pending_since or t
            ref = expected(since, t)
            if not (math.isfinite(ref) and ref > 0 and q <= (1 - settings.fraction) * ref):
                return dataclasses.replace(s, pending_since=None), []
            s, since, due = _held(s, t, "pending_since", hold)
            if not due:
                return s, []
            v, lim = format_pair(shown(q), shown((1 - settings.fraction) * ref))
            at_header = " (scaled to the header pressure now)" if d_ref is not None else ""
            return _annunciate_on(s, t, (
                f"Flow drop on {s.branch}: {v} {unit}, {1 - q / ref:.0%} below its recent "
                f"level {shown(ref):.4g} {unit}{at_header} (alarm at "
                f"{settings.fraction:.0%} below: {lim} {unit}) since "
                f"{_site_time(since, timezone)}; check valves and strainers on the branch"))
        start = (s.activated_at or t) - hold
        ref = expected(start, t)
        back = (1 - settings.fraction + settings.deadband) * ref
        if not (math.isfinite(ref) and q >= back):
            return dataclasses.replace(s, clear_since=None), []
        s, since, due = _held(s, t, "clear_since", settings.off_delay)
        if not due:
            return s, []
        v, lim = format_pair(shown(q), shown(back))
        return _annunciate_off(s, t, False, (
            f"Flow drop on {s.branch} cleared at {_site_time(t, timezone)}: {v} {unit}, "
            f"back at or above {lim} {unit} (within "
            f"{settings.fraction - settings.deadband:.0%} of its level before the drop, "
            f"{shown(ref):.4g} {unit})"))

    return _judge_samples(series, state, now, step, max_gap=settings.max_gap, flags=resting)


@dataclass(frozen=True)
class BackflowAlarmSettings:
    """Back-flow hazard alarm settings of one branch (no check valve).

    deadband_pa : the condition clears only once the header is this far above the static
        back-pressure [Pa] (5 kPa = 0.05 bar, our choice: about the scatter of a header
        transmitter's reading under a running pump; ISA-18.2 leaves the value to the site)
    on_delay : the header must stay below the static back-pressure this long [s]; 0 by
        default, so the samples of one ingest raise it (two samples in a row: the first
        starts the delay, see `evaluate_low_flow`); with historian data every minute the
        alarm comes at the first ingest that holds the condition, within one ingest
        interval. A lone sample below is not enough.
    off_delay : and above static + deadband this long before it returns [s] (5 min, our
        choice: a header that hovers at the threshold on a slow set-back raises it once)
    max_gap : a longer gap between samples restarts the delays
    unit, timezone : the header pressure tag's unit and the site's zone, for messages
    termination : what the water would run back from, in words ("the tank")
    """

    deadband_pa: float = 5_000.0
    on_delay: timedelta = timedelta(0)
    off_delay: timedelta = timedelta(minutes=5)
    max_gap: timedelta = timedelta(minutes=15)
    unit: str = "bar"
    timezone: str = "UTC"
    termination: str = "the branch's termination"

    def __post_init__(self) -> None:
        if not (math.isfinite(self.deadband_pa) and self.deadband_pa >= 0):
            raise ValueError(f"deadband_pa must be >= 0, got {self.deadband_pa}")
        _not_negative(self, "on_delay", "off_delay", "max_gap")


def evaluate_backflow(
    samples: pd.DataFrame,
    state: AlarmState,
    settings: BackflowAlarmSettings,
    now: datetime,
) -> tuple[AlarmState, list[AlarmEvent]]:
    """Run the back-flow hazard check over new samples of one branch without a check valve.

    Parameters
    ----------
    samples : indexed by UTC time, columns ``header_pa`` (logged header pressure [Pa
        gauge]) and ``static_pa`` (the branch's static back-pressure at that time, from
        `model.branch.Branch.static_pressure` [Pa gauge]); samples at or before
        ``state.last_sample`` or after ``now`` are ignored, rows with NaN are gaps
    state, now : as for `evaluate_low_flow`

    The condition is ``header_pa < static_pa``: the branch cannot flow, and with no check
    valve water can run back from its termination into the supply (DESIGN §2). It comes
    on after ``on_delay`` (at least two samples in a row) and clears once the header is
    ``deadband_pa`` above the static back-pressure for ``off_delay``. ``last_value`` is
    the margin header − static [Pa] (negative while in hazard).
    """
    for col in ("header_pa", "static_pa"):
        if col not in samples.columns:
            raise ValueError(f"samples lacks column {col!r}; needs header_pa and static_pa")
    margin = samples["header_pa"].astype(float) - samples["static_pa"].astype(float)
    header = samples["header_pa"].astype(float)
    header.index = pd.DatetimeIndex(header.index).tz_convert("UTC")
    header = header[~header.index.duplicated(keep="last")]
    unit, tz = settings.unit, settings.timezone

    def bar(v: float) -> float:
        return _in_unit(v, unit, "pressure")

    def step(s: AlarmState, t: datetime, m: float, _flag: bool
             ) -> tuple[AlarmState, list[AlarmEvent]]:
        first = s.pending_since is None
        s = dataclasses.replace(s, last_sample=t, last_value=m)
        p_s = float(header.get(pd.Timestamp(t), math.nan))
        static = p_s - m
        if not s.active:
            if m >= 0:
                return dataclasses.replace(s, pending_since=None), []
            s, since, due = _held(s, t, "pending_since", settings.on_delay)
            if first or not due:
                return s, []
            hp, st = format_pair(bar(p_s), bar(static), digits=2)
            return _annunciate_on(s, t, (
                f"Back-flow hazard on {s.branch}: header {hp} {unit}, below the "
                f"branch's static back-pressure {st} {unit} (by "
                f"{abs(bar(p_s) - bar(static)):.2f} {unit}) since "
                f"{_site_time(since, tz)}, and no check valve: water can run back "
                f"from {settings.termination} into the supply. Raise the header "
                "pressure or isolate the branch as site procedures say"))
        if m < settings.deadband_pa:
            return dataclasses.replace(s, clear_since=None), []
        s, since, due = _held(s, t, "clear_since", settings.off_delay)
        if not due:
            return s, []
        hp, st = format_pair(bar(p_s), bar(static), digits=2)
        return _annunciate_off(s, t, False, (
            f"Back-flow hazard on {s.branch} cleared at {_site_time(t, tz)}: "
            f"header {hp} {unit}, back above the static back-pressure {st} "
            f"{unit} by more than the deadband "
            f"{bar(settings.deadband_pa) - bar(0.0):.2f} {unit}"))

    return _judge_samples(margin, state, now, step, max_gap=settings.max_gap)


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
    t_now = _aware(now, "now").to_pydatetime()
    known = state.last_sample
    if newest is not None:
        t_new = _aware(newest, "newest").to_pydatetime()
        known = t_new if known is None else max(known, t_new)
    age = (t_now - known) if known is not None else None
    s, events = _expire_shelf(state, t_now)
    s = dataclasses.replace(
        s, last_sample=known, last_value=math.nan if age is None else age.total_seconds()
    )
    if s.state == State.OUT_OF_SERVICE:
        return s, events
    stale = age is None or age > settings.stale_after
    if stale:
        s = dataclasses.replace(s, clear_since=None)
        if not s.active:
            s, ev = _annunciate_on(s, t_now, _stale_message(subject, known, age, settings,
                                                            timezone))
            events += ev
        return s, events
    if s.active:
        since = s.clear_since or t_now
        s = dataclasses.replace(s, clear_since=since)
        if t_now - since >= settings.off_delay:
            assert known is not None and age is not None  # not stale: data is known
            msg = (f"Data from {subject} fresh again at {_site_time(t_now, timezone)}: the "
                   f"newest reading is {format_age(age.total_seconds())} old, within the "
                   f"{format_age(settings.stale_after.total_seconds())} allowed")
            s, ev = _annunciate_off(s, t_now, False, msg)
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


@dataclass(frozen=True)
class AlarmRateSummary:
    """EEMUA 191 figures of an alarm journal.

    activations : number of annunciated alarms [-]
    per_10_min : average activations per 10 min over the journal's span [-]
    max_in_10_min : the most activations in any 10-min window [-]
    floods : (start, count) of each flood: a run of 10-min windows with more than 10
    chattering : (branch, condition) that activated 3 times within 1 min
    stale : (branch, condition, since) in alarm for over 24 h (at ``now``, or before they
        returned)
    """

    activations: int
    per_10_min: float
    max_in_10_min: int
    floods: tuple[tuple[datetime, int], ...]
    chattering: tuple[tuple[str, str], ...]
    stale: tuple[tuple[str, str, datetime], ...]


def alarm_rate_summary(events: Sequence[AlarmEvent], *, now: datetime) -> AlarmRateSummary:
    """Flood, chattering and stale figures (EEMUA 191) of ``events`` up to ``now``."""
    evs = sorted((e for e in events if e.time <= now), key=lambda e: e.time)
    acts = [e for e in evs if e.action == "activated"]
    times = [e.time for e in acts]
    floods: list[tuple[datetime, int]] = []
    peak, lo, flooding = 0, 0, False
    for hi, t in enumerate(times):
        while times[lo] <= t - FLOOD_WINDOW:
            lo += 1
        count = hi - lo + 1  # activations in the 10 min ending at this one
        peak = max(peak, count)
        if count > FLOOD_COUNT and flooding:
            floods[-1] = (floods[-1][0], max(floods[-1][1], count))
        elif count > FLOOD_COUNT:
            floods.append((times[lo], count))
        flooding = count > FLOOD_COUNT
    chatter: set[tuple[str, str]] = set()
    by_key: dict[tuple[str, str], list[datetime]] = {}
    for e in acts:
        by_key.setdefault((e.branch, e.condition), []).append(e.time)
    for key, ts in by_key.items():
        for k in range(len(ts) - CHATTER_COUNT + 1):
            if ts[k + CHATTER_COUNT - 1] - ts[k] <= CHATTER_WINDOW:
                chatter.add(key)
                break
    stale: list[tuple[str, str, datetime]] = []
    since: dict[tuple[str, str], datetime] = {}
    for e in evs:
        key = (e.branch, e.condition)
        if e.action == "activated":
            since.setdefault(key, e.time)
        elif e.action in ("returned", "removed_from_service", "reset") and key in since:
            start = since.pop(key)
            if e.time - start > STALE_AFTER:
                stale.append((*key, start))
    stale += [(*key, start) for key, start in since.items() if now - start > STALE_AFTER]
    span = (now - evs[0].time) if evs else timedelta(0)
    per = len(acts) / max(span / FLOOD_WINDOW, 1.0)
    return AlarmRateSummary(
        activations=len(acts), per_10_min=per, max_in_10_min=peak, floods=tuple(floods),
        chattering=tuple(sorted(chatter)), stale=tuple(sorted(stale)),
    )  # fmt: skip
