"""Fouling: a slow rise of r, and its end by an unlogged cleaning.

A rise over trailing look-backs of ``trend_lookbacks`` windows: Theil–Sen slope,
Mann–Kendall test with the Hamed–Rao correction at ``trend_alpha``, a fitted rise of
``min_rise_r`` (relative) and ``min_rise_sigma`` σ, on ``trend_persistence`` windows in a
row; the onset is the knot of the best "flat, then line" fit; the date r reaches the
cleaning limit is forecast with an interval (Theil–Sen slope interval widened by the
Hamed–Rao factor). Once the recent level passes the cleaning limit the finding says on
which day, and its evidence ``priority`` turns high. A fall of r back into the lower half
of the rise, below the limit, for ``verify_windows`` usable windows with no maintenance
logged is an unlogged cleaning (or a removed restriction): the finding ends at the fall
and a new baseline starts (`FoulingDetector.unlogged_fall`).
"""

from __future__ import annotations

import logging
import math
from collections.abc import Sequence

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from monitor.analysis.replay_text import (
    fouling_forecast,
    fouling_levelled,
    fouling_rising,
    on_day,
    unlogged_fall,
)
from monitor.analysis.replay_track import DAY, BranchTrack, Change, OpenFinding
from monitor.analysis.trend import (
    TheilSen,
    crossing_forecast,
    mann_kendall,
    median,
    sen_slope,
    theil_sen,
)

__all__ = ["FoulingDetector"]

logger = logging.getLogger(__name__)


class FoulingDetector:
    """Fouling of one branch, window by window (see the module docstring)."""

    def __init__(self, track: BranchTrack) -> None:
        self.t = track
        self.reset()
        track.on_restart.append(self.reset)

    def reset(self) -> None:
        self.trend_hits = 0  # windows in a row the trend test passed

    def window(self, i: int) -> list[Change]:
        """Window i (usable, the segment has its baseline): the trend, then a fall."""
        n = len(self.t.changes)
        self._fouling(i)
        self.unlogged_fall(i)
        return self.t.since(n)

    def _fouling(self, i: int) -> None:
        base = self.t.seg.base
        assert base is not None
        if len(self.t.seg.trend) < self.t.cfg.min_trend_windows or self.t.seg.trend[-1] != i:
            return
        fouling = self.t.open_findings.get("fouling")
        if fouling is None:
            found = self._trend_test()
            self.trend_hits = self.trend_hits + 1 if found is not None else 0
            if found is None or self.trend_hits < self.t.cfg.trend_persistence:
                return
            pts, fit = found
            ref = self._trend_ref(pts)
            t_on = self._onset(self.t.day[pts], self.t.r[pts])
            start = self.t.t0 + t_on * DAY
            fouling = OpenFinding("fouling", start, self.t.we[i], 0.0, {}, "", ref=ref)
            self.t.open(fouling)
        # evidence from the windows since the onset (at least 6 of them)
        pts = [j for j in self.t.seg.trend if self.t.ws[j] >= fouling.start]
        if len(pts) < 6:
            pts = self.t.seg.trend[-6:]
        pts = pts[-self.t.cfg.max_trend_windows :]
        t = self.t.day[pts]
        y = self.t.r[pts]
        fit = theil_sen(t, y)
        mk = mann_kendall(y)
        rise = max(fit.intercept + fit.slope * t[-1] - fouling.ref, 0.0)
        # Theil–Sen's slope interval assumes independent windows: widen it by the
        # Hamed–Rao variance factor so the forecast interval is honest.
        widen = math.sqrt(max(mk.correction, 1.0))
        wide = TheilSen(
            slope=fit.slope, intercept=fit.intercept,
            slope_low=fit.slope - widen * (fit.slope - fit.slope_low),
            slope_high=fit.slope + widen * (fit.slope_high - fit.slope),
            confidence=fit.confidence, n=fit.n,
        )  # fmt: skip
        limit = self.t.bs.cleaning_limit_r
        cross = crossing_forecast(wide, limit=limit, t_now=t[-1])
        horizon = 3650.0  # forecasts beyond ten years are "not in sight" [d]
        if cross.eta is not None and cross.eta > horizon:
            cross = type(cross)(cross.level_now, None, cross.eta_low, None, False)
        if cross.eta_low is not None and cross.eta_low > horizon:
            cross = type(cross)(cross.level_now, cross.eta, None, cross.eta_high, False)
        if cross.eta_high is not None and cross.eta_high > horizon:
            cross = type(cross)(cross.level_now, cross.eta, cross.eta_low, None, False)
        nan = math.nan
        fouling.evidence = {
            "slope_per_day": fit.slope, "slope_low_per_day": wide.slope_low,
            "slope_high_per_day": wide.slope_high, "mk_z": mk.z, "mk_p": mk.p,
            "hamed_rao_factor": mk.correction, "windows": float(len(pts)),
            "r_baseline": fouling.ref, "r_now": cross.level_now, "rise_r": rise,
            "cleaning_limit_r": limit,
            "days_to_limit": nan if cross.eta is None else cross.eta,
            "days_to_limit_low": nan if cross.eta_low is None else cross.eta_low,
            "days_to_limit_high": nan if cross.eta_high is None else cross.eta_high,
        }  # fmt: skip
        # How sure the branch is fouled: the trend's verdict while r climbs, and once it
        # levels off (a deposit that stopped growing is still there) how far the recent
        # level stands above the baseline, against the day-to-day scatter.
        level = median(self.t.r[self.t.seg.trend[-7:]])
        above = max(level - fouling.ref, 0.0)
        settled = (1.0 - math.exp(-above / self.t.cfg.min_rise_r)
                   if above >= self.t.cfg.min_rise_sigma * base.sigma_r else 0.0)
        fouling.evidence["r_recent"] = level
        if level >= limit and fouling.limit_passed is None:
            # the date it passed: the first of the recent windows at or above the limit
            recent = self.t.seg.trend[-7:]
            fouling.limit_passed = min(self.t.ws[j] for j in recent if self.t.r[j] >= limit)
        passed = fouling.limit_passed
        fouling.evidence["limit_passed_s"] = nan if passed is None else passed.timestamp()
        fouling.evidence["priority"] = 2.0 if passed is None else 3.0  # `PRIORITIES`
        fouling.confidence = max(
            (1.0 - mk.p) * (1.0 - math.exp(-rise / self.t.cfg.min_rise_r)), settled
        )
        rising = mk.p < self.t.cfg.trend_alpha and fit.slope > 0
        t_last = self.t.ws[i]
        # the forecast as dates (UTC seconds since 1970), for the report to show as the
        # message does: the interval runs from the earliest to the latest date
        for key, eta in (("limit_date_s", cross.eta), ("limit_date_low_s", cross.eta_low),
                         ("limit_date_high_s", cross.eta_high)):
            fouling.evidence[key] = (
                nan if eta is None else (t_last + eta * DAY).timestamp()
            )
        on: list[str | None] = [None, None, None]  # the forecast's dates, when one is stated
        if passed is None and not cross.reached and cross.eta is not None:
            on = [None if x is None else self.t.when(t_last + x * DAY)
                  for x in (cross.eta, cross.eta_low, cross.eta_high)]  # fmt: skip
        passed_day = None if passed is None else self.t.when(passed)
        if rising:
            when = fouling_forecast(limit, passed=passed_day, reached=cross.reached, eta=on[0],
                                    low=on[1], high=on[2])  # fmt: skip
            fouling.message = fouling_rising(
                self.t.name, fouling.ref, cross.level_now, fit.slope, when
            )
        else:
            span = float((self.t.we[pts[-1]] - self.t.ws[pts[0]]) / DAY)
            fouling.message = fouling_levelled(
                self.t.name, fouling.ref, level, self.t.when(fouling.start), span, fit.slope,
                limit, passed_day,
            )

    def unlogged_fall(self, i: int) -> None:
        """A fouled r back near its baseline with no maintenance logged: an unlogged
        cleaning (or a removed restriction). Once ``verify_windows`` usable windows in a
        row stand in the lower half of the rise (and below the cleaning limit) and the
        fall from the peak is beyond the day-to-day scatter, the finding ends at the fall
        and a new baseline is taken, as after a logged cleaning."""
        f = self.t.open_findings.get("fouling")
        if f is None or self.t.seg.base is None or not self.t.seg.usable:
            return
        level = float(median(self.t.r[self.t.seg.usable[-5:]]))
        if not math.isfinite(f.peak) or level > f.peak:
            f.peak = level
        rise = f.peak - f.ref
        if rise < self.t.cfg.min_rise_r * f.ref:
            return
        mid = f.ref + 0.5 * rise
        run: list[int] = []
        for j in reversed(self.t.seg.usable):
            if self.t.r[j] > mid:
                break
            run.append(j)
        if len(run) < self.t.cfg.verify_windows:
            return
        after = float(median(self.t.r[run]))
        scatter = 3.0 * self.t.seg.base.sigma_r * f.peak / self.t.seg.base.r0
        if after >= self.t.bs.cleaning_limit_r or f.peak - after < scatter:
            return
        fall = run[-1]
        at = self.t.at[fall]
        day = self.t.when(at, fall)
        limit = self.t.bs.cleaning_limit_r
        passed = None if f.limit_passed is None else self.t.when(f.limit_passed)
        f.evidence.update({"r_peak": f.peak, "r_after_fall": after,
                           "fall_s": pd.Timestamp(at).timestamp(), "unlogged": 1.0})  # fmt: skip
        f.message = unlogged_fall(
            self.t.name, f.ref, f.peak, self.t.when(f.start), limit, passed, day, after,
            on_day(at, self.t.cfg.timezone),
        )
        f.note = ""
        logger.info("%s: r fell from %.3f to %.3f on %s, no maintenance logged",
                    self.t.name, f.peak, after, day)  # fmt: skip
        self.t.end("fouling", at)
        rst = self.t.open_findings.get("restriction")
        if rst is not None and after < rst.ref + rst.step / 2:
            self.t.end("restriction", at)
        self.t.first_segment = False
        self.t.new_segment()

    def _trend_ref(self, pts: Sequence[int]) -> float:
        """Reference level of a rise: the baseline, or the level after the last step."""
        base = self.t.seg.base
        assert base is not None
        if self.t.seg.trend and self.t.seg.trend[0] in self.t.seg.base_idx:
            return base.r0
        return float(median(self.t.r[self.t.seg.trend[:5]]))

    @staticmethod
    def _onset(t_list: NDArray[np.float64], y: NDArray[np.float64]) -> float:
        """Onset of a rise: the knot of the best "flat, then straight line" fit [d]."""
        t = np.asarray(t_list, dtype=np.float64)
        best, t_best = math.inf, float(t[0])
        for knot in t[:-5]:
            a = np.column_stack([np.ones_like(t), np.clip(t - knot, 0.0, None)])
            coef, *_ = np.linalg.lstsq(a, y, rcond=None)
            sse = float(np.sum((y - a @ coef) ** 2))
            if coef[1] > 0 and sse < best:
                best, t_best = sse, float(knot)
        return t_best

    def _trend_test(self) -> tuple[list[int], TheilSen] | None:
        """Test the trailing windows for a rise, over several look-backs.

        One look-back over the whole segment would see "flat, then rising": the single
        Theil–Sen line leaves a V-shaped residual that the Hamed–Rao correction reads as
        strong autocorrelation, and the test loses its power. The trailing look-backs
        catch a ramp while it is still nearly straight; each must also show a fitted rise
        of ``min_rise_r``, which keeps the multiple looks from adding false findings.
        """
        n = len(self.t.seg.trend)
        ref = self._trend_ref(self.t.seg.trend)
        # cheap necessary condition first: the recent windows stand clearly above the
        # reference (most windows of most branches stop here)
        if float(median(self.t.r[self.t.seg.trend[-7:]])) - ref < 0.5 * self.t.cfg.min_rise_r * ref:
            return None
        for look in self.t.cfg.trend_lookbacks:
            if look > n and look != self.t.cfg.trend_lookbacks[0]:
                break
            pts = self.t.seg.trend[-min(look, n) :]
            if len(pts) < min(look, self.t.cfg.min_trend_windows):
                continue
            t = self.t.day[pts]
            y = self.t.r[pts]
            slope, _ = sen_slope(t, y)
            if slope * (t[-1] - t[0]) < self.t.cfg.min_rise_r * float(median(y[:5])):
                continue
            level = float(median(y) + slope * (t[-1] - median(t)))
            base = self.t.seg.base
            assert base is not None
            scale = base.sigma_r * max(ref / base.r0, 1.0)
            if level - ref < max(self.t.cfg.min_rise_r * ref, self.t.cfg.min_rise_sigma * scale):
                continue
            mk = mann_kendall(y)
            if mk.z > 0 and mk.p < self.t.cfg.trend_alpha:
                return pts, theil_sen(t, y)
        return None
