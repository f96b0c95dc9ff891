"""The relative flow-drop alarm: a branch's flow against its own recent level.

No physics here: the thresholds are the settings' own (5 % below a 30-min median by
default, our choice); what is checked is that the rule does what it says — a drop of at
least the fraction that lasts the hold is annunciated once, a shorter or shallower one is
not, a long closure does not clear itself, a pump stop is not a drop, and a re-run of the
same samples changes nothing.
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import numpy as np
import pandas as pd
import pytest

from monitor.alarms import (
    AlarmState,
    FlowDropSettings,
    State,
    evaluate_flow_drop,
    flow_level,
)

T0 = datetime(2026, 5, 11, 9, 0, tzinfo=UTC)
LPM = 1e-3 / 60  # L/min in m³/s
SETTINGS = FlowDropSettings(fraction=0.05, reference=timedelta(minutes=10),
                            hold=timedelta(seconds=30), off_delay=timedelta(seconds=20))


def seconds(values_lpm: np.ndarray, start: datetime = T0) -> pd.Series:
    idx = pd.date_range(start, periods=len(values_lpm), freq="1s")
    return pd.Series(np.asarray(values_lpm, dtype=float) * LPM, index=idx)


def closure(depth: float, *, before_s: int = 900, during_s: int = 420, after_s: int = 300,
            noise: float = 0.3, seed: int = 1) -> pd.Series:
    """40 L/min with meter noise, one closure that lowers it by *depth* (a share)."""
    rng = np.random.default_rng(seed)
    q = np.full(before_s + during_s + after_s, 40.0)
    q[before_s:before_s + during_s] *= 1 - depth
    return seconds(q + rng.normal(0, noise, q.size))


def run(series: pd.Series, settings: FlowDropSettings = SETTINGS,
        state: AlarmState | None = None, **kw: object) -> tuple[AlarmState, list]:
    st = state or AlarmState(branch="LOOP-A", condition="flow_drop")
    return evaluate_flow_drop(series, st, settings, series.index[-1].to_pydatetime(),
                              unit="L/min", **kw)  # type: ignore[arg-type]


def test_a_closure_of_the_fraction_is_caught_within_it_and_returns() -> None:
    series = closure(0.08)
    state, events = run(series)
    assert [e.action for e in events] == ["activated", "returned"]
    on, off = events[0].time, events[1].time
    drop_start = T0 + timedelta(seconds=900)
    # caught after the hold, well inside the 7-min closure
    assert drop_start + SETTINGS.hold <= on <= drop_start + timedelta(seconds=60)
    assert off > drop_start + timedelta(seconds=420)
    assert "8% below its recent level" in events[0].message
    assert "L/min" in events[0].message
    assert state.state == State.RTN_UNACK and not state.active


def test_a_shallow_drop_or_a_short_dip_is_not_annunciated() -> None:
    _, shallow = run(closure(0.03))
    _, short = run(closure(0.30, during_s=20))  # shorter than the 30-s hold
    assert shallow == [] and short == []


def test_a_long_closure_keeps_its_level_from_before_the_drop() -> None:
    # 25 min closed: longer than the 10-min reference, the trailing median follows the
    # flow down; the alarm judges against the level from before the drop and stays in.
    state, events = run(closure(0.20, during_s=1500, after_s=0))
    assert [e.action for e in events] == ["activated"] and state.active


def test_reingest_changes_nothing_and_a_split_run_gives_the_same_events() -> None:
    series = closure(0.10)
    whole_state, whole = run(series)
    cut = series.index[1000].to_pydatetime()
    first_state, first = evaluate_flow_drop(
        series[series.index <= cut], AlarmState(branch="LOOP-A", condition="flow_drop"),
        SETTINGS, cut, unit="L/min")
    # the second call gets the whole series (the level needs the lookback), judges only
    # what is new
    second_state, second = run(series, state=first_state)
    assert [(e.action, e.time) for e in first + second] == [
        (e.action, e.time) for e in whole]
    assert second_state == whole_state
    again_state, again = run(series, state=whole_state)
    assert again == [] and again_state == whole_state


def test_a_pump_stop_is_not_a_drop() -> None:
    series = closure(1.0)  # flow to zero: the pumps stopped
    stopped = pd.Series(series.to_numpy() < 1 * LPM, index=series.index)
    _, events = run(series, resting=stopped)
    assert events == []


def test_no_level_no_judgement_until_enough_history() -> None:
    level = flow_level(closure(0.0, before_s=600, during_s=0, after_s=0), SETTINGS)
    # half of a 10-min reference must hold samples: nothing before 5 min
    assert level[: T0 + timedelta(seconds=299)].isna().all()
    assert level[T0 + timedelta(seconds=301):].notna().all()
    assert level.iloc[-1] == pytest.approx(40 * LPM, rel=0.01)


def test_settings_reject_bad_values() -> None:
    for kw in ({"fraction": 0.0}, {"fraction": 1.0}, {"deadband": 0.06},
               {"reference": timedelta(0)}, {"hold": timedelta(seconds=-1)},
               {"min_coverage": 0.0}):
        with pytest.raises(ValueError, match=next(iter(kw))):
            FlowDropSettings(**kw)  # type: ignore[arg-type]
