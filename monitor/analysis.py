"""One analysis window of a site: screened readings in, one fit per branch out.

`analyze_window` is a pure function of (site, readings of the window, window bounds): it
screens every tag (`monitor.quality`), puts the usable samples on a regular grid, keeps
the samples where the pump runs and flows and pressures are steady, fits each branch's
resistance ratio (`model.fit.fit_resistance`), and counts what screening flagged per tag
and the header mass balance, which the diagnosis needs. Nothing here reads or writes a
store; `monitor.jobs` does that.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Collection
from dataclasses import dataclass, replace
from datetime import datetime
from typing import Any

import numpy as np
import pandas as pd

from adapters.fit_record import AfterStep, FitSums, WindowFit
from adapters.units import from_si
from model.fit import (
    ChangePoint,
    FitResult,
    StepRule,
    find_level_step,
    fit_resistance,
    fit_with_change,
)
from monitor.backflow import resting_samples
from monitor.config import BranchConfig, Site
from monitor.quality import (
    ScreenSettings,
    TagLimits,
    running_mask,
    screen,
)
from monitor.sample_checks import resolution_by_tag

log = logging.getLogger(__name__)

__all__ = ["WindowAnalysis", "analyze_window", "logging_interval", "screen_settings"]

#: Relative expanded (95 %) uncertainty of a branch flow meter when the site file gives
#: none: ±2 % of reading (common practice for installed magnetic meters, which are rated
#: ±0.5 % on the calibration rig; installation effects take the rest).
DEFAULT_METER_UNCERTAINTY = 0.02
#: A window needs this many steady samples for the header balance [-].
MIN_BALANCE_SAMPLES = 10
#: A step inside a daily window: each side at least half an hour and 6 samples (an hour
#: of 10-minute data), as in the tail's own fit; other thresholds `StepRule`'s. A logged
#: end pressure is scanned by `_tail` on every running sample instead of the fit's
#: samples. Shorter windows scale the sides down (`tail_rule`).
TAIL_RULE = StepRule(min_head_s=1800.0, min_tail_s=1800.0, min_samples=6, end_pressure=False)


def tail_rule(window_s: float, grid_s: float) -> StepRule:
    """`TAIL_RULE` for a window of *window_s* on a grid of *grid_s* [s]: each side at most
    half an hour, at least an eighth of the window and 6 grid steps."""
    side = min(TAIL_RULE.min_head_s, max(window_s / 8.0, 6.0 * grid_s))
    return replace(TAIL_RULE, min_head_s=side, min_tail_s=side)
#: Samples at or below a quarter of the branch's minimum flow, and never less than this,
#: carry too little dynamic drop to fit [m^3/s] (0.36 m3/h).
MIN_FIT_FLOW_M3S = 1e-4


@dataclass(frozen=True)
class WindowAnalysis:
    """What one window gave: one fit per branch, screening counts, the balance, data
    health."""

    fits: list[WindowFit]
    screening: pd.DataFrame
    balance: dict[str, Any] | None
    health: pd.DataFrame
    samples: int


def screen_settings(site: Site, logging_interval_s: float | None = None) -> ScreenSettings:
    """Screening thresholds for *site* and the historian's logging interval.

    The windows of the gap, frozen and steady-state tests must hold several samples
    whatever the logging interval: a 10-minute historian cannot show a 15-minute steady
    period, nor a frozen hour, with the thresholds of a 1-minute one.
    """
    grid = max(site.analysis.sample_period, logging_interval_s or 0.0)
    a = site.analysis
    # minute windows on second data (a test rig, a commissioning run) need the steady
    # and settling times scaled to the window; daily windows keep 15 and 10 minutes
    steady = a.steady_window or max(6 * grid, min(900.0, a.window / 4))
    return ScreenSettings(
        running_pressure_pa=site.running_pressure_pa,
        max_gap_s=max(600.0, 5 * grid),
        steady_window_s=steady,
        steady_pressure_rel=a.steady_pressure_band,
        steady_flow_rel=a.steady_flow_band,
        frozen_s=max(3600.0, 12 * grid),
        settling_s=max(2 * grid, min(600.0, a.window / 4)),
    )


def logging_interval(readings: pd.DataFrame, tag: str) -> float | None:
    """Median interval between the samples of *tag* [s], None with fewer than 3."""
    times = readings.loc[readings["tag"] == tag, "time"]
    if len(times) < 3:
        return None
    steps = times.sort_values().diff().dt.total_seconds().to_numpy()[1:]
    steps = steps[steps > 0]
    return float(np.median(steps)) if len(steps) else None


def analyze_window(
    site: Site, readings: pd.DataFrame, start: datetime, end: datetime, *,
    branches: Collection[str] | None = None, header: bool = True,
) -> WindowAnalysis:
    """Screen, select and fit one window [start, end) of *readings* (a readings frame).

    A branch's samples are kept where the pump runs and settled, and the header pressure
    and the branch's own flow are steady (`monitor.quality.steady_mask`'s rule, tag by
    tag): a transient on another branch shows in the header pressure when it matters to
    this one. The header balance keeps only samples where every flow is steady.

    With *branches* (names), only those branches are fitted and only their tags'
    screening counts and data health are returned; with *header* False, neither the
    header tags' counts and health nor the balance either. A group of branches analysed
    this way gives the same rows as the whole site does for them (each branch's fit needs
    the header tags and its own, nothing of the other branches), so a site can be split
    into groups of branches (`monitor.cluster`). The balance and a branch without a flow
    meter need every flow meter's readings: they belong with *header*.
    """
    readings = readings[readings["tag"].isin(list(site.tags))]
    interval = logging_interval(readings, site.header_pressure_tag)
    settings = screen_settings(site, interval)
    specs = {tag: TagLimits.from_spec(spec) for tag, spec in site.tags.items()}
    t0, t1 = pd.Timestamp(start), pd.Timestamp(end)
    result = screen(
        readings, specs, settings, start=t0, end=t1,
        header_pressure_tag=site.header_pressure_tag, total_flow_tag=site.total_flow_tag,
        resting=resting_samples(site, readings),
    )
    health = result.health_counts()
    screening = _screening_counts(site, result.flags, t0, t1)
    freq = pd.Timedelta(seconds=max(site.analysis.sample_period, interval or 0.0))
    grid = _Grid.of(result.flags, list(site.tags), freq, t0, t1)
    # Grid bins without a header pressure say nothing about the pump (the historian may
    # log less often than the grid): drop them, or each would count as a stop and a start.
    grid = grid.rows(np.isfinite(grid.column(site.header_pressure_tag)))
    flow_tags = [b.flow_tag for b in site.branches if b.flow_tag]
    variation: dict[str, np.ndarray] = {}
    if grid.empty:
        running = np.zeros(0, dtype=bool)
        steady: dict[str, np.ndarray] = {}
    else:
        running = running_mask(
            grid.frame([site.header_pressure_tag]), site.header_pressure_tag, None, settings
        ).to_numpy(bool)
        steady, variation = _steady_by_tag(
            grid, flow_tags, [site.header_pressure_tag], settings)
    why = _Verdicts(site, settings, variation, resolution_by_tag(result.flags),
                    _empty_grid_cause(site, result.flags, settings))
    rule = tail_rule((t1 - t0).total_seconds(), freq.total_seconds())
    base = running & steady.get(site.header_pressure_tag, np.zeros(len(running), bool))
    keep_all = base.copy()
    for tag in flow_tags:
        keep_all &= steady.get(tag, False)
    inferred = _inferred_flow(site, grid)
    fits = []
    for branch in site.branches:
        if branches is not None and branch.name not in branches:
            continue
        if branch.flow_tag is None and inferred is not None and inferred[0] == branch.name:
            # every metered flow steady: the difference is as steady as they are
            fits.append(_fit_row(site, branch, grid, keep_all, t0, t1, running, why, rule,
                                 flow=inferred[1]))
        else:
            keep = base & steady.get(branch.flow_tag or "", base)
            fits.append(_fit_row(site, branch, grid, keep, t0, t1, running, why, rule))
    balance = _balance(site, grid, keep_all, t0, t1) if header else None
    if branches is not None or not header:
        owned = set(branches or ()) | ({"header"} if header else set())
        screening = screening[screening["branch"].isin(owned)].reset_index(drop=True)
        tags = set(screening["tag"])
        health = health[health["tag"].isin(tags)].reset_index(drop=True)
    return WindowAnalysis(
        fits=fits, screening=screening, balance=balance, health=health, samples=len(readings)
    )


@dataclass(frozen=True)
class _Grid:
    """Usable readings on a regular UTC grid: one row per bin, one column per tag.

    The values are the means of the usable samples in each bin ``[t, t + freq)`` (NaN
    where none), as `monitor.quality.to_wide` gives them; held as one numpy matrix so
    that hundreds of branches cost one pass over the samples, not one per tag.
    """

    index: pd.DatetimeIndex
    values: np.ndarray  # bins × tags [SI]
    columns: dict[str, int]
    seconds: np.ndarray  # bin times from the window start [s]

    @classmethod
    def of(
        cls, flags: pd.DataFrame, tags: list[str], freq: pd.Timedelta,
        start: pd.Timestamp, end: pd.Timestamp,
    ) -> _Grid:
        grid = pd.date_range(
            start.tz_convert("UTC").floor(freq), end.tz_convert("UTC"), freq=freq,
            inclusive="left", name="time",
        )
        columns = {tag: j for j, tag in enumerate(tags)}
        value = flags["value"].to_numpy("float64")
        use = flags["usable"].to_numpy(bool) & flags["good"].to_numpy(bool) & np.isfinite(value)
        col = pd.Index(tags).get_indexer(pd.Index(flags["tag"]))
        ns = flags["time"].dt.tz_convert("UTC").to_numpy("datetime64[ns]").view("int64")
        step = int(freq.value)
        row = (ns - (int(grid[0].value) if len(grid) else 0)) // step
        use &= (col >= 0) & (row >= 0) & (row < len(grid))
        cells = row[use] * len(tags) + col[use]
        size = len(grid) * len(tags)
        sums = np.bincount(cells, weights=value[use], minlength=size)
        counts = np.bincount(cells, minlength=size)
        with np.errstate(invalid="ignore", divide="ignore"):
            mean = np.where(counts > 0, sums / counts, np.nan)
        seconds = ((grid - start) / pd.Timedelta(seconds=1)).to_numpy(float)
        return cls(grid, mean.reshape(len(grid), len(tags)), columns, seconds)

    @property
    def empty(self) -> bool:
        return len(self.index) == 0

    def rows(self, keep: np.ndarray) -> _Grid:
        return _Grid(self.index[keep], self.values[keep], self.columns, self.seconds[keep])

    def column(self, tag: str) -> np.ndarray:
        return self.values[:, self.columns[tag]]

    def frame(self, tags: list[str]) -> pd.DataFrame:
        cols = [self.columns[t] for t in tags]
        return pd.DataFrame(self.values[:, cols], index=self.index, columns=tags)


def _steady_by_tag(
    grid: _Grid, flow_tags: list[str], pressure_tags: list[str], settings: ScreenSettings
) -> tuple[dict[str, np.ndarray], dict[str, np.ndarray]]:
    """Per tag, True where it is steady by `monitor.quality.steady_mask`'s rule, and the
    rolling variation (std / mean) that the rule compares with its limit [-].

    One rolling pass over all the tags at once (the rule is per column); `steady_mask`
    is the AND of these over its tags.
    """
    window = pd.Timedelta(seconds=settings.steady_window_s)
    index = grid.index
    step = index.to_series().diff().median() if len(index) > 1 else window
    need = max(2, int(0.5 * window / step)) if pd.notna(step) and step > pd.Timedelta(0) else 2
    out: dict[str, np.ndarray] = {}
    variation: dict[str, np.ndarray] = {}
    groups = (
        (flow_tags, settings.steady_flow_rel, settings.steady_flow_floor_m3s),
        (pressure_tags, settings.steady_pressure_rel, settings.steady_pressure_floor_pa),
    )
    for tags, limit, floor in groups:
        if not tags:
            continue
        roll = grid.frame(list(tags)).rolling(window, center=True, min_periods=need)
        std = roll.std().to_numpy()
        mean = roll.mean().to_numpy()
        cv = std / np.maximum(np.abs(mean), floor)
        with np.errstate(invalid="ignore"):
            ok = cv <= limit  # NaN compares False
        out.update({tag: ok[:, j] for j, tag in enumerate(tags)})
        variation.update({tag: cv[:, j] for j, tag in enumerate(tags)})
    return out, variation


def _fit_row(
    site: Site, branch: BranchConfig, grid: _Grid, keep: np.ndarray,
    start: pd.Timestamp, end: pd.Timestamp, running: np.ndarray, why: _Verdicts,
    rule: StepRule, flow: np.ndarray | None = None,
) -> WindowFit:
    """The fit of one branch; *flow* [m^3/s] stands in for a branch without a meter."""
    window: dict[str, Any] = {"branch": branch.name, "window_start": start, "window_end": end}
    if (branch.flow_tag is None and flow is None) or grid.empty:
        return WindowFit(**window, status="no_data", message=(
            why.empty_grid if grid.empty else
            "no flow meter on this branch, and its flow cannot be had from the header "
            "balance (it needs the total flow meter and every other branch metered)"))
    p = grid.column(site.header_pressure_tag)
    q = flow if flow is not None else grid.column(branch.flow_tag or "")
    if site.header_temperature_tag is not None:
        t = grid.column(site.header_temperature_tag)
    else:
        t = np.full(len(grid.index), site.design_temperature_c)
    conditions = {key: grid.column(tag) for key, tag in branch.logged_conditions.items()}
    mask = keep & np.isfinite(p) & np.isfinite(q) & np.isfinite(t)
    for values in conditions.values():
        mask &= np.isfinite(values)
    floor = max(branch.min_flow_m3s * 0.25, MIN_FIT_FLOW_M3S)
    mask &= q > floor
    seconds = grid.seconds
    # a signal too coarse for a fit is the verdict even where it also looks unsteady
    flowing = running & np.isfinite(p) & np.isfinite(q) & (q > floor)
    coarse = None if flowing.sum() < site.analysis.min_samples else why.too_coarse(
        branch, q[flowing], t[flowing])
    if coarse is not None:
        return WindowFit(**window, status="not_identifiable", message=coarse,
                         mean_flow_m3s=float(np.mean(q[flowing])))
    if mask.sum() < site.analysis.min_samples:
        ends_pa = math.nan
        after_step = None
        if branch.end_pressure_tag is not None:
            # the logged back-pressure still tells its story when r cannot be fitted
            ends = grid.column(branch.end_pressure_tag)
            if np.isfinite(ends).any():
                ends_pa = float(np.nanmedian(ends))
            after_step = _tail(branch, grid, mask, running, seconds, None, floor, p, q, t,
                               conditions, rule)
        return WindowFit(
            **window, status="too_few_samples",
            message=why.too_few(branch, grid, keep, running, mask, floor, q),
            mean_flow_m3s=float(np.nanmean(q)) if np.isfinite(q).any() else math.nan,
            end_pressure_pa=ends_pa, after_step=after_step,
        )
    kwargs = {k: v[mask] for k, v in conditions.items()}
    # the whole window's fit, and a step part-way through it (a window a step came in is
    # also where the robust fit of the whole of it may not converge: looked for anyway)
    fit, change = fit_with_change(
        branch.model, time_s=seconds[mask], header_pressure_pa=p[mask], flow_m3s=q[mask],
        temperature_c=t[mask], min_flow_m3s=floor, rule=rule,
        min_samples=site.analysis.min_samples, **kwargs,
    )
    message = fit.message
    if flow is not None:
        # r ∝ 1/Q²: a flow off by δQ reads as r off by about 2·δQ/Q, the same every day
        # (changes of r still show; its level is this uncertain)
        u_m3h = _balance_u(site, grid, mask)
        rel = 2.0 * u_m3h / (3600.0 * float(np.mean(q[mask])))
        message = (f"{message}; flow from the header balance (total meter minus the "
                   f"metered branches, ±{u_m3h:.1f} m3/h at 95 %, so the level of r is "
                   f"uncertain by about ±{100 * rel:.0f} %)")
    end_tag = branch.end_pressure_tag
    return WindowFit(
        **window, **_fit_fields(fit), message=message,
        temperature_c=float(np.mean(t[mask])), header_pressure_pa=float(np.mean(p[mask])),
        end_pressure_pa=(math.nan if end_tag is None
                         else float(np.median(grid.column(end_tag)[mask]))),
        after_step=_tail(branch, grid, mask, running, seconds, change, floor, p, q, t,
                         conditions, rule),
    )  # fmt: skip


def _tail(
    branch: BranchConfig, grid: _Grid, mask: np.ndarray, running: np.ndarray,
    seconds: np.ndarray, change: ChangePoint | None, floor: float, p: np.ndarray,
    q: np.ndarray, t: np.ndarray, conditions: dict[str, np.ndarray], rule: StepRule,
) -> AfterStep | None:
    """Where a step part-way through the window came, and the state after it.

    *change* is what `model.fit.fit_with_change` found on the fit's samples (resistance
    relation, or a logged end pressure). A logged end pressure is searched again wherever
    the pump ran (`model.fit.find_level_step`), and a step found there wins: it is dated
    better, and a back-pressure step late in the day may leave too few steady flow
    samples after it for the fit's samples to show it. The samples after the
    step — at least half an hour — are fitted on their own, so the diagnosis sees the new
    state in the window the step came in instead of a mixture of a day. *seconds* are
    the grid's times from the window start [s].
    """
    ends = None if branch.end_pressure_tag is None else grid.column(branch.end_pressure_tag)
    if ends is not None:
        # the logged end pressure wherever the pump ran dates its own step best: the
        # steady flow samples may be sparse just after it
        logged = running & np.isfinite(ends)
        step = find_level_step(
            seconds[logged], ends[logged], min_head_s=rule.min_head_s,
            min_tail_s=rule.min_tail_s, min_samples=rule.min_samples,
            min_gain=rule.min_gain, min_step=rule.min_pressure_step_pa,
        )
        change = step or change
    if change is None:
        return None
    end_after = math.nan
    if ends is not None:
        after = running & np.isfinite(ends) & (seconds >= change.time_s)
        if after.any():
            end_after = float(np.median(ends[after]))
    tail = mask & (seconds >= change.time_s)
    fit = None
    if int(tail.sum()) >= rule.min_samples:
        logged_tail: dict[str, Any] = {k: v[tail] for k, v in conditions.items()}
        fit = fit_resistance(
            branch.model, header_pressure_pa=p[tail], flow_m3s=q[tail], temperature_c=t[tail],
            min_flow_m3s=floor, min_samples=rule.min_samples, **logged_tail,
        )
    if fit is not None and fit.usable:
        out = AfterStep(
            offset_s=change.time_s, change=change.change, r=fit.r, r_low=fit.r_low,
            r_high=fit.r_high, samples=fit.samples,
            s_pa=fit.s_pa if fit.identifiable and fit.fit_static else math.nan,
            end_pressure_pa=end_after, sums=FitSums.of(fit),
        )
    elif math.isfinite(end_after):
        out = AfterStep(offset_s=change.time_s, change=change.change,
                        end_pressure_pa=end_after)
    else:
        return None  # a step in the relation, but nothing to say about the state after it
    log.debug("%s: step inside the window %.0f s after its start (%s, %.3g)", branch.name,
              change.time_s, change.signal, change.change)
    return out


def _fit_fields(fit: FitResult) -> dict[str, Any]:
    """`WindowFit`'s fields that the branch's fit gives."""
    return {
        "status": fit.status, "samples": fit.samples, "identifiable": fit.identifiable,
        "r": fit.r, "r_low": fit.r_low, "r_high": fit.r_high, "s_pa": fit.s_pa,
        "s_low_pa": fit.s_low_pa, "s_high_pa": fit.s_high_pa, "s_fixed_pa": fit.s_fixed_pa,
        "flow_min_m3s": fit.flow_min_m3s, "flow_max_m3s": fit.flow_max_m3s,
        "flow_span": fit.flow_span, "mean_flow_m3s": fit.mean_flow_m3s,
        "residual_std_pa": fit.residual_std_pa, "residual_autocorr": fit.residual_autocorr,
        "corr_rs": fit.corr_rs, "sums": FitSums.of(fit),
    }  # fmt: skip


def _screening_counts(
    site: Site, flags: pd.DataFrame, start: pd.Timestamp, end: pd.Timestamp
) -> pd.DataFrame:
    """Frozen / out-of-range / spike counts per tag, with the branch each tag belongs to."""
    owner: dict[str, str] = {}
    for tag in (site.header_pressure_tag, site.header_temperature_tag, site.total_flow_tag,
                site.pump_speed_tag):
        if tag:
            owner[tag] = "header"
    for b in site.branches:
        for tag in (b.flow_tag, *b.logged_conditions.values()):
            if tag and tag not in owner:
                owner[tag] = b.name
    cols = ["frozen", "out_of_range", "spikes"]
    flag_of = {"frozen": "frozen", "out_of_range": "out_of_range", "spikes": "spike"}
    if flags.empty:
        return pd.DataFrame(columns=["branch", "window_start", "window_end", "tag", *cols,
                                     "samples"])
    # one pass of integer counting per flag instead of a groupby on the tag strings
    codes, uniques = pd.factorize(flags["tag"], sort=True)
    tags = [str(t) for t in uniques]
    out: dict[str, Any] = {
        "branch": [owner.get(t, "header") for t in tags],
        "window_start": [start] * len(tags),
        "window_end": [end] * len(tags),
        "tag": pd.Series(tags, dtype=object),
    }
    for c in cols:
        column = flag_of[c] if flag_of[c] in flags.columns else c
        if column in flags.columns:
            hits = flags[column].to_numpy(bool)
            out[c] = np.bincount(codes[hits], minlength=len(tags)).astype("int64")
        else:
            out[c] = np.zeros(len(tags), dtype="int64")
    out["samples"] = np.bincount(codes, minlength=len(tags)).astype("int64")
    return pd.DataFrame(out)


def _inferred_flow(site: Site, grid: _Grid) -> tuple[str, np.ndarray] | None:
    """(name, flow per bin [m^3/s]) of the one branch without a flow meter, from the header
    balance: total meter − Σ metered branches (NaN where any is missing); None unless the
    site has a total meter and exactly one unmetered branch."""
    unmetered = [b for b in site.branches if b.flow_tag is None]
    if site.total_flow_tag is None or len(unmetered) != 1 or grid.empty:
        return None
    metered = [grid.columns[b.flow_tag] for b in site.branches if b.flow_tag is not None]
    flow = grid.column(site.total_flow_tag) - grid.values[:, metered].sum(axis=1)
    return unmetered[0].name, flow


def _balance_u(site: Site, grid: _Grid, mask: np.ndarray) -> float:
    """Expanded (95 %) uncertainty of the balance's flow over the *mask* samples [m3/h]:
    each meter's ±``[analysis] meter_uncertainty`` of its mean reading, combined."""
    tags = [site.total_flow_tag, *(b.flow_tag for b in site.branches)]
    means = [float(np.mean(grid.column(t)[mask])) for t in tags if t is not None]
    u = site.analysis.meter_uncertainty
    return 3600.0 * math.sqrt(sum((u * m) ** 2 for m in means))


def _balance(
    site: Site, grid: _Grid, keep: np.ndarray, start: pd.Timestamp, end: pd.Timestamp
) -> dict[str, Any] | None:
    """Σ branch meters − total meter over the steady samples, with its uncertainty."""
    tags = [b.flow_tag for b in site.branches]
    if site.total_flow_tag is None or grid.empty or any(t is None for t in tags):
        return None
    total = grid.column(site.total_flow_tag)
    branches = grid.values[:, [grid.columns[t] for t in tags if t is not None]]
    ok = keep & np.isfinite(total) & np.isfinite(branches).all(axis=1)
    if int(ok.sum()) < MIN_BALANCE_SAMPLES:
        return None
    u = site.analysis.meter_uncertainty
    q_total = float(np.mean(total[ok]))
    q_branch = np.mean(branches[ok], axis=0)
    residual = float(np.sum(q_branch) - q_total)
    uncertainty = math.sqrt(float(np.sum((u * q_branch) ** 2)) + (u * q_total) ** 2)
    return {
        "window_start": start, "window_end": end, "residual_m3s": residual,
        "uncertainty_m3s": uncertainty, "samples": int(ok.sum()),
    }


#: A signal whose resolution is more than this share of what it must measure (the
#: branch's clean dynamic drop; for a flow meter, its flow) gives no fit: each sample
#: then fixes r no better than ±this share, and a signal stepping between a few levels
#: does not average down. A rule of this project, not a published figure.
COARSE_SHARE = 0.2


def _in_unit(site: Site, tag: str, value_si: float) -> str:
    """*value_si* in *tag*'s own plant unit, with three significant digits."""
    spec = site.tags[tag]
    return f"{float(from_si([value_si], spec.unit, spec.kind)[0]):.3g} {spec.unit}"


def _duration(seconds: float) -> str:
    return f"{seconds / 60:.0f} min" if seconds >= 60 else f"{seconds:.0f} s"


def _empty_grid_cause(site: Site, flags: pd.DataFrame, settings: ScreenSettings) -> str:
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
                f"{_in_unit(site, tag, median)}, below the running pressure "
                f"{_in_unit(site, tag, settings.running_pressure_pa)} "
                "([header] running_pressure: set it below the pressure the pumps run at)")
    counts = {f: int(own[f].sum()) for f in ("bad_quality", "no_value", "out_of_range",
                                              "frozen", "spike", "rate", "pump_off",
                                              "startup")}
    parts = ", ".join(f"{c} {f.replace('_', ' ')}" for f, c in counts.items() if c)
    return f"no usable sample of the header pressure {tag}: of {n}, {parts or 'none usable'}"


@dataclass(frozen=True)
class _Verdicts:
    """Why a branch-window gave no fit, in words that name the cause and its setting."""

    site: Site
    settings: ScreenSettings
    variation: dict[str, np.ndarray]  # rolling std/mean per tag on the grid [-]
    resolution: dict[str, float]  # per tag, from the data [SI]
    empty_grid: str

    def too_few(self, branch: BranchConfig, grid: _Grid, keep: np.ndarray,
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
                       f"{_in_unit(site, pt, st.running_pressure_pa)}, "
                       "[header] running_pressure)")
        window = _duration(st.steady_window_s)
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
        take(~(q > floor), f"with flow at or below {_in_unit(site, branch.flow_tag, floor)}"
                           f" ({whose})" if branch.flow_tag else
             "with flow at or below the fit's floor")
        take(~mask, "with a condition tag (level, end pressure, valve position, "
                    "temperature) missing or unusable")
        why = "; ".join(parts) if parts else "no sample in the window"
        return (f"{int(mask.sum())} steady samples, {need} needed ([analysis] min_samples) "
                f"of {len(running)} on the {_duration(grid_step(grid, st))} grid: {why}")

    def too_coarse(self, branch: BranchConfig, q: np.ndarray, t: np.ndarray) -> str | None:
        """'not identifiable: …' when a signal resolves too little of what it measures."""
        site = self.site
        q_med = float(np.median(q))
        t_med = float(np.nanmedian(t)) if np.isfinite(t).any() else 20.0
        drop = float(branch.model.dp_dynamic(q_med, temperature_c=t_med))
        pt = site.header_pressure_tag
        p_res = self.resolution.get(pt, 0.0)
        if drop > 0 and p_res > COARSE_SHARE * drop:
            return (f"not identifiable: {pt} resolves {_in_unit(site, pt, p_res)}, the "
                    f"branch's dynamic drop is {_in_unit(site, pt, drop)} (a fit needs a "
                    f"resolution finer than {100 * COARSE_SHARE:.0f} % of the drop)")
        ft = branch.flow_tag
        q_res = self.resolution.get(ft or "", 0.0)
        if ft and q_med > 0 and 2.0 * q_res > COARSE_SHARE * q_med:
            return (f"not identifiable: {ft} resolves {_in_unit(site, ft, q_res)} at a flow "
                    f"of {_in_unit(site, ft, q_med)} (r goes with 1/Q², so each step moves "
                    f"it by {200 * q_res / q_med:.0f} %)")
        return None


def grid_step(grid: _Grid, settings: ScreenSettings) -> float:
    """The grid's bin width [s] (the steady-state window when the grid has one row)."""
    if len(grid.seconds) > 1:
        return float(np.min(np.diff(grid.seconds)))
    return settings.steady_window_s
