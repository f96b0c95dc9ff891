"""Speed of the historian simulator and accuracy of the daily resistance fit.

Prints: the time to simulate one year of 1-minute data for a five-branch site (one
branch per termination kind), the time per branch-day fit, and per branch the median
and 95th percentile of |r − r_true|/r_true over the year's daily fits, with faults
injected (fouling ramps, a restriction, a back-pressure step on an unlogged header).

Run: ``.venv/bin/python benchmarks/simulate_fit.py [--days N] [--seed S]``
"""

from __future__ import annotations

import argparse
import itertools
import time
from collections import Counter
from typing import Any

import numpy as np

from model import simulate as sm
from model.branch import Branch, HeldHeader, OpenDischarge, ReturnHeader, Tank, Termination
from model.elements import ControlValve, Element, Equipment, Fittings, Pipe
from model.fit import fit_resistance
from model.network import ParallelHeader, PumpCurve

BAR = 1.0e5


def _branch(name: str, nps: float, length: float, term: Termination, *extra: Element) -> Branch:
    pipe = Pipe.from_nominal(length, nps)
    fittings = Fittings(pipe.inner_diameter_m, {"elbow_90": 6, "gate_valve": 2})
    return Branch(name, [pipe, fittings, *extra], term)


def site() -> tuple[ParallelHeader, PumpCurve, sm.SiteTags, dict[str, dict[str, str]]]:
    """Our invented five-branch block; returns also the logged conditions per branch."""
    branches = [
        _branch("CW-1", 6, 120.0, Tank(6.0), Equipment(0.5 * BAR, 0.05)),
        _branch("CW-2", 5, 80.0, HeldHeader(1.5 * BAR), Equipment(0.4 * BAR, 0.035)),
        _branch("CW-3", 4, 60.0, OpenDischarge(3.0), ControlValve(150.0, position=0.7)),
        _branch("CW-4", 4, 90.0, ReturnHeader(0.8 * BAR), Equipment(0.3 * BAR, 0.02)),
        _branch("CW-5", 3, 40.0, Tank(2.0, level_m=2.0), Equipment(0.3 * BAR, 0.01)),
    ]
    pump = PumpCurve([0.0, 0.05, 0.1, 0.15, 0.2, 0.25], [55.0, 54.0, 51.0, 46.0, 38.0, 27.0])
    tags = sm.SiteTags(
        header_pressure="PT-100",
        temperature="TT-100",
        total_flow="FT-100",
        pump_speed="SI-100",
        branches={
            "CW-1": sm.BranchTags(flow="FT-201", level="LT-301"),
            "CW-2": sm.BranchTags(flow="FT-202", end_pressure="PT-302"),
            "CW-3": sm.BranchTags(flow="FT-203", valve_position="ZT-303"),
            "CW-4": sm.BranchTags(flow="FT-204"),
            "CW-5": sm.BranchTags(flow="FT-205"),
        },
    )
    logged = {
        "CW-1": {"level_m": "LT-301"},
        "CW-2": {"end_pressure_pa": "PT-302"},
        "CW-3": {"valve_position": "ZT-303"},
        "CW-4": {},
        "CW-5": {},
    }
    return ParallelHeader(branches), pump, tags, logged


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--days", type=int, default=365)
    parser.add_argument("--seed", type=int, default=1)
    args = parser.parse_args()
    header, pump, tags, logged = site()
    start = np.datetime64("2025-01-01T00:00", "ns")
    end = start + np.timedelta64(args.days, "D")
    faults: list[sm.Fault] = [
        sm.FoulingRamp("CW-1", "2025-02-01", 120.0, 1.6),
        sm.Cleaning("CW-1", "2025-07-01"),
        sm.FoulingRamp("CW-2", "2025-03-01", 90.0, 1.5, shape="asymptotic"),
        sm.StepRestriction("CW-3", "2025-05-10T09:00", 1.4),
        sm.BackPressureStep("CW-4", "2025-06-01", 0.2 * BAR),
    ]
    t0 = time.perf_counter()
    sim = sm.simulate(header, pump, tags, start=start, end=end, faults=faults, seed=args.seed)
    t_sim = time.perf_counter() - t0
    n = sim.times.size
    print(f"simulate: {args.days} days x 1 min x {len(header.branches)} branches = {n} samples")
    print(f"  {t_sim:.2f} s  ({n / t_sim / 1e3:.0f} k samples/s, unconverged {sim.unconverged})")

    days = sim.times.astype("datetime64[D]")
    bounds = np.flatnonzero(np.r_[True, days[1:] != days[:-1], True])
    fit_time = 0.0
    fits = 0
    print("daily fits (screening stand-in: samples with flow > 1 m^3/h and finite inputs)")
    print(f"  {'branch':7} {'termination':13} {'fits':>5} {'median|dr|/r':>13} {'p95':>8}  status")
    for b in header.branches:
        errors = []
        status: Counter[str] = Counter()
        for i0, i1 in itertools.pairwise(bounds):
            sl = slice(i0, i1)
            extra: dict[str, Any] = {k: sim.values[v][sl] for k, v in logged[b.name].items()}
            flow_tag = tags.branches[b.name].flow
            assert flow_tag is not None
            t1 = time.perf_counter()
            res = fit_resistance(
                b,
                header_pressure_pa=sim.values["PT-100"][sl],
                flow_m3s=sim.values[flow_tag][sl],
                temperature_c=sim.values["TT-100"][sl],
                min_flow_m3s=1.0 / 3600.0,
                **extra,
            )
            fit_time += time.perf_counter() - t1
            fits += 1
            status[res.status] += 1
            if res.usable:
                r_true = float(np.mean(sim.truth.resistance_ratio[b.name][sl]))
                errors.append(abs(res.r - r_true) / r_true)
        e = np.array(errors)
        med = float(np.median(e)) if e.size else float("nan")
        p95 = float(np.percentile(e, 95)) if e.size else float("nan")
        kind = type(b.termination).__name__
        print(f"  {b.name:7} {kind:13} {e.size:5d} {med:13.4f} {p95:8.4f}  {dict(status)}")
    print(f"fit: {fit_time / fits * 1e3:.1f} ms per branch-day ({fits} fits)")


if __name__ == "__main__":
    main()
