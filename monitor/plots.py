"""Figures: the system curve of a site, and resistance trends for the reports.

All figures are drawn with matplotlib's non-interactive Agg backend and written as PNG.
"""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt
import numpy as np

from model.water import G, density

if TYPE_CHECKING:
    from monitor.config import Site
    from monitor.whatif import CurveResult

__all__ = ["plot_system_curve"]

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
