"""The diagnosis's spans follow the window size ([diagnosis], `DiagnosisSettings.for_window`).

Daily windows keep the counts the false-finding rate was tuned with (test_diagnose.py);
other sizes get the same spans in time, and a rig with minute windows sets its spans in
minutes so that it has a baseline within the run.
"""

from __future__ import annotations

import dataclasses
import tomllib

import pytest

from monitor.analysis.diagnose import DiagnosisSettings, diagnose
from monitor.app.site_diagnosis import diagnosis_settings
from monitor.site.config import ConfigError, parse_site
from tests.monitor.rig_recording import site_toml
from tests.monitor.test_diagnose import Fault, make_history

RIG_SPANS = '''
[diagnosis]
baseline = "20 min"
level = "20 min"
trend_shortest = "30 min"
trend_longest = "2 h"
'''


def _site(window: str, extra: str = "") -> object:
    return parse_site(tomllib.loads(site_toml(window=window) + extra), path="rig.toml")


def test_daily_windows_keep_every_default() -> None:
    daily = DiagnosisSettings.for_window(86_400.0)
    assert daily == DiagnosisSettings()
    assert diagnosis_settings(_site("1 day")).baseline_windows == 14  # type: ignore[arg-type]


def test_hourly_windows_get_the_same_spans_in_time() -> None:
    s = diagnosis_settings(_site("1 h"))  # type: ignore[arg-type]
    assert (s.baseline_windows, s.level_windows, s.min_trend_windows,
            s.max_trend_windows) == (14 * 24, 14 * 24, 20 * 24, 180 * 24)
    assert s.trend_lookbacks == tuple(24 * k for k in (10, 20, 30, 60, 120, 180))


def test_rig_spans_in_minutes_and_the_floors() -> None:
    s = diagnosis_settings(_site("1 min", RIG_SPANS))  # type: ignore[arg-type]
    assert (s.baseline_windows, s.level_windows, s.min_trend_windows,
            s.max_trend_windows) == (20, 20, 30, 120)
    assert s.trend_lookbacks == (15, 20, 40, 80, 120)
    tiny = diagnosis_settings(_site("5 min", RIG_SPANS.replace("20 min", "5 min")))  # type: ignore[arg-type]
    assert tiny.baseline_windows == 5  # one window asked for: the floor of five


def test_a_minute_window_rig_gets_its_restriction_found_within_the_run() -> None:
    # 90 windows (an hour and a half of 1-minute windows), a 25 % step at window 45
    history = make_history(90, seed=3, faults=(Fault("step", 45.0, 0.25),))
    rig = diagnosis_settings(_site("1 min", RIG_SPANS))  # type: ignore[arg-type]
    default = diagnosis_settings(_site("1 min"))  # type: ignore[arg-type]
    now = history["window_end"].max().to_pydatetime()
    found = [f.kind for f in diagnose(history, now=now, settings=dataclasses.replace(
        rig, branches={}))]
    assert "restriction" in found
    # with the daily spans in time (14 days of minute windows) there is no baseline yet
    assert diagnose(history, now=now,
                    settings=dataclasses.replace(default, branches={})) == []


def test_spans_out_of_order_are_refused() -> None:
    with pytest.raises(ConfigError, match="trend_longest must not be shorter"):
        _site("1 min", '[diagnosis]\ntrend_shortest = "2 h"\ntrend_longest = "1 h"\n')
