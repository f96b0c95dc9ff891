"""Screening of readings, checked by hand on synthetic frames.

The Hampel filter is also compared with a plain per-window implementation written here
from its definition (Hampel 1974: window of 7, threshold 3 × 1.4826 × MAD).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from monitor.analysis.quality import (
    ScreenSettings,
    TagLimits,
    running_mask,
    screen,
    steady_mask,
    to_wide,
)

T0 = pd.Timestamp("2025-03-01", tz="UTC")
FLOW = TagLimits(kind="flow")
PRESSURE = TagLimits(kind="pressure")


def _series(
    tag: str,
    values: np.ndarray,
    *,
    freq: str = "1min",
    start: pd.Timestamp = T0,
    good: np.ndarray | None = None,
) -> pd.DataFrame:
    times = pd.date_range(start, periods=len(values), freq=freq)
    return pd.DataFrame(
        {
            "time": times,
            "tag": pd.Series([tag] * len(values), dtype=object),
            "value": np.asarray(values, dtype=float),
            "good": np.ones(len(values), bool) if good is None else good,
        }
    )


def _noisy(n: int, level: float, sigma: float, seed: int = 1) -> np.ndarray:
    return level + np.random.default_rng(seed).normal(0.0, sigma, n)


def _flagged(result: pd.DataFrame, flag: str) -> list[int]:
    return [int(i) for i in np.flatnonzero(result[flag].to_numpy())]


def test_frozen_meter_is_flagged_and_a_meter_at_rest_is_not() -> None:
    values = _noisy(300, 0.03, 3e-4)
    values[180:] = 0.0321  # stuck for 2 h (> frozen_s = 1 h)
    values[60:90] = 0.0305  # constant for 30 min: too short to call frozen
    rest = np.zeros(200)  # a branch with no flow reads zero: a state, not a fault
    readings = pd.concat([_series("FT-201", values), _series("FT-202", rest)])
    res = screen(readings, {"FT-201": FLOW, "FT-202": FLOW})
    ft201 = res.for_tag("FT-201")
    assert _flagged(ft201, "frozen") == list(range(180, 300))
    assert not ft201["usable"].iloc[180:].any()
    assert not res.for_tag("FT-202")["frozen"].any()
    tolerant = screen(
        _series("FT-201", np.r_[_noisy(10, 0.03, 3e-4), 0.03 + 1e-6 * np.sin(np.arange(90))]),
        {"FT-201": TagLimits(kind="flow", frozen_tolerance=1e-5)},
    )
    # changes below the tolerance are "no change": 90 min within 2e-6 is frozen
    assert _flagged(tolerant.flags, "frozen") == list(range(10, 100))


def test_hampel_removes_a_single_spike_but_not_a_step() -> None:
    values = _noisy(240, 0.030, 2e-4, seed=7)
    values[100] += 0.02  # one spike (100 sigma)
    values[160:] += 0.009  # a valve opened: +30 % flow, a step that stays
    res = screen(_series("FT-203", values), {"FT-203": FLOW})
    assert _flagged(res.flags, "spike") == [100]
    assert _flagged(res.flags, "rate") == []  # 0.009 m3/s in 60 s is a plausible rate
    assert res.usable.sum() == 239


def _hampel_by_definition(
    x: np.ndarray, floor: float, floor_rel: float, k: float = 3.0
) -> np.ndarray:
    # the noise of the whole series, from successive differences (white noise: σ√2)
    sigma = 1.4826 * np.median(np.abs(np.diff(x))) / np.sqrt(2.0)
    # and its resolution: the median spacing of the values held 3 times or more, when
    # at least 90 % of the samples sit on such levels
    values, counts = np.unique(x, return_counts=True)
    levels = values[counts >= 3]
    quantised = len(levels) > 1 and counts[counts >= 3].sum() >= 0.9 * len(x)
    step = float(np.median(np.diff(levels))) if quantised else 0.0
    out = np.zeros(len(x), dtype=bool)
    for i in range(len(x)):
        w = x[max(0, i - 3) : i + 4]
        if len(w) <= 3:
            continue
        med = np.median(w)
        mad = np.median(np.abs(w - med))
        scale = max(1.4826 * mad, floor, floor_rel * abs(med), sigma, step)
        out[i] = abs(x[i] - med) > k * scale
    return out


def test_hampel_matches_its_definition_on_noisy_data() -> None:
    rng = np.random.default_rng(3)
    a = _noisy(500, 2.0e5, 800.0, seed=4)
    a[rng.choice(500, 15, replace=False)] += rng.choice([-1, 1], 15) * 2.0e4
    b = _noisy(400, 0.05, 5e-4, seed=5)
    b[rng.choice(400, 10, replace=False)] *= 1.5
    readings = pd.concat([_series("PT-100", a), _series("FT-100", b)])
    res = screen(readings, {"PT-100": PRESSURE, "FT-100": FLOW})
    # Hampel 1974: 7-point window, 3 × 1.4826 × MAD (floored at the noise level here)
    expected_a = _hampel_by_definition(a, PRESSURE.noise_si, PRESSURE.noise_rel_si)
    expected_b = _hampel_by_definition(b, FLOW.noise_si, FLOW.noise_rel_si)
    np.testing.assert_array_equal(res.for_tag("PT-100")["spike"].to_numpy(), expected_a)
    np.testing.assert_array_equal(res.for_tag("FT-100")["spike"].to_numpy(), expected_b)
    assert expected_a.sum() >= 15  # every injected spike found (a noise outlier may join)


def test_hampel_matches_its_definition_on_quantised_readings() -> None:
    # A meter resolving 1e-4 m3/s: many samples sit exactly k × floor from their
    # neighbours, the edge of the shortcut that skips the medians of quiet samples.
    rng = np.random.default_rng(8)
    b = 0.002 + 1e-4 * np.round(rng.normal(0.0, 0.4, 600))
    b[rng.choice(600, 30, replace=False)] += 1e-4 * rng.choice([3.0, 3.5, 5.0], 30)
    res = screen(_series("FT-100", b), {"FT-100": FLOW})
    expected = _hampel_by_definition(b, FLOW.noise_si, FLOW.noise_rel_si)
    np.testing.assert_array_equal(res.for_tag("FT-100")["spike"].to_numpy(), expected)
    assert 0 < expected.sum() < 60


def test_a_coarse_gauge_stepping_between_levels_is_not_spiking() -> None:
    # issue 12: a gauge resolving 0.05 bar at about 0.07 bar working pressure reads 0.05
    # or 0.10 bar, now one level, now the other; that is its resolution, not spikes. A
    # real spike (1 bar) is still flagged.
    rng = np.random.default_rng(21)
    levels = 0.05e5 * np.round((0.07e5 + rng.normal(0.0, 0.02e5, 900)) / 0.05e5)
    levels[450] = 1.1e5
    res = screen(_series("PT-100", levels, freq="1s"), {"PT-100": PRESSURE})
    spikes = _flagged(res.for_tag("PT-100"), "spike")
    assert spikes == [450]
    expected = _hampel_by_definition(levels, PRESSURE.noise_si, PRESSURE.noise_rel_si)
    np.testing.assert_array_equal(res.for_tag("PT-100")["spike"].to_numpy(), expected)


def _hampel_with_gaps_by_definition(x: np.ndarray, floor: float, floor_rel: float) -> np.ndarray:
    """Hampel 1974 on one tag with missing samples: the window's known values only, and
    a majority of the 7 must be known; the noise σ from successive known samples."""
    known = x[np.isfinite(x)]
    sigma = 1.4826 * np.median(np.abs(np.diff(known))) / np.sqrt(2.0)
    out = np.zeros(len(x), dtype=bool)
    for i in range(len(x)):
        w = x[max(0, i - 3) : i + 4]
        w = w[np.isfinite(w)]
        if len(w) <= 3 or not np.isfinite(x[i]):
            continue
        med = np.median(w)
        mad = np.median(np.abs(w - med))
        out[i] = abs(x[i] - med) > 3.0 * max(1.4826 * mad, floor, floor_rel * abs(med), sigma)
    return out


def test_hampel_matches_its_definition_with_gaps_and_tag_edges() -> None:
    # Missing samples and tag boundaries inside windows: the shortcut that skips the
    # medians of quiet samples must not change a flag.
    rng = np.random.default_rng(11)
    parts, expected = [], {}
    for j, (tag, level, sigma) in enumerate(
        [("FT-101", 0.03, 3e-4), ("FT-102", 0.031, 1e-5), ("FT-103", 0.002, 2e-4)]
    ):
        x = level + rng.normal(0.0, sigma, 300)
        x[rng.choice(300, 12, replace=False)] += rng.choice([-1, 1], 12) * 8 * sigma
        x[rng.choice(300, 25, replace=False)] = np.nan
        x[:2] += 10 * sigma * (j + 1)  # spikes where the window meets the previous tag
        parts.append(_series(tag, x))
        expected[tag] = _hampel_with_gaps_by_definition(x, FLOW.noise_si, FLOW.noise_rel_si)
    res = screen(pd.concat(parts), {t: FLOW for t in expected})
    for tag, want in expected.items():
        np.testing.assert_array_equal(res.for_tag(tag)["spike"].to_numpy(), want)
    assert sum(int(w.sum()) for w in expected.values()) >= 10


def test_implausible_rate_is_flagged_once() -> None:
    values = _noisy(120, 3.0e5, 300.0, seed=2)
    values[60:] += 4.0e5  # +4 bar within one second: no pump or valve does that
    res = screen(_series("PT-100", values, freq="1s"), {"PT-100": PRESSURE})
    assert _flagged(res.flags, "rate") == [60]
    assert _flagged(res.flags, "spike") == []


def test_gaps_are_found_and_counted() -> None:
    times = pd.date_range(T0, periods=180, freq="1min")
    keep = (times < T0 + pd.Timedelta("60min")) | (times >= T0 + pd.Timedelta("90min"))
    keep &= times < T0 + pd.Timedelta("160min")  # silent for the last 20 min
    frame = _series("FT-203", _noisy(180, 0.03, 1e-4))[keep]
    end = T0 + pd.Timedelta("180min")
    res = screen(frame, {"FT-203": FLOW, "FT-204": FLOW}, start=T0, end=end)
    gaps = res.gaps
    assert list(gaps["tag"]) == ["FT-203", "FT-203", "FT-204"]
    # 00:59 → 01:30 between samples; 02:39 → 03:00 at the end; FT-204 never reported
    assert list(gaps["duration_s"]) == [31 * 60.0, 21 * 60.0, 180 * 60.0]
    assert _flagged(res.flags, "gap") == [60]
    assert res.usable.all()  # a gap marks where data resumed; the sample itself is fine
    counts = res.health_counts().set_index(["tag", "flag"])["count"]
    assert counts[("FT-203", "gap")] == 2 and counts[("FT-204", "gap")] == 1
    assert counts[("FT-203", "samples")] == 130


def test_out_of_range_quality_and_missing_values() -> None:
    flow = np.full(6, 0.03)
    flow[1], flow[2] = -0.01, -5e-5  # reverse flow beyond noise; within noise (ok)
    pressure = np.array([3e5, -1.5e5, 3e5, 3e5, 12e5, 3e5])  # below −1 bar g; above high
    temperature = np.array([25.0, 120.0, np.nan, 25.0, 25.0, -2.0])  # 0–100 °C for water
    quality = np.array([True, True, True, False, True, True])
    readings = pd.concat(
        [
            _series("FT-203", flow),
            _series("PT-100", pressure),
            _series("TT-100", temperature, good=quality),
        ]
    )
    specs = {
        "FT-203": FLOW,
        "PT-100": TagLimits(kind="pressure", high=10e5),
        "TT-100": TagLimits(kind="temperature"),
    }
    res = screen(readings, specs)
    assert _flagged(res.for_tag("FT-203"), "out_of_range") == [1]
    assert _flagged(res.for_tag("PT-100"), "out_of_range") == [1, 4]
    tt = res.for_tag("TT-100")
    assert _flagged(tt, "out_of_range") == [1, 5]
    assert _flagged(tt, "no_value") == [2]
    assert _flagged(tt, "bad_quality") == [3]
    assert _flagged(tt, "usable") == [0, 4]


def test_every_flag_is_counted_per_tag_and_day() -> None:
    values = _noisy(2 * 1440, 0.03, 1e-4, seed=11)
    values[[100, 900]] += 0.02  # two spikes on day one
    values[1440 + 50] += 0.02  # one on day two
    values[1440 + 300] = -0.5  # out of range on day two
    good = np.ones(2 * 1440, bool)
    good[10:13] = False
    res = screen(_series("FT-203", values, good=good), {"FT-203": FLOW})
    counts = res.health_counts()
    assert list(counts.columns) == ["tag", "day", "flag", "count"]
    by_key = {(f, d.isoformat()[:10]): n for f, d, n in counts[["flag", "day", "count"]].values}

    def count(flag: str, day: str) -> int:
        return int(by_key.get((flag, day), 0))

    assert count("spike", "2025-03-01") == 2 and count("spike", "2025-03-02") == 1
    assert count("bad_quality", "2025-03-01") == 3 and count("bad_quality", "2025-03-02") == 0
    assert count("out_of_range", "2025-03-02") == 1
    assert count("samples", "2025-03-01") == 1440 and count("usable", "2025-03-01") == 1435
    assert count("frozen", "2025-03-01") == 0 and count("rate", "2025-03-02") == 0
    assert counts["count"].dtype == np.int64 and (counts["count"] > 0).all()


def test_transients_are_not_steady() -> None:
    grid = pd.date_range(T0, periods=240, freq="1min", name="time")
    flow = _noisy(240, 0.030, 1e-4, seed=8)
    flow[120:] += 0.010  # a valve move at 02:00
    pressure = _noisy(240, 3.0e5, 300.0, seed=9)
    pressure[120:] -= 0.3e5
    wide = pd.DataFrame({"FT-203": flow, "PT-100": pressure}, index=grid)
    steady = steady_mask(wide, ["FT-203"], ["PT-100"])
    # The 15-min centred window sees the step from 01:53 to 02:07.
    assert not steady.iloc[113:127].any()
    assert steady.iloc[10:100].all() and steady.iloc[140:230].all()


def test_pump_off_and_startup_are_excluded() -> None:
    pressure = _noisy(300, 3.0e5, 300.0, seed=12)
    pressure[100:150] = 0.05e5  # pump stopped for 50 min
    flow = _noisy(300, 0.03, 1e-4, seed=13)
    flow[100:150] = 0.0
    readings = pd.concat([_series("PT-100", pressure), _series("FT-203", flow)])
    res = screen(readings, {"PT-100": PRESSURE, "FT-203": FLOW}, header_pressure_tag="PT-100")
    ft = res.for_tag("FT-203")
    assert _flagged(ft, "pump_off") == list(range(100, 150))
    assert _flagged(ft, "startup") == list(range(150, 160))  # 10 min settling
    assert ft["usable"].sum() == 240
    wide = to_wide(readings, "1min")
    running = running_mask(wide, "PT-100", "FT-203", settle=False)
    assert int((~running).sum()) == 50


def test_to_wide_means_good_samples_on_a_regular_grid() -> None:
    frame = pd.DataFrame(
        {
            "time": pd.to_datetime(
                [
                    "2025-03-01T00:00:05Z",
                    "2025-03-01T00:00:35Z",
                    "2025-03-01T00:00:40Z",
                    "2025-03-01T00:03:00Z",
                ]
            ),
            "tag": ["FT-203", "FT-203", "FT-203", "PT-100"],
            "value": [0.02, 0.04, 9.0, 3.0e5],
            "good": [True, True, False, True],
        }
    )
    wide = to_wide(frame, "1min")
    assert list(wide.columns) == ["FT-203", "PT-100"]
    assert list(wide.index) == list(pd.date_range(T0, periods=4, freq="1min"))
    assert wide["FT-203"].iloc[0] == pytest.approx(0.03)  # the bad 9.0 is left out
    assert wide["FT-203"].iloc[1:].isna().all()
    grid = to_wide(frame, "30s", start=T0, end=T0 + pd.Timedelta("5min"))
    assert len(grid) == 10
    assert str(grid.index.dtype) == "datetime64[ns, UTC]"  # the project's time type


def test_bad_input_names_the_argument() -> None:
    frame = _series("FT-203", np.ones(3))
    with pytest.raises(ValueError, match="timezone-aware"):
        screen(frame.assign(time=frame["time"].dt.tz_localize(None)), {})
    with pytest.raises(ValueError, match="readings lacks columns"):
        screen(frame.drop(columns="good"), {})
    with pytest.raises(ValueError, match="low must be below high"):
        TagLimits(kind="flow", low=1.0, high=0.5)
    with pytest.raises(ValueError, match="max_gap_s must be > 0"):
        ScreenSettings(max_gap_s=0)
    with pytest.raises(KeyError, match="PT-999"):
        running_mask(to_wide(frame, "1min"), "PT-999")
