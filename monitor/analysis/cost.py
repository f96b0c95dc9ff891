"""What added resistance costs: lost flow and extra pump energy, in SI.

A resistance finding (fouling or a restriction) makes a branch carry less water at the
same header pressure, and makes the pump work against a larger drop for the flow it
still carries. At one operating point (header pressure, flow, temperature, the fitted
resistance ratio r against a baseline r), `branch_cost` computes with the branch model

    lost flow  = Q_clean(P_s) − Q_now                             [m^3/s]
    ΔP_extra   = (r_now − r_baseline)·ΔP_dyn,clean(Q_now)          [Pa]
    P_extra    = ΔP_extra·Q_now/η                                  [W]
    E          = P_extra·t                                         [J]

(hydraulic power over the wire-to-water efficiency η; common practice), and
`daily_costs` does so for every usable fit of a day on which a resistance finding stood
open. `energy_cost` prices energy at the site's [cost] energy_price. Everything here
returns SI figures (m^3/s, Pa, W, J; currency per J); the reports convert for display.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from monitor.site.config import BranchConfig, Site

__all__ = [
    "DEFAULT_PUMP_EFFICIENCY",
    "J_PER_KWH",
    "RESISTANCE_KINDS",
    "FindingCost",
    "branch_cost",
    "daily_costs",
    "energy_cost",
    "finding_cost",
    "monthly_totals",
    "price_per_joule",
]

#: Assumed pump (wire-to-water) efficiency when the site config gives none [-]. A typical
#: figure for a centrifugal pump with motor on a drive (common practice); labelled
#: "assumed" on every result that uses it.
DEFAULT_PUMP_EFFICIENCY = 0.70
#: 1 kWh = 3.6e6 J (SI Brochure, 9th ed., table 8: the kilowatt hour is 3.6 MJ).
J_PER_KWH = 3.6e6
SECONDS_PER_DAY = 86_400.0
#: The finding kinds that add resistance, and so cost energy and flow.
RESISTANCE_KINDS = ("fouling", "restriction")


@dataclass(frozen=True)
class FindingCost:
    """What added resistance costs at one operating point.

    Attributes
    ----------
    lost_flow_m3s : clean-curve flow minus today's flow at today's header pressure [m^3/s]
    lost_flow_fraction : lost flow over the clean-curve flow [-]
    extra_dp_pa : pressure drop the added resistance takes at today's flow [Pa]
    extra_power_w : hydraulic power of that drop divided by the pump efficiency [W]
    extra_energy_j_per_day : extra_power × the running hours of a day [J per day]
    pump_efficiency : the efficiency used [-]
    efficiency_assumed : True when it is `DEFAULT_PUMP_EFFICIENCY`, not a site figure
    """

    lost_flow_m3s: float
    lost_flow_fraction: float
    extra_dp_pa: float
    extra_power_w: float
    extra_energy_j_per_day: float
    pump_efficiency: float
    efficiency_assumed: bool
    notes: tuple[str, ...] = field(default=())


def finding_cost(
    *,
    flow_clean_m3s: float,
    flow_now_m3s: float,
    dp_dynamic_clean_pa: float,
    r_now: float,
    r_baseline: float = 1.0,
    pump_efficiency: float | None = None,
    hours_per_day: float = 24.0,
) -> FindingCost:
    """Lost flow and extra pump energy of a resistance increase.

    The caller computes, with the branch model at today's header pressure and
    temperature, the flow the clean (or baseline) branch would carry and the clean
    dynamic pressure drop at today's flow (`branch_cost` does both).

    Parameters
    ----------
    flow_clean_m3s : flow of the clean/baseline branch at today's header pressure [m^3/s]
    flow_now_m3s : today's flow [m^3/s]
    dp_dynamic_clean_pa : clean dynamic pressure drop at today's flow [Pa]
    r_now : today's resistance ratio [-]
    r_baseline : resistance ratio of the reference state (1.0 = as designed) [-]
    pump_efficiency : wire-to-water efficiency [-]; None uses the assumed 0.70
    hours_per_day : running hours per day [h]

    >>> c = finding_cost(flow_clean_m3s=0.040, flow_now_m3s=0.034,
    ...                  dp_dynamic_clean_pa=1.0e5, r_now=1.4)
    >>> round(c.extra_dp_pa), round(c.extra_power_w), round(c.extra_energy_j_per_day / 1e6, 2)
    (40000, 1943, 167.86)
    """
    values = {
        "flow_clean_m3s": flow_clean_m3s,
        "flow_now_m3s": flow_now_m3s,
        "dp_dynamic_clean_pa": dp_dynamic_clean_pa,
        "r_now": r_now,
        "r_baseline": r_baseline,
        "hours_per_day": hours_per_day,
    }
    for key, val in values.items():
        if not math.isfinite(val) or val < 0:
            raise ValueError(f"{key} must be a finite number >= 0, got {val}")
    if hours_per_day > 24.0:
        raise ValueError(f"hours_per_day must be at most 24, got {hours_per_day}")
    assumed = pump_efficiency is None
    eta = DEFAULT_PUMP_EFFICIENCY if pump_efficiency is None else float(pump_efficiency)
    if not 0.0 < eta <= 1.0:
        raise ValueError(f"pump_efficiency must be in (0, 1], got {pump_efficiency}")
    notes: list[str] = []
    if assumed:
        notes.append(f"pump efficiency {eta:.2f} assumed (not in the site config)")
    extra_dp = max(r_now - r_baseline, 0.0) * dp_dynamic_clean_pa
    power = extra_dp * flow_now_m3s / eta
    lost = max(flow_clean_m3s - flow_now_m3s, 0.0)
    frac = lost / flow_clean_m3s if flow_clean_m3s > 0 else 0.0
    return FindingCost(
        lost_flow_m3s=lost,
        lost_flow_fraction=frac,
        extra_dp_pa=extra_dp,
        extra_power_w=power,
        extra_energy_j_per_day=power * hours_per_day * 3600.0,
        pump_efficiency=eta,
        efficiency_assumed=assumed,
        notes=tuple(notes),
    )


def branch_cost(
    site: Site, branch: BranchConfig, *, header_pressure_pa: float, flow_m3s: float,
    r_now: float, temperature_c: float, r_baseline: float,
    end_pressure_pa: float | None = None,
) -> FindingCost:
    """`finding_cost` of *branch* at one operating point, the clean flow and drop taken
    from its model (the logged conditions at their nominal values, the termination at
    *end_pressure_pa* [Pa gauge] where the fit logged it).

    header_pressure_pa [Pa gauge], flow_m3s [m^3/s], r_now and r_baseline [-],
    temperature_c [°C].
    """
    cond: dict[str, float] = {"temperature_c": temperature_c, **branch.nominal}
    if end_pressure_pa is not None:
        cond["end_pressure_pa"] = end_pressure_pa
    q_clean = float(branch.model.flow(np.asarray(header_pressure_pa),
                                      resistance_ratio=r_baseline, **cond))
    rest, _valve = branch.model.dp_dynamic_parts(
        np.asarray(flow_m3s), temperature_c=temperature_c,
        valve_position=cond.get("valve_position"))
    return finding_cost(flow_clean_m3s=q_clean, flow_now_m3s=flow_m3s,
                        dp_dynamic_clean_pa=float(rest), r_now=r_now,
                        r_baseline=r_baseline, pump_efficiency=site.pump_efficiency)


def price_per_joule(site: Site) -> float | None:
    """The site's energy price [currency/J] ([cost] energy_price), None when unset."""
    price = site.energy_price
    return None if price is None else price.per_kwh / J_PER_KWH


def energy_cost(site: Site, energy_j: float) -> float | None:
    """What *energy_j* [J] of pumping costs [currency]; None without an energy price."""
    per_j = price_per_joule(site)
    return None if per_j is None else energy_j * per_j


# ---------------------------------------------------------------------------------------
# day by day


def _open_spans(findings: pd.DataFrame, branch: str
                ) -> list[tuple[pd.Timestamp, pd.Timestamp, float]]:
    """(start, end, r_baseline) of the branch's resistance findings; open: end = +inf."""
    if findings.empty:
        return []
    out = []
    part = findings[(findings["branch"] == branch) & findings["kind"].isin(RESISTANCE_KINDS)]
    for r in part.to_dict(orient="records"):
        end = r.get("end")
        end_t = pd.Timestamp.max.tz_localize("UTC") if end is None or pd.isna(end) \
            else pd.Timestamp(end)
        base = (r.get("evidence") or {}).get("r_baseline")
        base = float(base) if isinstance(base, int | float) and math.isfinite(base) else None
        out.append((pd.Timestamp(r["start"]), end_t,
                    base if base is not None and base > 0 else 1.0))
    return out


#: The columns of `daily_costs`.
DAY_COLUMNS = ("branch", "window_start", "window_end", "lost_flow_m3s", "extra_energy_j",
               "costed")


def daily_costs(site: Site, fits: pd.DataFrame, findings: pd.DataFrame) -> pd.DataFrame:
    """Per branch and usable fit (a daily window): lost flow [m^3/s] and extra pump
    energy [J] of the day while a resistance finding stood open that day (zero on other
    days); columns `DAY_COLUMNS`, ``costed``: a finding stood open and the day's fit had
    what the cost needs."""
    cols = list(DAY_COLUMNS)
    if fits.empty:
        return pd.DataFrame(columns=cols)
    rows: list[dict[str, Any]] = []
    for b in site.branches:
        part = fits[(fits["branch"] == b.name) & fits["r"].notna()]
        spans = _open_spans(findings, b.name)
        for f in part.to_dict(orient="records"):
            ws, we = pd.Timestamp(f["window_start"]), pd.Timestamp(f["window_end"])
            bases = [base for s, e, base in spans if s < we and e > ws]
            lost, energy = (_day_cost(site, b, {str(k): v for k, v in f.items()}, min(bases))
                            if bases else (0.0, 0.0))
            rows.append({"branch": b.name, "window_start": ws, "window_end": we,
                         "lost_flow_m3s": lost, "extra_energy_j": energy,
                         "costed": bool(bases) and math.isfinite(lost)})
    out = pd.DataFrame(rows, columns=cols)
    out[["lost_flow_m3s", "extra_energy_j"]] = out[["lost_flow_m3s", "extra_energy_j"]
                                                   ].fillna(0.0)
    return out


def _day_cost(site: Site, b: BranchConfig, fit: Mapping[str, Any], r_base: float
              ) -> tuple[float, float]:
    """(lost flow [m^3/s], extra energy of the day [J]) of one fit against *r_base*;
    NaN when the fit lacks what the cost needs (a missing temperature: the design one)."""
    def val(key: str) -> float:
        v = fit.get(key)
        return float(v) if v is not None and not pd.isna(v) else math.nan

    p_s, q_now, r_now = val("header_pressure_pa"), val("mean_flow_m3s"), float(fit["r"])
    t_c = val("temperature_c")
    t_c = t_c if math.isfinite(t_c) else site.design_temperature_c
    if not all(math.isfinite(v) and v >= 0 for v in (p_s, q_now, r_now)):
        return math.nan, math.nan
    end_p = val("end_pressure_pa")
    cost = branch_cost(site, b, header_pressure_pa=p_s, flow_m3s=q_now, r_now=r_now,
                       temperature_c=t_c, r_baseline=r_base,
                       end_pressure_pa=end_p if math.isfinite(end_p) else None)
    return cost.lost_flow_m3s, cost.extra_energy_j_per_day


def monthly_totals(site: Site, days: pd.DataFrame) -> pd.DataFrame:
    """Per site-local month (of the window start) and branch, from `daily_costs`:
    ``extra_energy_j`` summed [J], ``lost_flow_m3s`` averaged over the days fitted
    [m^3/s], ``days`` fitted, ``costed`` days."""
    if days.empty:
        return pd.DataFrame(columns=["month", "branch", "extra_energy_j", "lost_flow_m3s",
                                     "days", "costed"])
    month = pd.to_datetime(days["window_start"]).dt.tz_convert(site.timezone
                                                               ).dt.strftime("%Y-%m")
    d = days.assign(month=month)
    return d.groupby(["month", "branch"], as_index=False).agg(
        extra_energy_j=("extra_energy_j", "sum"), lost_flow_m3s=("lost_flow_m3s", "mean"),
        days=("extra_energy_j", "size"), costed=("costed", "sum"))
