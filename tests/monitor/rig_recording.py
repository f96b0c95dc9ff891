"""A synthetic recording of a small water-circulation test rig, written as its logger would.

Our own invented rig ("Bench loop 2"): one small pump feeds a header at about 0.07 bar
gauge; 1–3 branches run to open discharges (a bench tank at atmospheric pressure). The
logger writes one `;`-separated CSV of 1-second samples with tag names that hold spaces;
the header gauge resolves 0.05 bar (it reads 0.05 or 0.10); the flows are in L/min. A
manual valve on the branches is closed part way about 20 times, each closure about 7 min
and deep enough to take 5–40 % of the branch's flow. No pump curve is known.

The flows follow the branches' own models (`model.branch.Branch.flow`) at the true
header pressure, a closure being a resistance ratio r on the whole
branch set so that the branch loses that share of the flow it had open; the header
pressure follows a pump whose pressure falls with the square of the total flow, so a
closure raises it slightly. The
pump curve lives here only; the site file does not know it.

Used by tests/monitor/test_rig.py (a few minutes) and benchmarks/rig.py (the full ~3 h).
"""

from __future__ import annotations

import os
import time
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import pandas as pd

from monitor.site.config import Site

LPM = 1e-3 / 60.0  # L/min in m^3/s (SI Brochure: L = 1e-3 m^3)
BAR = 1e5  # Pa
START = datetime(2026, 6, 8, 8, 0, tzinfo=UTC)
HEADER_TAG = "PT 01 header"
BRANCH_TAGS = ("FT 11 loop A", "FT 12 loop B", "FT 13 loop C")
BRANCH_NAMES = ("loop A", "loop B", "loop C")
#: the pump's shut-off pressure and the share of it lost at the rig's total flow
#: (invented numbers: a small circulator)
SHUT_OFF_PA = 0.095 * BAR
GAUGE_STEP_PA = 0.05 * BAR


def site_toml(*, branches: int = 2, window: str = "1 min", flow_drop: bool = True,
              store: str = "sqlite:///rig.db") -> str:
    """The rig's site file (TOML): the settings a rig or commissioning run wants (README,
    "test rig and commissioning runs")."""
    parts = [f'''[site]
name = "Bench loop 2"
timezone = "Europe/Vienna"

[store]
url = "{store}"

[source]
kind = "csv"
path = "inbox/"
delimiter = ";"

[header]
pressure = {{ tag = "{HEADER_TAG}", unit = "bar" }}
running_pressure = "0.02 bar"

[analysis]
window = "{window}"
sample_period = "1 s"
min_samples = 20

[flow_drop]
enabled = {str(flow_drop).lower()}
fraction = "4 %"
reference = "10 min"
hold = "20 s"
deadband = "1 %"
''']
    for i in range(branches):
        pipe = f'length = "{2 + i} m", inner_diameter = "{20 - 2 * i} mm", roughness = "0.0015 mm"'
        parts.append(f'''
[[branch]]
name = "{BRANCH_NAMES[i]}"
flow = {{ tag = "{BRANCH_TAGS[i]}", unit = "L/min" }}
min_flow = "5 L/min"
termination = {{ kind = "open", elevation = "0.2 m" }}
elements = [
  {{ pipe = {{ {pipe} }} }},
  {{ fittings = {{ elbow_90 = 4, ball_valve = 1 }} }},
]
''')
    return "".join(parts)


@dataclass(frozen=True)
class Closure:
    """One valve closure: branch index, start and length [s from the start], depth [-]."""

    branch: int
    start_s: int
    length_s: int
    depth: float


@dataclass(frozen=True)
class Recording:
    """The rig's samples (SI, true values and as logged) and the closures made."""

    times: pd.DatetimeIndex
    header_pa: np.ndarray  # as the gauge shows it [Pa gauge]
    flows_m3s: np.ndarray  # as the meters show them, (branches, samples) [m^3/s]
    closures: tuple[Closure, ...]

    def frame(self) -> pd.DataFrame:
        """The logger's wide table: time, header in bar, flows in L/min."""
        out = {"time": self.times.strftime("%Y-%m-%dT%H:%M:%SZ"),
               HEADER_TAG: np.round(self.header_pa / BAR, 2)}
        for i, q in enumerate(self.flows_m3s):
            out[BRANCH_TAGS[i]] = np.round(q / LPM, 2)
        return pd.DataFrame(out)

    def write_csv(self, folder: Path, name: str = "rig-run.csv") -> Path:
        """The recording as the logger exports it: `;` delimiter, decimal point; dated a
        minute back, so the source takes it as finished (``settle_seconds``)."""
        folder.mkdir(parents=True, exist_ok=True)
        path = folder / name
        self.frame().to_csv(path, sep=";", index=False)
        done = time.time() - 60.0
        os.utime(path, (done, done))
        return path


def closures_plan(seconds: int, branches: int, *, count: int = 20, length_s: int = 420,
                  seed: int = 12) -> tuple[Closure, ...]:
    """*count* closures of about *length_s* spread over the run, depths 5–40 % (the
    shallowest exactly 5 %), each on one branch, with a settled stretch before each."""
    rng = np.random.default_rng(seed)
    slot = seconds // (count + 1)
    depths = np.linspace(0.05, 0.40, count)
    rng.shuffle(depths)
    out = []
    for k in range(count):
        jitter = int(rng.integers(-30, 31))
        length = max(60, min(length_s + jitter, slot - 60))
        start = slot * (k + 1) - length // 2
        out.append(Closure(branch=k % branches, start_s=int(start), length_s=int(length),
                           depth=float(depths[k])))
    return tuple(out)


def record(site: Site, *, seconds: int, closures: tuple[Closure, ...] = (),
           seed: int = 5, meter_noise: float = 0.004) -> Recording:
    """*seconds* of 1-second samples of *site*'s branches with the *closures* made.

    The header pressure solves pump = branches at each second (bisection on the
    monotone balance); the gauge adds 0.006 bar of noise and rounds to 0.05 bar; each
    meter adds *meter_noise* of its reading (1 σ) and a slow wander of the pump speed
    moves everything by about 1 % (invented, like a small circulator on a bench)."""
    rng = np.random.default_rng(seed)
    n, nb = seconds, len(site.branches)
    times = pd.date_range(START, periods=n, freq="1s")
    wander = 1.0 + 0.01 * np.sin(np.arange(n) * 2 * np.pi / 2400.0)
    shut_off = SHUT_OFF_PA * wander**2  # affinity: pressure with speed squared
    models = [b.model for b in site.branches]
    q_design = sum(float(m.flow(np.asarray(0.07 * BAR))) for m in models)
    k_pump = (SHUT_OFF_PA - 0.07 * BAR) / q_design**2  # the pump gives 0.07 bar there

    def solve(ratio: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Header pressure and branch flows where the pump meets the branches."""
        def total(p: np.ndarray) -> np.ndarray:
            return np.sum([m.flow(p, resistance_ratio=ratio[i])
                           for i, m in enumerate(models)], axis=0)

        lo, hi = np.zeros(n), shut_off.copy()
        for _ in range(40):  # bisection: pump(Q(p)) - p falls as p rises
            mid = 0.5 * (lo + hi)
            up = shut_off - k_pump * total(mid) ** 2 > mid
            lo, hi = np.where(up, mid, lo), np.where(up, hi, mid)
        p = 0.5 * (lo + hi)
        return p, np.array([m.flow(p, resistance_ratio=ratio[i])
                            for i, m in enumerate(models)])

    # a closure's depth is the share of flow it takes: the header rises a little when a
    # valve closes, so the ratio that does it is found by a few corrections
    open_flows = solve(np.ones((nb, n)))[1]
    want = np.ones((nb, n))
    for c in closures:
        want[c.branch, c.start_s:c.start_s + c.length_s] = 1.0 - c.depth
    ratio = 1.0 / want**2
    p_true, q_true = solve(ratio)
    for _ in range(8):
        ratio *= ((q_true / open_flows) / want) ** 2
        p_true, q_true = solve(ratio)
    gauge = GAUGE_STEP_PA * np.round((p_true + rng.normal(0, 0.006 * BAR, n)) / GAUGE_STEP_PA)
    meters = q_true * (1.0 + meter_noise * rng.standard_normal(q_true.shape))
    return Recording(times=times, header_pa=gauge, flows_m3s=meters, closures=closures)
