"""Why a branch-window gave no fit, in words that name the cause and the setting to change.

`monitor.analysis.window` asks `Verdicts` when a window has too few steady samples or a signal
too coarse for a fit, and `empty_grid_cause` when it has no usable header pressure at
all; every number is stated in its tag's own plant unit.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from adapters.units import from_si
from monitor.analysis.quality import ScreenSettings
from monitor.analysis.sample_grid import SampleGrid, grid_step
from monitor.site.config import BranchConfig, Site

__all__ = ["COARSE_SHARE", "MIN_FIT_FLOW_M3S", "Verdicts", "duration", "empty_grid_cause",
           "in_unit"]

#: Samples at or below a quarter of the branch's minimum flow, and never less than this,
#: carry too little dynamic drop to fit [m^3/s] (0.36 m3/h).
MIN_FIT_FLOW_M3S = 1e-4


#: A signal whose resolution is more than this share of what it must measure (the
#: branch's clean dynamic drop; for a flow meter, its flow) gives no fit: each sample
#: then fixes r no better than ±this share, and a signal stepping between a few levels
#: does not average down. A rule of this project, not a published figure.
COARSE_SHARE = 0.2


def in_unit(site: Site, tag: str, value_si: float) -> str:
    """*value_si* in *tag*'s own plant unit, with three significant digits."""
    spec = site.tags[tag]
    return f"{float(from_si([value_si], spec.unit, spec.kind)[0]):.3g} {spec.unit}"


def duration(seconds: float) -> str:
    return f"{seconds / 60:.0f} min" if seconds >= 60 else f"{seconds:.0f} s"


def empty_grid_cause(site: Site, flags: pd.DataFrame, settings: ScreenSettings) -> str:
    """Why a window has no usable header pressure sample, naming the setting to change."""
    tag = site.header_pressure_tag
    own = flags[flags["tag"] == tag] if len(flags) else flags
    if own.empty:
        return f"no readings of the header pressure {tag} in this window"
    n = len(own)
    off = int(own["pump_off"].sum())
    if off == n:
        median = float(np.nanmedian(own["value"].to_numpy(float)))
        return (f"the pump counted as stopped all window: {tag} read a median "
                f"{in_unit(site, tag, median)}, below the running pressure "
                f"{in_unit(site, tag, settings.running_pressure_pa)} "
                "([header] running_pressure: set it below the pressure the pumps run at)")
    counts = {f: int(own[f].sum()) for f in ("bad_quality", "no_value", "out_of_range",
                                              "frozen", "spike", "rate", "pump_off",
                                              "startup")}
    parts = ", ".join(f"{c} {f.replace('_', ' ')}" for f, c in counts.items() if c)
    return f"no usable sample of the header pressure {tag}: of {n}, {parts or 'none usable'}"


@dataclass(frozen=True)
class Verdicts:
    """Why a branch-window gave no fit, in words that name the cause and its setting."""

    site: Site
    settings: ScreenSettings
    variation: dict[str, np.ndarray]  # rolling std/mean per tag on the grid [-]
    resolution: dict[str, float]  # per tag, from the data [SI]
    empty_grid: str

    def too_few(self, branch: BranchConfig, grid: SampleGrid, keep: np.ndarray,
                running: np.ndarray, mask: np.ndarray, floor: float, q: np.ndarray) -> str:
        """The shortfall of steady samples, each bin counted under its first cause."""
        site, st = self.site, self.settings
        need = site.analysis.min_samples
        left = np.ones(len(running), dtype=bool)
        parts: list[str] = []

        def take(bad: np.ndarray, text: str) -> None:
            hit = left & bad
            if hit.any():
                parts.append(f"{int(hit.sum())} {text}")
                left[hit] = False

        pt = site.header_pressure_tag
        take(~running, f"with the pump counted as stopped ({pt} below "
                       f"{in_unit(site, pt, st.running_pressure_pa)}, "
                       "[header] running_pressure)")
        window = duration(st.steady_window_s)
        for tag, limit, key in ((pt, st.steady_pressure_rel, "steady_pressure_band"),
                                (branch.flow_tag, st.steady_flow_rel, "steady_flow_band")):
            cv = self.variation.get(tag or "")
            if cv is None:
                continue
            with np.errstate(invalid="ignore"):
                bad = ~(cv <= limit)
            moved = cv[left & bad & np.isfinite(cv)]
            most = f" up to {100 * float(moved.max()):.1f} %" if moved.size else ""
            take(bad, f"where {tag} was not steady (it varied{most} over {window}; "
                      f"{100 * limit:.1f} % allowed, [analysis] {key})")
        whose = ("a quarter of the branch's min_flow" if floor > MIN_FIT_FLOW_M3S
                 else "the fit's floor for any branch")
        take(~(q > floor), f"with flow at or below {in_unit(site, branch.flow_tag, floor)}"
                           f" ({whose})" if branch.flow_tag else
             "with flow at or below the fit's floor")
        take(~mask, "with a condition tag (level, end pressure, valve position, "
                    "temperature) missing or unusable")
        why = "; ".join(parts) if parts else "no sample in the window"
        return (f"{int(mask.sum())} steady samples, {need} needed ([analysis] min_samples) "
                f"of {len(running)} on the {duration(grid_step(grid, st))} grid: {why}")

    def too_coarse(self, branch: BranchConfig, q: np.ndarray, t: np.ndarray) -> str | None:
        """'not identifiable: …' when a signal resolves too little of what it measures."""
        site = self.site
        q_med = float(np.median(q))
        t_med = float(np.nanmedian(t)) if np.isfinite(t).any() else 20.0
        drop = float(branch.model.dp_dynamic(q_med, temperature_c=t_med))
        pt = site.header_pressure_tag
        p_res = self.resolution.get(pt, 0.0)
        if drop > 0 and p_res > COARSE_SHARE * drop:
            return (f"not identifiable: {pt} resolves {in_unit(site, pt, p_res)}, the "
                    f"branch's dynamic drop is {in_unit(site, pt, drop)} (a fit needs a "
                    f"resolution finer than {100 * COARSE_SHARE:.0f} % of the drop)")
        ft = branch.flow_tag
        q_res = self.resolution.get(ft or "", 0.0)
        if ft and q_med > 0 and 2.0 * q_res > COARSE_SHARE * q_med:
            return (f"not identifiable: {ft} resolves {in_unit(site, ft, q_res)} at a flow "
                    f"of {in_unit(site, ft, q_med)} (r goes with 1/Q², so each step moves "
                    f"it by {200 * q_res / q_med:.0f} %)")
        return None
