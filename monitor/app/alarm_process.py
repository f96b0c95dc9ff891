"""The process alarms of a branch: **low flow** (`evaluate_low_flow`), the relative
**flow drop** against the branch's own recent level (`evaluate_flow_drop`: flow only, no
model) and the high-priority **back-flow hazard** of a branch without a check valve
(`evaluate_backflow`: the header below the branch's static back-pressure). Each is a
pure function of its inputs on the life cycle of `monitor.app.alarms`.

Chattering is kept down by a deadband (the condition clears only above
``min_flow + deadband·range``), an on-delay and an off-delay, and by annunciating one
alarm per condition, not one per sample. Defaults from memory of the ISA-18.2 tables
(REFERENCES.md): flow deadband 5 % of range, delays 15 s. Historian data often comes
every minute, so with the default delays a condition must be seen on two consecutive
samples; set the delays to suit the site's logging interval.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from datetime import datetime, timedelta
from typing import Literal

import numpy as np
import pandas as pd

from monitor.analysis.diagnose import Finding
from monitor.app.alarms import (
    AlarmEvent,
    AlarmState,
    annunciate_off,
    annunciate_on,
    at_times,
    delay_held,
    format_pair,
    in_unit,
    judge_samples,
    site_time,
)

__all__ = [
    "BackflowAlarmSettings",
    "FlowDropSettings",
    "LowFlowSettings",
    "evaluate_backflow",
    "evaluate_flow_drop",
    "evaluate_low_flow",
    "flow_level",
]


def _not_negative(settings: object, *names: str) -> None:
    """Refuse a negative delay among *names* of *settings* (a settings dataclass)."""
    for name in names:
        if getattr(settings, name) < timedelta(0):
            raise ValueError(f"{name} must not be negative, got {getattr(settings, name)}")


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
            s, since, due = delay_held(s, t, "pending_since", settings.on_delay)
            if not due:
                return s, []
            v, lim = format_pair(in_unit(q, unit, "flow"),
                                 in_unit(settings.min_flow_m3s, unit, "flow"))
            return annunciate_on(s, t, (
                f"Low flow on {s.branch}: {v} {unit}, below its minimum {lim} {unit} "
                f"since {site_time(since, timezone)}{_cause(s.branch, diagnosis)}."))
        if q < settings.clear_level_m3s:
            return dataclasses.replace(s, clear_since=None), []
        s, since, due = delay_held(s, t, "clear_since", settings.off_delay)
        if not due:
            return s, []
        v, lim = format_pair(in_unit(q, unit, "flow"),
                             in_unit(settings.clear_level_m3s, unit, "flow"))
        return annunciate_off(s, t, settings.latching, (
            f"Low flow on {s.branch} cleared at {site_time(t, timezone)}: {v} {unit}, back "
            f"at or above {lim} {unit} (its minimum plus the deadband)"))

    return judge_samples(series, state, now, step, max_gap=settings.max_gap)


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
        data = data.mask(np.asarray(at_times(resting, pd.DatetimeIndex(data.index)), bool))
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
        driving pressure finely (`monitor.app.alarm_points` does it below 2 % of it).

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
        return in_unit(v, unit, "flow")

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
            s, since, due = delay_held(s, t, "pending_since", hold)
            if not due:
                return s, []
            v, lim = format_pair(shown(q), shown((1 - settings.fraction) * ref))
            at_header = " (scaled to the header pressure now)" if d_ref is not None else ""
            return annunciate_on(s, t, (
                f"Flow drop on {s.branch}: {v} {unit}, {1 - q / ref:.0%} below its recent "
                f"level {shown(ref):.4g} {unit}{at_header} (alarm at "
                f"{settings.fraction:.0%} below: {lim} {unit}) since "
                f"{site_time(since, timezone)}; check valves and strainers on the branch"))
        start = (s.activated_at or t) - hold
        ref = expected(start, t)
        back = (1 - settings.fraction + settings.deadband) * ref
        if not (math.isfinite(ref) and q >= back):
            return dataclasses.replace(s, clear_since=None), []
        s, since, due = delay_held(s, t, "clear_since", settings.off_delay)
        if not due:
            return s, []
        v, lim = format_pair(shown(q), shown(back))
        return annunciate_off(s, t, False, (
            f"Flow drop on {s.branch} cleared at {site_time(t, timezone)}: {v} {unit}, "
            f"back at or above {lim} {unit} (within "
            f"{settings.fraction - settings.deadband:.0%} of its level before the drop, "
            f"{shown(ref):.4g} {unit})"))

    return judge_samples(series, state, now, step, max_gap=settings.max_gap, flags=resting)


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
        return in_unit(v, unit, "pressure")

    def step(s: AlarmState, t: datetime, m: float, _flag: bool
             ) -> tuple[AlarmState, list[AlarmEvent]]:
        first = s.pending_since is None
        s = dataclasses.replace(s, last_sample=t, last_value=m)
        p_s = float(header.get(pd.Timestamp(t), math.nan))
        static = p_s - m
        if not s.active:
            if m >= 0:
                return dataclasses.replace(s, pending_since=None), []
            s, since, due = delay_held(s, t, "pending_since", settings.on_delay)
            if first or not due:
                return s, []
            hp, st = format_pair(bar(p_s), bar(static), digits=2)
            return annunciate_on(s, t, (
                f"Back-flow hazard on {s.branch}: header {hp} {unit}, below the "
                f"branch's static back-pressure {st} {unit} (by "
                f"{abs(bar(p_s) - bar(static)):.2f} {unit}) since "
                f"{site_time(since, tz)}, and no check valve: water can run back "
                f"from {settings.termination} into the supply. Raise the header "
                "pressure or isolate the branch as site procedures say"))
        if m < settings.deadband_pa:
            return dataclasses.replace(s, clear_since=None), []
        s, since, due = delay_held(s, t, "clear_since", settings.off_delay)
        if not due:
            return s, []
        hp, st = format_pair(bar(p_s), bar(static), digits=2)
        return annunciate_off(s, t, False, (
            f"Back-flow hazard on {s.branch} cleared at {site_time(t, tz)}: "
            f"header {hp} {unit}, back above the static back-pressure {st} "
            f"{unit} by more than the deadband "
            f"{bar(settings.deadband_pa) - bar(0.0):.2f} {unit}"))

    return judge_samples(margin, state, now, step, max_gap=settings.max_gap)
