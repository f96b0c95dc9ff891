"""Tests of monitor.analysis.trend against reference libraries and published figures."""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from scipy import stats

from monitor.analysis.trend import crossing_forecast, cusum, mann_kendall, mean_shift, theil_sen


def _ar1(rng: np.random.Generator, n: int, rho: float, size: int = 1) -> np.ndarray:
    e = rng.normal(size=(size, n))
    x = np.empty_like(e)
    x[:, 0] = e[:, 0] / np.sqrt(1 - rho**2)
    for i in range(1, n):
        x[:, i] = rho * x[:, i - 1] + e[:, i]
    return x


def test_theil_sen_is_median_of_pairwise_slopes() -> None:
    # Sen (1968): the estimator is the median of (y_j − y_i)/(t_j − t_i); brute force here.
    rng = np.random.default_rng(3)
    t = np.sort(rng.uniform(0, 50, 25))
    y = 1.0 + 0.02 * t + rng.normal(0, 0.05, 25)
    pairs = [(y[j] - y[i]) / (t[j] - t[i]) for i, j in itertools.combinations(range(25), 2)]
    fit = theil_sen(t, y)
    assert fit.slope == pytest.approx(float(np.median(pairs)), rel=1e-12)
    assert fit.slope_low <= fit.slope <= fit.slope_high


def test_theil_sen_rejects_bad_input() -> None:
    with pytest.raises(ValueError, match="y"):
        theil_sen([0, 1, 2], [1.0, np.nan, 2.0])
    with pytest.raises(ValueError, match="same length"):
        theil_sen([0, 1, 2, 3], [1.0, 2.0, 3.0])


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_mann_kendall_agrees_with_scipy_kendalltau(seed: int) -> None:
    # Without ties, MK's S/(n(n−1)/2) is Kendall's tau between time and y, and
    # S/sqrt(Var S) is the normal score scipy.stats.kendalltau(method="asymptotic")
    # uses (scipy applies no continuity correction).
    rng = np.random.default_rng(seed)
    n = 60
    y = rng.normal(size=n) + 0.01 * np.arange(n)
    mk = mann_kendall(y, hamed_rao=False)
    kt = stats.kendalltau(np.arange(n), y, method="asymptotic")
    assert mk.tau == pytest.approx(float(kt.statistic), rel=1e-12)
    z_scipy = float(stats.norm.isf(kt.pvalue / 2.0)) * np.sign(kt.statistic)
    assert mk.s / np.sqrt(mk.var_s) == pytest.approx(z_scipy, rel=1e-9)
    assert mk.correction == 1.0


def test_mann_kendall_variance_with_ties() -> None:
    # Kendall (1975) tie correction: Var S = [n(n−1)(2n+5) − Σ t(t−1)(2t+5)]/18.
    # y = 1,1,2,3,3,3 (n=6): ties of 2 and 3 → (6·5·17 − 2·1·9 − 3·2·11)/18 = 426/18.
    mk = mann_kendall([1, 1, 2, 3, 3, 3], hamed_rao=False)
    assert mk.var_s == pytest.approx(426 / 18)
    # S by hand: pairs with y_j > y_i: 1→2 (2), 1→3 (6), 2→3 (3) = 11; none negative.
    assert mk.s == 11


def test_hamed_rao_restores_test_size_on_ar1_noise() -> None:
    # Hamed & Rao (1998): serial correlation inflates the rejection rate of the plain MK
    # test on trend-free data; their variance correction brings it back towards the
    # nominal level. AR(1) with rho = 0.6, n = 100, 5 % test.
    rng = np.random.default_rng(11)
    series = _ar1(rng, 100, 0.6, size=300)
    plain = np.mean([mann_kendall(s, hamed_rao=False).p < 0.05 for s in series])
    corrected = np.mean([mann_kendall(s).p < 0.05 for s in series])
    # Measured here: plain 32 %, corrected 16 %. The correction remains liberal for
    # strong positive correlation (it screens lags with a noisy ACF); the diagnosis
    # therefore also demands a practically large rise, not only a small p.
    assert plain > 0.25  # far above 5 %: the problem the correction addresses
    assert corrected < 0.2
    assert corrected < plain * 0.6


def test_hamed_rao_is_neutral_on_white_noise() -> None:
    rng = np.random.default_rng(5)
    rates = np.mean([mann_kendall(rng.normal(size=80)).p < 0.05 for _ in range(300)])
    assert 0.01 < rates < 0.10  # nominal 5 % (binomial 300 draws: sd 1.3 %)


def test_hamed_rao_detects_real_trend() -> None:
    rng = np.random.default_rng(8)
    y = 1.0 + 0.004 * np.arange(60) + 0.015 * _ar1(rng, 60, 0.5)[0] * np.sqrt(1 - 0.25)
    mk = mann_kendall(y)
    assert mk.z > 3 and mk.p < 0.01


def _arl(shift: float, h: float, runs: int, length: int, seed: int) -> float:
    rng = np.random.default_rng(seed)
    lengths = []
    for _ in range(runs):
        x = rng.normal(shift, 1.0, length)
        c = cusum(x, target=0.0, sigma=1.0, k=0.5, h=h)
        assert c.alarm is not None
        lengths.append(c.alarm + 1)
    return float(np.mean(lengths))


def test_cusum_out_of_control_run_length() -> None:
    # Montgomery, Introduction to Statistical Quality Control, ARL table of the tabular
    # CUSUM for k = 1/2 (from memory): shift 1σ → ARL 10.4 (h = 5), 8.38 (h = 4).
    assert _arl(1.0, 5.0, 1500, 80, seed=1) == pytest.approx(10.4, rel=0.06)
    assert _arl(1.0, 4.0, 1500, 80, seed=2) == pytest.approx(8.38, rel=0.06)


def test_cusum_in_control_run_length() -> None:
    # Same table (from memory): the two-sided tabular CUSUM with k = 1/2, h = 4 has an
    # in-control ARL of 168 (and 465 for h = 5).
    assert _arl(0.0, 4.0, 800, 1500, seed=3) == pytest.approx(168.0, rel=0.12)


def test_cusum_change_point_estimate() -> None:
    rng = np.random.default_rng(4)
    x = np.concatenate([rng.normal(0, 1, 40), rng.normal(3, 1, 20)])
    c = cusum(x, target=0.0, sigma=1.0, k=1.5, h=5.0)
    assert c.direction == 1
    assert c.alarm is not None and 40 <= c.alarm <= 45
    assert c.change is not None and abs(c.change - 40) <= 2


def test_mean_shift_matches_brute_force() -> None:
    rng = np.random.default_rng(6)
    y = np.concatenate([rng.normal(1.0, 0.02, 17), rng.normal(1.3, 0.02, 9)])
    ms = mean_shift(y)
    sse = [np.var(y[:i]) * i + np.var(y[i:]) * (26 - i) for i in range(2, 25)]
    assert ms.index == 2 + int(np.argmin(sse))
    assert ms.index == 17
    assert ms.step == pytest.approx(y[17:].mean() - y[:17].mean())
    assert ms.t > 20


def test_crossing_forecast() -> None:
    fit = theil_sen(np.arange(40.0), 1.0 + 0.01 * np.arange(40.0))
    c = crossing_forecast(fit, limit=1.5, t_now=39.0)
    assert not c.reached
    assert c.eta == pytest.approx(11.0)  # (1.5 − 1.39)/0.01
    done = crossing_forecast(fit, limit=1.2, t_now=39.0)
    assert done.reached and done.eta == 0.0
    flat = theil_sen(np.arange(10.0), np.ones(10))
    assert crossing_forecast(flat, limit=1.5, t_now=9.0).eta is None
