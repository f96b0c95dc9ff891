"""The relative flow-drop alarm: a branch's flow against its own recent level.

No physics here: the thresholds are the settings' own (5 % below a 30-min median by
default, our choice); what is checked is that the rule does what it says — a drop of at
least the fraction that lasts the hold is annunciated once, a shorter or shallower one is
not, a long closure does not clear itself, a pump stop is not a drop, and a re-run of the
same samples changes nothing.
"""

from __future__ import annotations

import re
import tomllib
from datetime import UTC, datetime, timedelta

import numpy as np
import pandas as pd
import pytest

from monitor.app.alarm_process import FlowDropSettings, evaluate_flow_drop, flow_level
from monitor.app.alarms import AlarmState, State
from monitor.site.config import ConfigError, parse_site
from tests.monitor.rig_recording import site_toml

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


def _turndown(flow_share: float, pressure_share: float) -> tuple[pd.Series, pd.Series]:
    """40 L/min and a driving pressure of 2 bar; from 15 min on both lowered (a pump
    turned down: the flow share goes with the square root of the pressure share)."""
    rng = np.random.default_rng(3)
    n = 1800
    q = np.full(n, 40.0) * np.where(np.arange(n) >= 900, flow_share, 1.0)
    p = np.full(n, 2.0e5) * np.where(np.arange(n) >= 900, pressure_share, 1.0)
    flow = seconds(q * (1 + 0.003 * rng.standard_normal(n)))
    drive = pd.Series(p * (1 + 0.002 * rng.standard_normal(n)), index=flow.index)
    return flow, drive


def test_a_flow_change_the_header_explains_is_not_a_drop() -> None:
    # turndown: pressure to 81 %, flow to 90 % (√0.81): explained, no alarm
    flow, drive = _turndown(0.90, 0.81)
    assert run(flow, driving=drive)[1] == []
    assert [e.action for e in run(flow)[1]] == ["activated"]  # flow alone: an alarm
    # a closure: flow to 92 % while the header rises a little: still a drop
    flow, drive = _turndown(0.92, 1.01)
    _, events = run(flow, driving=drive)
    assert [e.action for e in events] == ["activated"]
    assert "scaled to the header pressure now" in events[0].message


def _site_with(flow_drop: str, branch_extra: str = "") -> object:
    # the rig's own [flow_drop] section (up to the blank line) replaced by *flow_drop*
    text = re.sub(r"\[flow_drop\]\n(?:.+\n)*", flow_drop, site_toml(branches=2), count=1)
    if branch_extra:
        text = text.replace('name = "loop B"\n', f'name = "loop B"\n{branch_extra}\n')
    return parse_site(tomllib.loads(text), path="rig.toml")


def test_flow_drop_is_off_unless_enabled_and_a_branch_overrides_the_site() -> None:
    off = _site_with("")
    assert all(b.flow_drop is None for b in off.branches)  # type: ignore[attr-defined]
    site = _site_with('[flow_drop]\nenabled = true\nfraction = "8 %"\n',
                      'flow_drop = { fraction = "12 %", hold = "2 min" }')
    a, b = site.branches  # type: ignore[attr-defined]
    assert (a.flow_drop.fraction, a.flow_drop.hold_s) == (pytest.approx(0.08), 60.0)
    assert (b.flow_drop.fraction, b.flow_drop.hold_s) == (pytest.approx(0.12), 120.0)
    one = _site_with("", "flow_drop = { enabled = true }")
    assert [x.flow_drop is not None for x in one.branches] == [False, True]  # type: ignore[attr-defined]
    left_out = _site_with("[flow_drop]\nenabled = true\n", "flow_drop = { enabled = false }")
    assert [x.flow_drop is not None for x in left_out.branches] == [True, False]  # type: ignore[attr-defined]


def test_flow_drop_mistakes_are_one_line_with_their_key() -> None:
    with pytest.raises(ConfigError, match=r"flow_drop\.fraction: must be a share") as err:
        _site_with('[flow_drop]\nenabled = true\nfraction = "150 %"\n')
    assert "\n" not in str(err.value)
    with pytest.raises(ConfigError, match=r"deadband .* must be smaller than"):
        _site_with('[flow_drop]\nenabled = true\nfraction = "3 %"\ndeadband = "4 %"\n')
    with pytest.raises(ConfigError, match=r"flow_drop\.hold"):
        _site_with('[flow_drop]\nenabled = true\nhold = "-5 s"\n')


def test_a_frozen_meter_suppresses_the_drop_check_while_its_alarm_is_in() -> None:
    from monitor.app.alarm_watch import _either, _frozen_spans
    from monitor.app.alarms import AlarmEvent

    tag = "FT 11 loop A"
    on, off = T0 + timedelta(minutes=20), T0 + timedelta(minutes=50)
    events = [AlarmEvent(on, "loop A", f"frozen {tag}", "activated", State.UNACK),
              AlarmEvent(off, "loop A", f"frozen {tag}", "returned", State.RTN_UNACK)]
    spans = _frozen_spans({}, events, tag)
    assert spans is not None
    stopped = pd.Series([False, True, False], index=pd.DatetimeIndex(
        [T0, T0 + timedelta(minutes=5), T0 + timedelta(minutes=6)]))
    mask = _either(stopped, spans)
    assert mask is not None
    at = {m: bool(mask[mask.index <= T0 + timedelta(minutes=m)].iloc[-1])
          for m in (1, 5, 10, 30, 60)}
    assert at == {1: False, 5: True, 10: False, 30: True, 60: False}
    assert _frozen_spans({}, [], tag) is None  # never frozen: nothing suppressed
    # a frozen 47.5 L/min against a driving pressure that moves: no drop alarm
    flow = seconds(np.full(1800, 47.5))
    drive = pd.Series(2.0e5 * (1 + 0.15 * (np.arange(1800) >= 900)), index=flow.index)
    assert [e.action for e in run(flow, driving=drive)[1]] == ["activated"]
    held = pd.Series([True], index=pd.DatetimeIndex([T0]))
    assert run(flow, driving=drive, resting=held)[1] == []
