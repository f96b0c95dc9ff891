"""Frozen-meter alarm: the reading stops moving, the alarm comes after the hold time."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import numpy as np
import pandas as pd

from monitor.app.alarm_instruments import FrozenSettings, evaluate_frozen
from monitor.app.alarms import AlarmState, State

T0 = datetime(2026, 5, 1, tzinfo=UTC)


def _series(values: np.ndarray, step_min: float = 2.0) -> pd.Series:
    index = pd.DatetimeIndex([T0 + timedelta(minutes=step_min * i) for i in range(len(values))])
    return pd.Series(values, index=index)


def test_live_meter_never_alarms_and_frozen_one_does_after_the_hold() -> None:
    rng = np.random.default_rng(4)
    live = 0.04 + rng.normal(0, 1e-4, 300)
    frozen = live.copy()
    frozen[100:] = frozen[100]  # stuck from sample 100 (minute 200)
    settings = FrozenSettings(hold=timedelta(hours=1))
    s0 = AlarmState(branch="B3", condition="frozen FT-310")
    s, events = evaluate_frozen(_series(live), s0, settings, T0 + timedelta(days=1), tag="FT")
    assert events == [] and s.state == State.NORMAL
    s, events = evaluate_frozen(_series(frozen), s0, settings, T0 + timedelta(days=1), tag="FT")
    assert [e.action for e in events] == ["activated"]
    assert events[0].time - (T0 + timedelta(minutes=200)) == timedelta(hours=1)
    assert s.state == State.UNACK


def test_state_carries_over_between_ingests_and_clears_when_it_moves() -> None:
    values = np.r_[np.full(40, 0.05), 0.051]
    series = _series(values)
    settings = FrozenSettings(hold=timedelta(hours=1))
    s = AlarmState(branch="B3", condition="frozen FT-310")
    actions: list[str] = []
    for cut in (10, 25, 41):  # three ingests
        s, ev = evaluate_frozen(series.iloc[:cut], s, settings, T0 + timedelta(days=1), tag="FT")
        actions += [e.action for e in ev]
    assert actions == ["activated", "returned"]
    assert s.state == State.RTN_UNACK  # came back before anyone acknowledged (ISA-18.2)


def test_low_flow_cut_off_at_zero_is_not_a_frozen_meter() -> None:
    settings = FrozenSettings(hold=timedelta(hours=1))
    s = AlarmState(branch="B5", condition="frozen FT-510")
    s, events = evaluate_frozen(_series(np.zeros(200)), s, settings, T0 + timedelta(days=1),
                                tag="FT")
    assert events == []
