"""What-if: where the pumps and branches of a configured site settle.

`solve_curve` takes a site and a request (pump speed, a fixed header pressure, a water
temperature) and returns a `CurveResult`: the operating point, each branch's flow,
velocity, share and threshold pressure, and any back-flow hazard. Logged conditions
(tank levels, return-header pressures, valve positions) take their tags' nominal values.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

from model.network import operating_point
from monitor.site.config import Site

__all__ = ["BranchSplit", "CurveRequest", "CurveResult", "solve_curve"]

PA_PER_BAR = 1e5
M3H_PER_M3S = 3600.0


@dataclass(frozen=True)
class CurveRequest:
    """What to solve: ``None`` means the site's design value."""

    speed_ratio: float | None = None
    header_pressure_pa: float | None = None
    temperature_c: float | None = None


@dataclass(frozen=True)
class BranchSplit:
    """One branch at the operating point."""

    name: str
    termination: str
    flow_m3s: float
    threshold_pa: float
    velocity_ms: float
    share: float
    backflow_hazard: bool


@dataclass(frozen=True)
class CurveResult:
    """Operating point and branch split; ``ok`` is False with a message when unsolvable."""

    ok: bool
    message: str
    site: str = ""
    speed_ratio: float = 1.0
    pump_count: int = 0
    temperature_c: float = 20.0
    header_pressure_pa: float = float("nan")
    total_flow_m3s: float = float("nan")
    pump_fixed: bool = True
    branches: tuple[BranchSplit, ...] = field(default_factory=tuple)

    def to_json_dict(self) -> dict[str, Any]:
        return {
            "site": self.site,
            "temperature_c": self.temperature_c,
            "speed_ratio": self.speed_ratio if self.pump_fixed else None,
            "operating_point": {
                "header_pressure_pa": self.header_pressure_pa,
                "total_flow_m3s": self.total_flow_m3s,
                "solved_with_pump": self.pump_fixed,
            },
            "branches": [
                {
                    "name": b.name,
                    "termination": b.termination,
                    "flow_m3s": b.flow_m3s,
                    "threshold_pa": b.threshold_pa,
                    "velocity_ms": b.velocity_ms,
                    "share": b.share,
                    "backflow_hazard": b.backflow_hazard,
                }
                for b in self.branches
            ],
        }

    def table(self) -> str:
        lines = [self.site]
        if self.pump_fixed:
            lines.append(
                f"pumps: {self.pump_count} in parallel at {self.speed_ratio * 100:.0f} % speed; "
                f"water {self.temperature_c:.1f} °C"
            )
        else:
            lines.append(f"header pressure fixed by request; water {self.temperature_c:.1f} °C")
        lines.append(
            f"operating point: header {self.header_pressure_pa / PA_PER_BAR:.2f} bar(g), "
            f"total {self.total_flow_m3s * M3H_PER_M3S:.1f} m3/h"
        )
        lines.append("")
        head = (
            f"{'branch':<16}{'ends at':<15}{'threshold':>10}{'flow':>9}{'velocity':>10}"
            f"{'share':>7}"
        )
        units = f"{'':<16}{'':<15}{'bar(g)':>10}{'m3/h':>9}{'m/s':>10}{'%':>7}"
        lines += [head, units, "-" * len(head)]
        for b in self.branches:
            lines.append(
                f"{b.name:<16}{b.termination:<15}{b.threshold_pa / PA_PER_BAR:>10.2f}"
                f"{b.flow_m3s * M3H_PER_M3S:>9.1f}{b.velocity_ms:>10.2f}{b.share * 100:>7.1f}"
            )
        hazards = [b.name for b in self.branches if b.backflow_hazard]
        dry = [b.name for b in self.branches if b.flow_m3s <= 0 and not b.backflow_hazard]
        if dry:
            lines.append("")
            lines.append(
                "no flow (header below threshold): " + ", ".join(dry)
            )
        if hazards:
            lines.append("")
            lines.append(
                "BACK-FLOW HAZARD: header below the back-pressure of "
                + ", ".join(hazards)
                + " and no check valve; water can run back into the supply."
            )
        return "\n".join(lines)


_TERMINATION_NAMES = {
    "OpenDischarge": "open",
    "Tank": "tank",
    "HeldHeader": "held header",
    "ReturnHeader": "return header",
}


#: the conditions that set a branch's static back-pressure (the rest act on its ΔP)
_STATIC_KEYS = frozenset({"temperature_c", "level_m", "end_pressure_pa"})


def solve_curve(site: Site, request: CurveRequest) -> CurveResult:
    """Operating point of *site* for *request* (see module docstring)."""
    temperature = (
        site.design_temperature_c if request.temperature_c is None else request.temperature_c
    )
    conditions = {
        b.name: {"temperature_c": temperature, **b.nominal} for b in site.branches
    }
    header = site.header
    speed = site.design_speed if request.speed_ratio is None else request.speed_ratio
    if request.header_pressure_pa is not None:
        p_s = float(request.header_pressure_pa)
        flows = {
            b.name: float(b.model.flow(np.asarray(p_s), **conditions[b.name]))
            for b in site.branches
        }
        return _result(site, conditions, flows, p_s, speed, temperature, pump_fixed=False)
    if site.pump is None:
        return CurveResult(
            ok=False,
            message="the site file has no [pump] section; give --header-pressure instead",
        )
    pump = site.pump.at_speed(speed)
    op = operating_point(header, pump, conditions=conditions, temperature_c=temperature)
    if not op.ok:
        return CurveResult(ok=False, message=op.message)
    return _result(
        site, conditions, dict(op.branch_flows_m3s), op.header_pressure_pa, speed, temperature,
        pump_fixed=True,
    )


def _result(
    site: Site,
    conditions: dict[str, dict[str, float]],
    flows: dict[str, float],
    p_s: float,
    speed: float,
    temperature: float,
    *,
    pump_fixed: bool,
) -> CurveResult:
    total = sum(flows.values())
    splits = []
    for b in site.branches:
        cond = {k: v for k, v in conditions[b.name].items() if k in _STATIC_KEYS}
        q = flows[b.name]
        splits.append(
            BranchSplit(
                name=b.name,
                termination=_TERMINATION_NAMES.get(type(b.model.termination).__name__, "?"),
                flow_m3s=q,
                threshold_pa=float(b.model.threshold_pressure(**cond)),
                velocity_ms=float(b.model.velocity(np.asarray(q))),
                share=q / total if total > 0 else 0.0,
                backflow_hazard=bool(b.model.backflow_hazard(np.asarray(p_s), **cond)),
            )
        )
    return CurveResult(
        ok=True,
        message="",
        site=site.name,
        speed_ratio=speed,
        pump_count=site.pump_count,
        temperature_c=temperature,
        header_pressure_pa=p_s,
        total_flow_m3s=total,
        pump_fixed=pump_fixed,
        branches=tuple(splits),
    )
