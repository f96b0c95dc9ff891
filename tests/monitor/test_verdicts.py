"""Window verdicts a user can act on: each names its cause and the setting that governs it.

A small invented test rig (issue 9 part 1, issue 12): 1-second samples, 5-minute windows,
no pump curve, flow logged in L/min, one branch to an open discharge half a metre up.
The readings are made here from the branch model itself (r = 1), so a fit of clean data
must give r = 1 and every refusal must come from the condition it names.
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from typing import Any

import numpy as np
import pandas as pd
import pytest

from adapters.fit_record import WindowFit
from monitor.analysis.window import analyze_window
from monitor.site.config import Site, parse_site

START = datetime(2026, 3, 2, 9, 0, tzinfo=UTC)
WINDOW = timedelta(minutes=5)
LPM = 1e-3 / 60.0  # L/min in m^3/s (SI Brochure: L = 1e-3 m^3)


def _rig(**header: Any) -> Site:
    doc: dict[str, Any] = {
        "site": {"name": "Bench rig", "timezone": "UTC"},
        "source": {"kind": "csv", "path": "inbox/"},
        "header": {"pressure": {"tag": "PT 1", "unit": "bar"}, **header},
        "analysis": {"window": "5 min", "sample_period": "1 s", "min_samples": 30},
        "branch": [{
            "name": "loop", "flow": {"tag": "FT 1", "unit": "L/min"}, "min_flow": "20 L/min",
            "termination": {"kind": "open", "elevation": "0.5 m"},
            "elements": [{"pipe": {"length": "1 m", "inner_diameter": "20 mm",
                                   "roughness": "0.0015 mm"}}],
        }],
    }
    return parse_site(doc, path="rig.toml")


def _readings(p_pa: np.ndarray, q_m3s: np.ndarray) -> pd.DataFrame:
    t = pd.date_range(START, periods=len(p_pa), freq="1s")
    return pd.DataFrame({
        "time": np.concatenate([t, t]),
        "tag": np.array(["PT 1"] * len(t) + ["FT 1"] * len(t), dtype=object),
        "value": np.concatenate([p_pa, q_m3s]),
        "good": True,
    })


def _clean(site: Site, q_m3s: np.ndarray, noise_pa: float = 30.0) -> np.ndarray:
    rng = np.random.default_rng(4)
    return site.branches[0].model.dp(q_m3s) + rng.normal(0.0, noise_pa, len(q_m3s))


def _flow(level_lpm: float = 30.0, n: int = 300) -> np.ndarray:
    rng = np.random.default_rng(9)
    return level_lpm * LPM * (1.0 + 0.002 * rng.standard_normal(n))


def _verdict(site: Site, readings: pd.DataFrame) -> WindowFit:
    fits = analyze_window(site, readings, START, START + WINDOW).fits
    assert len(fits) == 1
    return fits[0]


def test_clean_second_data_fits_in_a_five_minute_window() -> None:
    site = _rig(running_pressure="0.02 bar")
    q = _flow()
    fit = _verdict(site, _readings(_clean(site, q), q))
    assert fit.status == "ok", fit.message
    assert fit.r == pytest.approx(1.0, abs=0.02)  # data made with r = 1


def test_a_pump_below_the_running_pressure_is_named_with_its_setting() -> None:
    site = _rig()  # default running pressure 0.5 bar; the rig works near 0.07 bar
    q = _flow()
    fit = _verdict(site, _readings(_clean(site, q), q))
    text = fit.message
    assert "pump counted as stopped" in text
    assert "[header] running_pressure" in text
    assert "0.5 bar" in text
    assert "no readings" not in text  # the readings are there


def test_a_coarse_gauge_is_not_identifiable_and_says_by_how_much() -> None:
    site = _rig(running_pressure="0.02 bar")
    q = _flow()
    step = 0.05e5  # the gauge resolves 0.05 bar
    p = step * np.round(_clean(site, q, noise_pa=800.0) / step)
    fit = _verdict(site, _readings(p, q))
    drop = float(site.branches[0].model.dp_dynamic(30 * LPM))
    assert fit.status == "not_identifiable"
    assert fit.message.startswith("not identifiable: PT 1 resolves 0.05 bar")
    assert f"dynamic drop is {drop / 1e5:.3g} bar" in fit.message


def test_unsteady_pressure_names_the_tag_the_band_and_its_setting() -> None:
    site = _rig(running_pressure="0.02 bar")
    q = _flow()
    p = _clean(site, q) * (1.0 + 0.15 * np.sin(np.arange(300) * 2 * np.pi / 40.0))
    fit = _verdict(site, _readings(p, q))
    text = fit.message
    assert fit.status == "too_few_samples"
    assert "where PT 1 was not steady" in text
    assert "3.0 % allowed, [analysis] steady_pressure_band" in text
    assert "[analysis] min_samples" in text


def test_flow_below_the_fits_floor_is_named() -> None:
    site = _rig(running_pressure="0.02 bar")
    q = _flow(3.0)  # 3 L/min on a branch whose min_flow is 20 L/min
    fit = _verdict(site, _readings(_clean(site, q), q))
    assert fit.status == "too_few_samples"
    # a quarter of min_flow is 5 L/min; the fit's floor for any branch, 1e-4 m3/s, is more
    assert "with flow at or below 6 L/min (the fit's floor for any branch)" in fit.message


def test_header_and_pump_running_pressures_must_agree() -> None:
    from monitor.site.config import ConfigError

    doc_site = _rig(running_pressure="0.02 bar")
    assert doc_site.running_pressure_pa == pytest.approx(2000.0)
    with pytest.raises(ConfigError, match="running_pressure"):
        parse_site({
            "site": {"name": "x", "timezone": "UTC"},
            "source": {"kind": "csv", "path": "inbox/"},
            "header": {"pressure": {"tag": "P", "unit": "bar"}, "running_pressure": "0.1 bar"},
            "pump": {"curve": [{"flow": "0 m3/h", "head": "10 m"},
                               {"flow": "5 m3/h", "head": "9 m"},
                               {"flow": "10 m3/h", "head": "7 m"}],
                     "running_pressure": "0.3 bar"},
            "branch": [{"name": "b", "flow": {"tag": "F", "unit": "m3/h"},
                        "termination": {"kind": "open"},
                        "elements": [{"pipe": {"length": "1 m", "inner_diameter": "20 mm"}}]}],
        }, path="x.toml")
