"""Steps of r: a restriction, a back-pressure change, or the flow meter.

A window's ``r`` that stands ``step_z`` σ above the level predicted from the recent
windows (Theil–Sen extrapolation) and at least ``min_step_rel`` above it, most of that
rise since the last one or two accepted windows (a fouling ramp climbs a little every
window: never a step); a window whose departure from the baseline model is a clear
constant offset (``offset``); or a tabular CUSUM (Page 1954) on the prediction errors
past ``cusum_h`` that a single mean shift explains better than a line or "flat, then a
line" (``cusum``): a step candidate. The next window confirms it (an outlier fit is not a
step) and names its cause (`StepDetector._classify`): the meter when the header mass
balance moved with it (``instrument``), a constant offset (``back_pressure``, taken out
of the later windows' r), else an offset ∝ Q² (``restriction``). A jump large and clean
enough is reported in its own window (evidence ``confirmed`` 0) and confirmed, or ended,
by the next. See `monitor.analysis.replay` for the whole.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from monitor.analysis.baseline import offset_comparison
from monitor.analysis.replay_text import back_pressure_changed, resistance_step
from monitor.analysis.replay_track import BranchTrack, Change, OpenFinding
from monitor.analysis.trend import mean_shift, median, robust_sigma, sen_slope

__all__ = ["StepDetector"]


@dataclass(frozen=True)
class Pending:
    """A step candidate waiting for the next window: where, how big, what saw it."""

    j: int  # the window it showed in
    z: float  # its prediction error in σ [-]
    e: float  # its prediction error [-]
    first: int  # first window of the change (the CUSUM change point)
    trigger: str  # "jump", "offset" or "cusum"
    dc: float  # constant-offset change for "offset" [Pa]


class StepDetector:
    """Steps of one branch's r, window by window (see the module docstring)."""

    def __init__(self, track: BranchTrack) -> None:
        self.t = track
        self.rel_errors: list[float] = []  # relative prediction errors of accepted windows
        self.reset()
        track.on_restart.append(self.reset)

    def reset(self) -> None:
        """A new level: the CUSUM, the candidate and the previous deviation start again."""
        self.cusum = 0.0
        self.cusum_start = -1  # first window of the current CUSUM run
        self.pending: Pending | None = None
        self.prev_dev: tuple[int, float, float] = (-1, 0.0, math.nan)  # (window, z, offset)

    def window(self, i: int) -> list[Change]:
        """Window i (usable, the segment has its baseline); what it opened and ended."""
        n = len(self.t.changes)
        self._steps(i)
        return self.t.since(n)

    def _predict(self, i: int) -> float | None:
        pts = self.t.seg.level[-self.t.cfg.level_windows :]
        if len(pts) < 2:
            return None
        y = self.t.r[pts]
        if len(pts) < 7:
            return float(median(y))
        t = self.t.day[pts]
        slope, _ = sen_slope(t, y)
        # a falling level is not extrapolated: r does not foul backwards
        return float(median(y) + max(slope, 0.0) * (self.t.day[i] - median(t)))

    def _steps(self, i: int) -> None:
        base = self.t.seg.base
        assert base is not None
        if self.pending is not None:
            if self._confirmed(i):
                # A ramp cannot pass the window-to-window rise test of `_jump_rise`, so
                # the confirming window decides: a step part-way through window j shows
                # in full here.
                self._decide_step(i)
                return
            # one window out of line and back again: an outlier fit, not a step
            self.pending = None
        self._confirm_at_once(i)
        rst = self.t.open_findings.get("restriction")
        if rst is not None and self.t.r[i] < rst.ref + rst.step / 2:
            self.t.end("restriction", self.t.ws[i])
            self.t.restart(i)
            return
        pred = self._predict(i)
        if pred is None:
            self.t.seg.level.append(i)
            self.t.seg.trend.append(i)
            return
        e = float(self.t.r[i] - pred)
        # Scatter of the relative prediction error [-]: the baseline's (a fourteen-window
        # estimate, often low under AR(1) correlation) or, once there are enough, that of
        # the recent prediction errors, whichever is larger. r's scatter is relative, so
        # σ scales with the predicted level.
        rel = 1.25 * base.sigma_r / base.r0
        if len(self.rel_errors) >= 10:
            rel = max(rel, robust_sigma(self.rel_errors[-60:]))
        z = e / (rel * pred)
        if self.cusum == 0.0:
            self.cusum_start = i
        self.cusum = max(0.0, self.cusum + z - self.t.cfg.cusum_k)
        big = (
            abs(e) >= self.t.cfg.min_step_rel * pred
            and abs(z) >= self.t.cfg.step_z
            and self._jump_rise(i, e, pred)
        )
        dc = self._offset_change(i)
        trigger = ""
        if big:
            trigger = "jump"
        elif math.isfinite(dc) and self._offset_rise(dc):
            trigger = "offset"
        elif self.cusum > self.t.cfg.cusum_h and self._cusum_step(i):
            trigger = "cusum"
        if trigger:
            first = self.cusum_start if trigger == "cusum" else i  # Page's change point
            self.pending = Pending(i, z, e, first, trigger, 0.0 if math.isnan(dc) else dc)
            if trigger != "cusum" and self._began_before(i, z, dc):
                # the window before already leaned the same way: the step began part-way
                # through it, and it confirms this one
                self.pending = Pending(i, z, e, self.prev_dev[0], trigger, self.pending.dc)
                if self._classify(i)[0] is not None:
                    self._decide_step(i)
            elif trigger == "jump" and self._clear_at_once(i, z, e, pred):
                self._decide_step(i)
            return  # otherwise the next window confirms it (or shows it was an outlier)
        self.prev_dev = (i, z, self._raw_offset(i))
        self.rel_errors.append(e / pred)
        self.t.seg.level.append(i)
        self.t.seg.trend.append(i)

    def _confirm_at_once(self, i: int) -> None:
        """A step reported in its own window is confirmed when the next usable window
        stays on the new level (if it falls back, `_steps` ends the finding instead)."""
        for f in self.t.open_findings.values():
            if f.evidence.get("confirmed") != 0.0:
                continue
            after = f.evidence.get("r_after", math.nan)
            if math.isfinite(after) and abs(self.t.r[i] - after) < abs(f.step) / 2:
                f.evidence["confirmed"] = 1.0
                f.confidence = min(f.confidence / self.t.cfg.at_once_discount, 1.0)

    def _jump_rise(self, i: int, e: float, pred: float) -> bool:
        """A step rises within one or two windows; a fouling ramp, however fast, climbs a
        little every window. The rise of window i over the last accepted window (or the
        one before it, when the step began part-way through that one) must be most of the
        prediction error, and far more than the recent slope makes in those windows."""
        if not self.t.seg.level:
            return True
        back = self.t.seg.level[-2:] if len(self.t.seg.level) >= 2 else self.t.seg.level[-1:]
        rises = [float(self.t.r[i] - self.t.r[k]) for k in back]
        rise = max(rises, key=abs)
        pts = self.t.seg.level[-self.t.cfg.level_windows :]
        slope = 0.0
        if len(pts) >= 7:
            slope = max(sen_slope(self.t.day[pts], self.t.r[pts])[0], 0.0)
        span = float(self.t.day[i] - self.t.day[back[0]])
        need = max(0.5 * abs(e), self.t.cfg.min_step_rel * pred, 3.0 * slope * span)
        return bool(rise * e > 0 and abs(rise) >= need)

    def _clear_at_once(self, i: int, z: float, e: float, pred: float) -> bool:
        """A jump so large against the scatter, on a window whose own r interval is
        narrow and which fits one cause cleanly, is reported in that same window rather
        than after the next one (the next window can still end it: `_steps`)."""
        if abs(z) < self.t.cfg.at_once_z or abs(e) < self.t.cfg.at_once_rel * pred:
            return False
        lo, hi = self.t.col["r_low"][i], self.t.col["r_high"][i]
        if not (math.isfinite(lo) and math.isfinite(hi)) or hi - lo > 0.5 * abs(e):
            return False
        kind = self._classify(i)[0]
        # r falls at once only when the back-pressure fell (or a restriction cleared,
        # which `_steps` handles as the end of the open finding)
        return kind is not None if e > 0 else kind == "back_pressure"

    def _offset_rise(self, dc: float) -> bool:
        """The constant offset came within one or two windows (a back-pressure step), not
        a little every window (a fouling ramp read on a narrow flow range)."""
        before = [self._raw_offset(k) for k in self.t.seg.level[-2:]]
        before = [b for b in before if math.isfinite(b)]
        if not before:
            return True
        rise = max((dc - b for b in before), key=abs)
        return bool(rise * dc > 0 and abs(rise) >= 0.7 * abs(dc))

    def _raw_offset(self, i: int) -> float:
        """Constant offset of window i against the baseline model, less the baseline's [Pa]."""
        base = self.t.seg.base
        assert base is not None
        cmp = offset_comparison(
            self.t.numbers(i), base.r0, base.s_b + self.t.s_shift, self.t.cfg
        )
        if cmp is None or not math.isfinite(base.offset0):
            return math.nan
        return float(cmp["static_offset_pa"] - base.offset0)

    def _began_before(self, i: int, z: float, dc: float) -> bool:
        j, z_prev, dc_prev = self.prev_dev
        if j < 0 or self.t.seg.level[-1:] != [j]:
            return False
        # the window before leaned the same way by 3σ, or leaned at all and fits neither
        # one-parameter cause (a step late in it leaves too little to show in its r)
        leaned_r = z * z_prev > 0 and (abs(z_prev) >= 3.0 or self._mixed(j))
        if math.isfinite(dc) and math.isfinite(dc_prev):
            base = self.t.seg.base
            assert base is not None
            floor = max(0.2 * abs(dc), 2.5 * base.sigma_offset)
            return leaned_r or (dc * dc_prev > 0 and abs(dc_prev) >= floor)
        return leaned_r

    def _mixed(self, j: int) -> bool:
        """Window j fits neither "constant offset" nor "offset ∝ Q²" against the baseline
        (its best residual is ``mixed_factor`` × the baseline's): a change inside it."""
        base = self.t.seg.base
        assert base is not None
        cmp = offset_comparison(
            self.t.numbers(j), base.r0, base.s_b + self.t.s_shift, self.t.cfg
        )
        if cmp is None or not math.isfinite(base.sse_per_sample):
            return False
        best = min(cmp["sse_static"], cmp["sse_resistance"]) / max(cmp["samples"], 1.0)
        return bool(best > self.t.cfg.mixed_factor * base.sse_per_sample)

    def _confirmed(self, i: int) -> bool:
        """The window after a step candidate stays on the new side of it."""
        p = self.pending
        assert p is not None
        if p.trigger == "cusum":
            return True  # the CUSUM has already accumulated several windows
        if p.trigger == "offset":
            dc = self._offset_change(i)
            return math.isfinite(dc) and dc * p.dc > 0 and abs(dc) >= 0.5 * abs(p.dc)
        ref = float(self.t.r[p.j] - p.e)
        return (self.t.r[i] - ref) * p.e >= 0.5 * p.e * p.e

    def _offset_change(self, i: int) -> float:
        """Change of the window's constant offset against the baseline model [Pa], when it
        is a clear back-pressure step (see `_offset_jump`), else NaN."""
        if not self._offset_jump(i):
            return math.nan
        base = self.t.seg.base
        assert base is not None
        cmp = offset_comparison(
            self.t.numbers(i), base.r0, base.s_b + self.t.s_shift, self.t.cfg
        )
        assert cmp is not None
        return float(cmp["static_offset_pa"] - base.offset0)

    def _offset_jump(self, i: int) -> bool:
        """A window whose departure from the baseline model is a clear constant offset of
        at least ``min_bp_step_pa``: a back-pressure step too small against the day-to-day
        scatter of r to show as a jump of r (a large ΔP branch, a small step)."""
        base = self.t.seg.base
        assert base is not None
        if not math.isfinite(base.offset0):
            return False
        cmp = offset_comparison(
            self.t.numbers(i), base.r0, base.s_b + self.t.s_shift, self.t.cfg
        )
        if cmp is None or not math.isfinite(cmp["static_offset_pa"]):
            return False
        dc = cmp["static_offset_pa"] - base.offset0
        big = abs(dc) >= max(self.t.cfg.min_bp_step_pa, self.t.cfg.bp_step_z * base.sigma_offset)
        return big and cmp["offset_llr"] > self.t.cfg.offset_evidence

    def _cusum_step(self, i: int) -> bool:
        """A CUSUM alarm counts as a step when one mean shift fits the recent windows
        clearly better than a straight line (a fouling ramp also drives the CUSUM)."""
        pts = [*self.t.seg.level[-2 * self.t.cfg.level_windows :], i]
        if len(pts) < 8:
            return False
        y = self.t.r[pts]
        t = self.t.day[pts]
        ms = mean_shift(y, min_size=3)
        line = np.polyfit(t, y, 1)
        sse_line = float(np.sum((y - np.polyval(line, t)) ** 2))
        sse_step = ms.sigma**2 * max(len(y) - 2, 1)
        # A ramp that begins inside the look-back is "flat, then a line": the step must
        # beat that too, and happen within two windows, not spread over a curving ramp.
        sse_hinge = sse_line
        for knot in t[1:-2]:
            a = np.column_stack([np.ones_like(t), np.clip(t - knot, 0.0, None)])
            coef, *_ = np.linalg.lstsq(a, y, rcond=None)
            sse_hinge = min(sse_hinge, float(np.sum((y - a @ coef) ** 2)))
        two = float(np.max(y[2:] - y[:-2])) if len(y) > 2 else 0.0
        return ms.step > 0 and sse_step < 0.5 * sse_hinge and two >= 0.8 * ms.step

    def _decide_step(self, i: int) -> None:
        """Name the confirmed change of window ``pending.j`` (window i is the one after)."""
        base = self.t.seg.base
        assert base is not None and self.pending is not None
        j, z, e, first = self.pending.j, self.pending.z, self.pending.e, self.pending.first
        self.pending = None
        kind, conf, extra = self._classify(j)
        if kind is None:
            kind, conf, extra = self._classify(i, final=True)
        if kind is None:
            kind, conf = "restriction", 0.5
        ref = float(self.t.r[j] - e)
        up = self.t.r[i] > ref
        bp = self.t.open_findings.get("back_pressure")
        c = extra.get("static_offset_pa", math.nan)
        if kind == "back_pressure" and bp is not None:
            if math.isfinite(c) and c * bp.evidence.get("static_offset_pa", 0.0) < 0:
                self.t.end("back_pressure", self.t.ws[first])  # it went back
                self.t.shift_static(i, c)
            self.t.restart(i)
            return
        if not up:
            if kind == "restriction":
                self.t.end("restriction", self.t.ws[first])
            elif kind == "instrument":
                self.t.end("instrument", self.t.ws[first])
            if kind != "back_pressure":
                self.t.restart(i)  # r fell: cleared or improved; nothing to report
                return
        start = self.t.at[first]
        ref = float(self.t.r[j] - e)
        e = float(self.t.r[i] - ref)  # the full step (window i is past a deferred one)
        # r_baseline: the reference the cost of the change is counted from
        evidence = {"step_r": e, "step_sigma": z, "r_before": ref, "r_baseline": ref,
                    "r_after": float(self.t.r[i]), "cusum": self.cusum,
                    "sigma_r": base.sigma_r, **extra}  # fmt: skip
        day = self.t.when(start, first)
        r_after = float(self.t.r[i])
        if kind == "back_pressure":
            c = extra.get("static_offset_pa", math.nan)
            msg = back_pressure_changed(self.t.name, c, day, ref, r_after,
                                        unit=self.t.bs.pressure_unit)
        else:
            msg = resistance_step(self.t.name, kind, ref, r_after, day)
        if j == i:  # reported in its own window: the next one confirms it
            evidence["confirmed"] = 0.0
            conf *= self.t.cfg.at_once_discount
        self.t.open(OpenFinding(kind, start, self.t.we[i], conf, evidence, msg, ref=ref, step=e))
        if kind == "back_pressure" and math.isfinite(extra.get("static_offset_pa", math.nan)):
            self.t.shift_static(i, extra["static_offset_pa"])
        self.t.restart(i)

    def _classify(
        self, j: int, *, final: bool = False
    ) -> tuple[str | None, float, dict[str, float]]:
        """The cause of a step seen in window j; None = undecided (decide later).

        A window the step falls part-way through fits neither one-parameter hypothesis
        (its best residual is ``mixed_factor`` × the baseline's): its comparison is biased
        by when in the day the step came, so it is left to the next window.
        """
        base = self.t.seg.base
        assert base is not None
        meter = self._meter_disagrees(j)
        if meter is not None:
            return "instrument", 0.8, meter
        cmp = offset_comparison(
            self.t.numbers(j), base.r0, base.s_b + self.t.s_shift, self.t.cfg
        )
        if cmp is None:
            return "restriction", 0.5, {}
        best = min(cmp["sse_static"], cmp["sse_resistance"]) / max(cmp["samples"], 1.0)
        if not final and best > self.t.cfg.mixed_factor * base.sse_per_sample:
            return None, 0.0, cmp
        llr = cmp["offset_llr"]
        if abs(llr) < self.t.cfg.offset_evidence:
            if self._termination_known(j):
                # too narrow a flow range to tell the shapes apart, but the back-pressure
                # is logged or fixed (open end, logged level or header pressure): the
                # change is the branch's own resistance
                return "restriction", 0.7, cmp
            return None, 0.0, cmp
        conf = 1.0 / (1.0 + math.exp(-abs(llr)))
        return ("back_pressure" if llr > 0 else "restriction"), conf, cmp

    def _termination_known(self, j: int) -> bool:
        """Window j's fit held the back-pressure known (not fitted: s_pa is NaN) because
        the termination is open or its level or pressure is logged, not because s could
        not be separated from r."""
        return bool(self.t.ident[j]) and not math.isfinite(self.t.col["s_pa"][j])

    def _meter_disagrees(self, j: int) -> dict[str, float] | None:
        """A real restriction leaves Σ branch − total unchanged (both meters see the
        water go); a meter fault moves the balance by the meter's own change."""
        if self.t.balance is None or self.t.ws[j] not in self.t.balance.index:
            return None
        flow = self.t.col["mean_flow_m3s"]
        before = [p for p in self.t.seg.level[-7:] if self.t.ws[p] in self.t.balance.index]
        if not before or not math.isfinite(flow[j]):
            return None
        dq = float(flow[j] - np.nanmedian(flow[before]))
        res = self.t.balance["residual_m3s"]
        dres = float(res.loc[self.t.ws[j]] - median(res.loc[[self.t.ws[p] for p in before]]))
        u = float(self.t.balance["uncertainty_m3s"].loc[self.t.ws[j]])
        if abs(dres) > u and dq * dres > 0 and abs(dres - dq) < 0.5 * abs(dq):
            return {"meter_change_m3s": dq, "balance_change_m3s": dres, "balance_u_m3s": u}
        return None

    # -- fouling ---------------------------------------------------------------------------
