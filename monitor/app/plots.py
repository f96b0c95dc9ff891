"""Figures: the system curve of a site, and resistance trends for the reports.

All figures are drawn with matplotlib's non-interactive Agg backend and written as PNG,
to a file or (`png_data_uri`) into the report page itself, so the page travels alone.
"""

from __future__ import annotations

import base64
import io
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import matplotlib

matplotlib.use("Agg")
import matplotlib.dates as mdates
import matplotlib.pyplot as plt
import numpy as np
import pandas as pd
from matplotlib.figure import Figure

from model.water import G, density

if TYPE_CHECKING:
    from monitor.analysis.whatif import CurveResult
    from monitor.site.config import Site

__all__ = ["BranchHistory", "plot_branch_history", "plot_monthly_energy",
           "plot_system_curve", "png_data_uri"]

PA_PER_BAR = 1e5
M3H = 3600.0


def plot_system_curve(site: Site, result: CurveResult, path: Path) -> Path:
    """Branch curves, their sum (the system curve), the pump curve and the operating point.

    Header pressure [bar g] is on the vertical axis, flow [m³/h] on the horizontal, so the
    pump curve and the system curve cross at the operating point.
    """
    temperature = result.temperature_c
    conditions = {b.name: {"temperature_c": temperature, **b.nominal} for b in site.branches}
    thresholds = [b.threshold_pa for b in result.branches]
    p_top = max(result.header_pressure_pa * 1.35, max(thresholds) * 1.2, 1e5)
    if site.pump is not None:
        rho = float(density(np.asarray(temperature)))
        shutoff = float(site.pump.at_speed(result.speed_ratio).head(np.asarray(0.0))) * rho * G
        p_top = max(p_top, shutoff * 1.05) if result.pump_fixed else p_top
    pressures = np.linspace(0.0, p_top, 400)

    fig, ax = plt.subplots(figsize=(9, 6), dpi=110)
    total = np.zeros_like(pressures)
    for b in site.branches:
        q = np.asarray(b.model.flow(pressures, **conditions[b.name]), dtype=float)
        total += q
        ax.plot(q * M3H, pressures / PA_PER_BAR, lw=1.0, alpha=0.8, label=b.name)
    ax.plot(total * M3H, pressures / PA_PER_BAR, color="black", lw=2.2, label="system (sum)")

    if site.pump is not None and result.pump_fixed:
        pump = site.pump.at_speed(result.speed_ratio)
        q_pump = np.linspace(0.0, pump.max_flow_m3s, 200)
        rho = float(density(np.asarray(temperature)))
        ax.plot(
            q_pump * M3H, pump.head(q_pump) * rho * G / PA_PER_BAR, color="tab:red", lw=2.0,
            ls="--",
            label=f"pumps ({result.pump_count}× at {result.speed_ratio * 100:.0f} %)",
        )
    ax.plot(
        [result.total_flow_m3s * M3H], [result.header_pressure_pa / PA_PER_BAR], "o",
        ms=9, mfc="white", mec="black", mew=2, zorder=5,
        label=(
            f"operating point {result.header_pressure_pa / PA_PER_BAR:.2f} bar(g), "
            f"{result.total_flow_m3s * M3H:.0f} m3/h"
        ),
    )
    right_edge = ax.get_yaxis_transform()  # x in axes fraction, y in data
    for split in result.branches:
        ax.axhline(split.threshold_pa / PA_PER_BAR, color="grey", lw=0.5, ls=":")
        ax.annotate(
            f"{split.name} opens {split.threshold_pa / PA_PER_BAR:.2f}",
            (0.995, split.threshold_pa / PA_PER_BAR), xycoords=right_edge, fontsize=7,
            color="dimgrey", ha="right", va="bottom",
        )
    ax.set_xlabel("flow [m³/h]")
    ax.set_ylabel("header pressure [bar g]")
    ax.set_title(f"{site.name}\nsystem curve at {temperature:.0f} °C", fontsize=10)
    ax.set_xlim(left=0)
    ax.set_ylim(0, p_top / PA_PER_BAR)
    ax.grid(True, alpha=0.3)
    ax.legend(fontsize=8, loc="upper left")
    fig.tight_layout()
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path)
    plt.close(fig)
    return path


def png_data_uri(fig: Figure) -> str:
    """*fig* as a ``data:image/png;base64,…`` URI (the figure is closed)."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png")
    plt.close(fig)
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode("ascii")


#: Colours of the finding kinds on the history plots (chosen for this product).
KIND_COLOURS = {"fouling": "#c77c02", "restriction": "#b3261e", "back_pressure": "#6a4c93",
                "low_flow": "#1f7a8c", "instrument": "#7a7a7a", "imbalance": "#4f6d3a"}


@dataclass(frozen=True)
class BranchHistory:
    """What one branch's long-view plot shows; times are naive site-local timestamps.

    *fits* has columns ``t``, ``r``, ``r_low``, ``r_high``; *findings* rows are
    (kind, start, end or None: open at the month's end, label); *maintenance* rows are
    (time, label); *forecast* is None or (t_from, r_from, slope, slope_low, slope_high)
    with slopes per day, drawn up to the cleaning limit; *month* the report month's span.
    """

    name: str
    fits: pd.DataFrame
    cleaning_limit: float
    start: pd.Timestamp
    end: pd.Timestamp
    month: tuple[pd.Timestamp, pd.Timestamp]
    findings: Sequence[tuple[str, pd.Timestamp, pd.Timestamp | None, str]] = ()
    maintenance: Sequence[tuple[pd.Timestamp, str]] = ()
    forecast: tuple[pd.Timestamp, float, float, float, float] | None = None
    height_in: float = 3.1


def _x(t: pd.Timestamp) -> float:
    """A naive timestamp as matplotlib's date number."""
    return float(mdates.date2num(np.datetime64(pd.Timestamp(t).as_unit("us").asm8)))


def plot_branch_history(h: BranchHistory) -> Figure:
    """r per day over the long view: its 95 % band, the cleaning limit, the report month
    shaded, findings as bars along the foot, maintenance as vertical lines, and the
    fouling forecast as a fan from the last level to the limit (central, slow, fast)."""
    fig, ax = plt.subplots(figsize=(10, h.height_in), dpi=100)
    f = h.fits
    top = h.cleaning_limit * 1.12
    if not f.empty:
        ax.fill_between(f["t"], f["r_low"], f["r_high"], color="#9fb3d9", alpha=0.55, lw=0,
                        label="95 % interval")
        ax.plot(f["t"], f["r"], color="#23407a", lw=1.1, label="r per day")
        top = max(top, float(np.nanmax(f["r"])) * 1.06)
    ax.axvspan(_x(h.month[0]), _x(h.month[1]), color="#e9edf5", zorder=0)
    ax.axhline(h.cleaning_limit, color="#b3261e", lw=1.0, ls="--",
               label=f"cleaning limit {h.cleaning_limit:.2f}")
    ax.axhline(1.0, color="grey", lw=0.6)
    right = h.end
    if h.forecast is not None:
        t0, r0, slope, lo, hi = h.forecast
        for s, style in ((slope, "-"), (lo, ":"), (hi, ":")):
            if s <= 0:
                continue
            days = max((h.cleaning_limit - r0) / s, 0.0)
            t1 = min(t0 + pd.Timedelta(days=days), h.end)
            r1 = r0 + s * (t1 - t0) / pd.Timedelta(days=1)
            ax.plot([_x(t0), _x(t1)], [r0, r1], color="#c77c02", lw=1.3 if style == "-" else 1.0,
                    ls=style, label="forecast (dotted: its interval)" if style == "-" else None)
    bottom = 0.8
    span = top - bottom
    for i, (kind, start, end, label) in enumerate(h.findings):
        y = bottom + span * (0.03 + 0.045 * (i % 4))
        x1 = h.month[1] if end is None else end
        x0 = max(start, h.start)
        if x1 < h.start:
            continue
        ax.plot([_x(x0), _x(x1)], [y, y], color=KIND_COLOURS.get(kind, "#444444"), lw=4,
                solid_capstyle="butt")
        ax.annotate(label, (_x(x0), y), xytext=(2, 3), textcoords="offset points", fontsize=7,
                    color=KIND_COLOURS.get(kind, "#444444"))
    for when, label in h.maintenance:
        if h.start <= when <= right:
            ax.axvline(_x(when), color="#2e7d32", lw=1.0)
            ax.annotate(label, (_x(when), top), xytext=(3, -10), textcoords="offset points",
                        fontsize=7, color="#2e7d32", rotation=0, va="top")
    ax.set_xlim(_x(h.start), _x(right))
    ax.set_ylim(bottom, top)
    ax.set_ylabel("resistance ratio r [-]", fontsize=8)
    ax.set_title(h.name, fontsize=10, loc="left")
    ax.grid(True, alpha=0.3)
    ax.tick_params(labelsize=8)
    # above the plot, right of the title: clear of the data and the maintenance labels
    ax.legend(fontsize=7, loc="lower right", bbox_to_anchor=(1.0, 1.0), ncol=4,
              frameon=False, borderaxespad=0.2)
    fig.tight_layout()
    return fig


def plot_monthly_energy(months: Sequence[str], by_branch: dict[str, Sequence[float]],
                        *, unit: str) -> Figure:
    """Bars per month stacked by branch: the extra pump energy (or its cost) [*unit*]."""
    fig, ax = plt.subplots(figsize=(10, 3.0), dpi=100)
    x = np.arange(len(months))
    base = np.zeros(len(months))
    colours = plt.get_cmap("tab10")
    for k, (name, values) in enumerate(by_branch.items()):
        v = np.asarray(values, dtype=float)
        if not np.any(v > 0):
            continue
        ax.bar(x, v, bottom=base, color=colours(k % 10), label=name, width=0.75)
        base += v
    ax.set_xticks(x, months, rotation=45, ha="right", fontsize=8)
    ax.set_ylabel(unit, fontsize=8)
    ax.tick_params(labelsize=8)
    ax.grid(True, axis="y", alpha=0.3)
    if np.any(base > 0):
        ax.legend(fontsize=7, loc="upper left", frameon=False)
    else:
        ax.text(0.5, 0.5, "no extra pumping counted in these months", transform=ax.transAxes,
                ha="center", va="center", fontsize=9, color="#555e70")
    ax.set_xlim(-0.6, len(months) - 0.4)
    fig.tight_layout()
    return fig
