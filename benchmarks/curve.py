"""System curve of a 1,000-branch header at 1,000 header pressures: vectorised vs scalar.

The vectorised model (`ParallelHeader.system_curve`: all branches stacked and inverted
together by bracketed root finding on whole arrays) against what one writes first: a
loop over branches and pressures calling scipy's `brentq` on the scalar branch curve.
The scalar loop is far too slow to run in full (10^6 root solves), so it is timed on a
random subset of (branch, pressure) pairs and scaled; the output says so. The two
answers are compared on that subset.

Run: ``.venv/bin/python benchmarks/curve.py [--branches N] [--pressures M] [--sample K]``
"""

from __future__ import annotations

import argparse
import math
import os
import time

import numpy as np
from scipy.optimize import brentq

from model.branch import Branch, HeldHeader, OpenDischarge, Tank
from model.elements import ControlValve, Equipment, Fittings, Pipe
from model.network import ParallelHeader

NPS = [2, 2.5, 3, 4, 5, 6, 8]


def make_header(n: int, seed: int = 1) -> ParallelHeader:
    """*n* invented branches: pipe, fittings, control valve, exchanger, mixed ends."""
    rng = np.random.default_rng(seed)
    branches = []
    for i in range(n):
        pipe = Pipe.from_nominal(float(rng.uniform(10, 300)), NPS[i % len(NPS)])
        d = pipe.inner_diameter_m
        q_design = 1.5 * math.pi * d * d / 4  # 1.5 m/s
        counts = {"elbow_90": int(rng.integers(2, 12)), "gate_valve": 2, "tee_branch": 1}
        kind = i % 3
        term: OpenDischarge | Tank | HeldHeader
        if kind == 0:
            term = OpenDischarge(elevation_m=float(rng.uniform(0, 15)))
        elif kind == 1:
            term = Tank(float(rng.uniform(2, 12)), level_m=float(rng.uniform(0.5, 4)))
        else:
            term = HeldHeader(set_pressure_pa=float(rng.uniform(0.5e5, 2.5e5)))
        branches.append(
            Branch(
                f"B{i:04d}",
                [
                    pipe,
                    Fittings(d, counts),
                    ControlValve(3600 * q_design * 1.5, position=float(rng.uniform(0.4, 1.0))),
                    Equipment(float(rng.uniform(2e4, 8e4)), q_design, exponent=1.85),
                ],
                term,
            )
        )
    return ParallelHeader(branches)


def scalar_flow(branch: Branch, p_s: float) -> float:
    """One branch at one header pressure, the straightforward way: brentq on dp(q)."""
    static = float(branch.static_pressure())
    if p_s <= static:
        return 0.0
    hi = 0.01
    while float(branch.dp(hi)) < p_s:
        hi *= 2.0
    return float(brentq(lambda q: float(branch.dp(q)) - p_s, 0.0, hi, xtol=1e-14, rtol=1e-12))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--branches", type=int, default=1000)
    ap.add_argument("--pressures", type=int, default=1000)
    ap.add_argument("--sample", type=int, default=400, help="scalar solves actually timed")
    args = ap.parse_args()

    load = os.getloadavg()[0]
    header = make_header(args.branches)
    pressures = np.linspace(0.0, 8e5, args.pressures)
    header.system_curve(pressures[:10])  # warm caches (water properties, imports)

    # The stacked curve is timed three times (it is cheap) and the best is compared:
    # on a shared machine other processes inflate single timings.
    # CPU time is printed too: it is what the run costs when the cores are not shared.
    times, cpu = [], []
    for _ in range(3):
        t0, c0 = time.perf_counter(), time.process_time()
        curve = header.system_curve(pressures)
        times.append(time.perf_counter() - t0)
        cpu.append(time.process_time() - c0)
    t_vec = min(times)

    t0, c0 = time.perf_counter(), time.process_time()
    for b in header.branches:
        b.flow(pressures)
    t_loop = time.perf_counter() - t0
    cpu_loop = time.process_time() - c0

    rng = np.random.default_rng(2)
    bi = rng.integers(0, args.branches, args.sample)
    pi = rng.integers(0, args.pressures, args.sample)
    t0 = time.perf_counter()
    pairs = list(zip(bi, pi, strict=True))
    ref = [scalar_flow(header.branches[i], float(pressures[j])) for i, j in pairs]
    t_sample = time.perf_counter() - t0
    solves = args.branches * args.pressures
    t_scalar = t_sample / args.sample * solves

    flows = curve.branch_flows_m3s
    vec = np.array([flows[header.branches[i].name][j] for i, j in pairs])
    ref_a = np.array(ref)
    flowing = ref_a > 0
    worst = float(np.max(np.abs(vec[flowing] / ref_a[flowing] - 1.0), initial=0.0))
    agree_zero = bool(np.all(vec[~flowing] == 0.0))

    print(f"system curve: {args.branches} branches x {args.pressures} header pressures "
          f"= {solves:,} branch flows")
    print(f"  machine: {os.cpu_count()} cores, load average {load:.1f} at start")
    print(f"  vectorised, stacked (ParallelHeader.system_curve): {t_vec:8.3f} s "
          f"(best of 3: {', '.join(f'{t:.3f}' for t in times)}; "
          f"CPU time {min(cpu):.3f} s)")
    print(f"  vectorised, one branch at a time (Branch.flow):    {t_loop:8.3f} s "
          f"(CPU time {cpu_loop:.3f} s)")
    print(f"  scalar brentq loop: {args.sample} solves timed in {t_sample:.3f} s, "
          f"scaled to {solves:,}: {t_scalar:8.1f} s (estimate, not run in full)")
    print(f"  speed-up stacked vs scalar loop: {t_scalar / t_vec:,.0f}x "
          f"(goal >= 50x); per-branch vectorised vs scalar: {t_scalar / t_loop:,.0f}x")
    n_txt = f"{args.branches:,} x {args.pressures:,}"
    print(f"  {n_txt} under 1 s: wall {'yes' if t_vec < 1.0 else 'NO'} ({t_vec:.3f} s), "
          f"CPU {'yes' if min(cpu) < 1.0 else 'NO'} ({min(cpu):.3f} s)")
    print(f"  agreement on the sample: worst relative flow difference {worst:.1e}, "
          f"zero flows agree: {agree_zero}")
    print(f"  total flow at {pressures[-1] / 1e5:.0f} bar: "
          f"{curve.total_flow_m3s[-1] * 3600:,.0f} m3/h")


if __name__ == "__main__":
    main()
