"""Back-pressure steps seen in the termination pressure, logged or fitted.

The logged termination pressure (``end_pressure_pa``) or the fitted static pressure
(``s_pa``, on windows where it is identifiable) stands ``bp_step_z`` σ and at least
``min_bp_step_pa`` away from the median of its recent windows: a ``back_pressure``
finding from the window's state change. It ends when the pressure comes back within half
the step. (A back-pressure change read from the shape of r's departure is
`monitor.analysis.detect_steps`'.)
"""

from __future__ import annotations

import math

from monitor.analysis.replay_text import back_pressure_moved
from monitor.analysis.replay_track import BranchTrack, Change, OpenFinding
from monitor.analysis.trend import median

__all__ = ["PressureDetector"]


class PressureDetector:
    """Back-pressure from the pressures of each window (see the module docstring)."""

    def __init__(self, track: BranchTrack) -> None:
        self.t = track
        self.reset()
        track.on_restart.append(self.reset)

    def reset(self) -> None:
        self.recent_pe: list[float] = []  # recent logged termination pressures [Pa]
        self.recent_s: list[float] = []  # recent fitted static pressures [Pa]

    def window(self, i: int) -> list[Change]:
        """Window i's pressures (the segment has its baseline)."""
        t = self.t
        base = t.seg.base
        assert base is not None
        n = len(t.changes)
        for series, recent, sigma in (
            (t.col["end_pressure_pa"], self.recent_pe, base.sigma_pe),
            (t.col["s_pa"] if t.ident[i] else None, self.recent_s, base.sigma_s),
        ):
            if series is None or not math.isfinite(series[i]):
                continue
            v = float(series[i])
            ref = float(median(recent[-7:])) if recent else math.nan
            bp = t.open_findings.get("back_pressure")
            if bp is not None and math.isfinite(bp.ref) and abs(v - bp.ref) < abs(bp.step) / 2:
                t.end("back_pressure", t.ws[i])
                recent.clear()
            elif math.isfinite(ref):
                delta = v - ref
                if abs(delta) >= max(t.cfg.bp_step_z * sigma, t.cfg.min_bp_step_pa):
                    t.open(OpenFinding(
                        "back_pressure", t.at[i], t.we[i], 0.95,
                        {"step_pa": delta, "step_sigma": delta / sigma, "before_pa": ref,
                         "after_pa": v},
                        back_pressure_moved(t.name, delta, t.when(t.at[i], i), ref, v,
                                            unit=t.bs.pressure_unit),
                        ref=ref, step=delta,
                    ))  # fmt: skip
                    recent.clear()
            recent.append(v)
        return t.since(n)
