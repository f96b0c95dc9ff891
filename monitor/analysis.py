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
from dataclasses import asdict, dataclass
from datetime import datetime
from typing import Any

import numpy as np
import pandas as pd

from model.fit import FitResult, fit_resistance
from monitor.config import BranchConfig, Site
from monitor.quality import ScreenSettings, TagLimits, running_mask, screen, steady_mask, to_wide

log = logging.getLogger(__name__)

__all__ = ["WindowAnalysis", "analyze_window", "logging_interval", "screen_settings"]

#: Relative expanded (95 %) uncertainty of a branch flow meter when the site file gives
#: none: ±2 % of reading (common practice for installed magnetic meters, which are rated
#: ±0.5 % on the calibration rig; installation effects take the rest).
DEFAULT_METER_UNCERTAINTY = 0.02
#: A window needs this many steady samples for the header balance [-].
MIN_BALANCE_SAMPLES = 10


@dataclass(frozen=True)
class WindowAnalysis:
    """What one window gave: fit rows, screening counts, the balance, data health."""

    fits: list[dict[str, Any]]
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
    return ScreenSettings(
        running_pressure_pa=site.running_pressure_pa,
        max_gap_s=max(600.0, 5 * grid),
        steady_window_s=max(900.0, 6 * grid),
        frozen_s=max(3600.0, 12 * grid),
        settling_s=max(600.0, 2 * grid),
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
    site: Site, readings: pd.DataFrame, start: datetime, end: datetime
) -> WindowAnalysis:
    """Screen, select and fit one window [start, end) of *readings* (a readings frame)."""
    readings = readings[readings["tag"].isin(list(site.tags))]
    interval = logging_interval(readings, site.header_pressure_tag)
    settings = screen_settings(site, interval)
    specs = {tag: TagLimits.from_spec(spec) for tag, spec in site.tags.items()}
    t0, t1 = pd.Timestamp(start), pd.Timestamp(end)
    result = screen(
        readings, specs, settings, start=t0, end=t1,
        header_pressure_tag=site.header_pressure_tag, total_flow_tag=site.total_flow_tag,
    )
    health = result.health_counts()
    screening = _screening_counts(site, result.flags, t0, t1)
    usable = result.usable_readings()
    freq = pd.Timedelta(seconds=max(site.analysis.sample_period, interval or 0.0))
    wide = to_wide(usable, freq, start=t0, end=t1)
    for tag in site.tags:
        if tag not in wide.columns:
            wide[tag] = np.nan
    # Grid bins without a header pressure say nothing about the pump (the historian may
    # log less often than the grid): drop them, or each would count as a stop and a start.
    wide = wide[wide[site.header_pressure_tag].notna()]
    fits: list[dict[str, Any]] = []
    if wide.empty:
        keep = pd.Series(dtype=bool)
    else:
        running = running_mask(wide, site.header_pressure_tag, None, settings)
        flow_tags = [b.flow_tag for b in site.branches if b.flow_tag]
        steady = steady_mask(wide, flow_tags, [site.header_pressure_tag], settings)
        keep = running & steady
    for branch in site.branches:
        fits.append(_fit_row(site, branch, wide, keep, t0, t1))
    balance = _balance(site, wide, keep, t0, t1)
    return WindowAnalysis(
        fits=fits, screening=screening, balance=balance, health=health, samples=len(readings)
    )


def _fit_row(
    site: Site, branch: BranchConfig, wide: pd.DataFrame, keep: pd.Series,
    start: pd.Timestamp, end: pd.Timestamp,
) -> dict[str, Any]:
    row: dict[str, Any] = {"branch": branch.name, "window_start": start, "window_end": end}
    if branch.flow_tag is None or wide.empty:
        return {**row, **_empty("no flow meter on this branch" if branch.flow_tag is None
                                else "no readings in this window")}
    p = wide[site.header_pressure_tag].to_numpy(dtype=float)
    q = wide[branch.flow_tag].to_numpy(dtype=float)
    if site.header_temperature_tag is not None:
        t = wide[site.header_temperature_tag].to_numpy(dtype=float)
    else:
        t = np.full(len(wide), site.design_temperature_c)
    conditions = {key: wide[tag].to_numpy(dtype=float)
                  for key, tag in branch.logged_conditions.items()}
    mask = keep.to_numpy(dtype=bool) & np.isfinite(p) & np.isfinite(q) & np.isfinite(t)
    for values in conditions.values():
        mask &= np.isfinite(values)
    floor = max(branch.min_flow_m3s * 0.25, 1e-4)
    mask &= q > floor
    if mask.sum() < site.analysis.min_samples:
        row.update(_empty(
            f"{int(mask.sum())} steady samples with flow above {floor * 3600:.1f} m3/h; "
            f"{site.analysis.min_samples} needed", status="too_few_samples"))
        row["mean_flow_m3s"] = float(np.nanmean(q)) if np.isfinite(q).any() else math.nan
        return row
    kwargs = {k: v[mask] for k, v in conditions.items()}
    fit = fit_resistance(
        branch.model, header_pressure_pa=p[mask], flow_m3s=q[mask], temperature_c=t[mask],
        min_flow_m3s=floor, **kwargs,
    )
    row.update(_fit_fields(fit))
    row["temperature_c"] = float(np.mean(t[mask]))
    row["header_pressure_pa"] = float(np.mean(p[mask]))
    end_tag = branch.end_pressure_tag
    if end_tag is not None:
        row["end_pressure_pa"] = float(np.median(wide[end_tag].to_numpy(float)[mask]))
    return row


def _fit_fields(fit: FitResult) -> dict[str, Any]:
    fields = asdict(fit)
    fields.pop("iterations", None)
    fields.pop("loss", None)
    fields.pop("fit_static", None)
    return fields


def _empty(message: str, *, status: str = "no_data") -> dict[str, Any]:
    nan = math.nan
    return {
        "r": nan, "r_low": nan, "r_high": nan, "s_pa": nan, "s_low_pa": nan,
        "s_high_pa": nan, "identifiable": None, "samples": 0, "status": status,
        "message": message,
    }


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
    present = [c for c in cols if c in flags.columns]
    if flags.empty:
        return pd.DataFrame(columns=["branch", "window_start", "window_end", "tag", *cols,
                                     "samples"])
    counts = flags.groupby("tag")[present].sum().astype("int64")
    counts["samples"] = flags.groupby("tag").size()
    for c in cols:
        if c not in counts.columns:
            counts[c] = 0
    counts = counts.reset_index()
    counts["branch"] = counts["tag"].map(owner).fillna("header")
    counts["window_start"] = start
    counts["window_end"] = end
    return counts[["branch", "window_start", "window_end", "tag", *cols, "samples"]]


def _balance(
    site: Site, wide: pd.DataFrame, keep: pd.Series, start: pd.Timestamp, end: pd.Timestamp
) -> dict[str, Any] | None:
    """Σ branch meters − total meter over the steady samples, with its uncertainty."""
    tags = [b.flow_tag for b in site.branches]
    if site.total_flow_tag is None or wide.empty or any(t is None for t in tags):
        return None
    total = wide[site.total_flow_tag]
    branches = wide[[t for t in tags if t is not None]]
    ok = keep & total.notna() & branches.notna().all(axis=1)
    if int(ok.sum()) < MIN_BALANCE_SAMPLES:
        return None
    u = site.analysis.meter_uncertainty
    q_total = float(total[ok].mean())
    q_branch = branches[ok].mean()
    residual = float(q_branch.sum() - q_total)
    uncertainty = math.sqrt(float(((u * q_branch) ** 2).sum()) + (u * q_total) ** 2)
    return {
        "window_start": start, "window_end": end, "residual_m3s": residual,
        "uncertainty_m3s": uncertainty, "samples": int(ok.sum()),
    }

