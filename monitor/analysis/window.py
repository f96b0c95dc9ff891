"""One analysis window of a site: screened readings in, one fit per branch out.

`analyze_window` is a pure function of (site, readings of the window, window bounds): it
screens every tag (`monitor.analysis.quality`), puts the usable samples on a regular grid, keeps
the samples where the pump runs and flows and pressures are steady, fits each branch's
resistance ratio (`model.fit.fit_resistance`), and counts what screening flagged per tag
and the header mass balance, which the diagnosis needs. The grid is
`monitor.analysis.sample_grid`'s; the words for a window without a fit are
`monitor.analysis.fit_verdicts`'. Nothing here reads or writes a store;
`monitor.app.jobs` does that.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Collection
from dataclasses import dataclass, fields, replace
from datetime import datetime
from typing import Any

import numpy as np
import pandas as pd

from adapters.fit_record import AfterStep, FitSums, WindowFit
from model.fit import (
    ChangePoint,
    FitResult,
    StepRule,
    find_level_step,
    fit_resistance,
    fit_with_change,
)
from monitor.analysis.backflow import resting_samples
from monitor.analysis.fit_verdicts import MIN_FIT_FLOW_M3S, Verdicts, empty_grid_cause
from monitor.analysis.quality import (
    ScreenSettings,
    TagLimits,
    running_mask,
    screen,
)
from monitor.analysis.sample_checks import resolution_by_tag
from monitor.analysis.sample_grid import SampleGrid, steady_by_tag
from monitor.site.config import BranchConfig, Site

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
    and the branch's own flow are steady (`monitor.analysis.quality.steady_mask`'s rule, tag by
    tag): a transient on another branch shows in the header pressure when it matters to
    this one. The header balance keeps only samples where every flow is steady.

    With *branches* (names), only those branches are fitted and only their tags'
    screening counts and data health are returned; with *header* False, neither the
    header tags' counts and health nor the balance either. A group of branches analysed
    this way gives the same rows as the whole site does for them (each branch's fit needs
    the header tags and its own, nothing of the other branches), so a site can be split
    into groups of branches (`monitor.app.cluster`). The balance and a branch without a flow
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
    grid = SampleGrid.of(result.flags, list(site.tags), freq, t0, t1)
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
        steady, variation = steady_by_tag(
            grid, flow_tags, [site.header_pressure_tag], settings)
    why = Verdicts(site, settings, variation, resolution_by_tag(result.flags),
                    empty_grid_cause(site, result.flags, settings))
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


def _fit_row(
    site: Site, branch: BranchConfig, grid: SampleGrid, keep: np.ndarray,
    start: pd.Timestamp, end: pd.Timestamp, running: np.ndarray, why: Verdicts,
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
    branch: BranchConfig, grid: SampleGrid, mask: np.ndarray, running: np.ndarray,
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


#: `WindowFit`'s fields that a `FitResult` gives under the same name (its message is
#: extended here, so it is passed on its own)
_FROM_FIT = tuple(
    f.name for f in fields(WindowFit)
    if f.name in {g.name for g in fields(FitResult)} - {"message"}
)


def _fit_fields(fit: FitResult) -> dict[str, Any]:
    """`WindowFit`'s fields that the branch's fit gives."""
    return {**{name: getattr(fit, name) for name in _FROM_FIT}, "sums": FitSums.of(fit)}


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


def _inferred_flow(site: Site, grid: SampleGrid) -> tuple[str, np.ndarray] | None:
    """(name, flow per bin [m^3/s]) of the one branch without a flow meter, from the header
    balance: total meter − Σ metered branches (NaN where any is missing); None unless the
    site has a total meter and exactly one unmetered branch."""
    unmetered = [b for b in site.branches if b.flow_tag is None]
    if site.total_flow_tag is None or len(unmetered) != 1 or grid.empty:
        return None
    metered = [grid.columns[b.flow_tag] for b in site.branches if b.flow_tag is not None]
    flow = grid.column(site.total_flow_tag) - grid.values[:, metered].sum(axis=1)
    return unmetered[0].name, flow


def _balance_u(site: Site, grid: SampleGrid, mask: np.ndarray) -> float:
    """Expanded (95 %) uncertainty of the balance's flow over the *mask* samples [m3/h]:
    each meter's ±``[analysis] meter_uncertainty`` of its mean reading, combined."""
    tags = [site.total_flow_tag, *(b.flow_tag for b in site.branches)]
    means = [float(np.mean(grid.column(t)[mask])) for t in tags if t is not None]
    u = site.analysis.meter_uncertainty
    return 3600.0 * math.sqrt(sum((u * m) ** 2 for m in means))


def _balance(
    site: Site, grid: SampleGrid, keep: np.ndarray, start: pd.Timestamp, end: pd.Timestamp
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


