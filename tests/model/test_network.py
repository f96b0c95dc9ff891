"""Parallel header, pump curves and operating point."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from model import water
from model.branch import Branch, HeldHeader, OpenDischarge, ReturnHeader, Tank
from model.elements import ControlValve, Equipment, Fittings, Pipe
from model.network import ParallelHeader, PumpCurve, operating_point

D = 0.1023
RHO20 = float(water.density(20.0))


def _k_branch(name: str, k: float, z: float, d: float = D) -> Branch:
    """A pure K·ρv²/2 branch with a static head ρ·g·z (no exit loss, no friction)."""
    return Branch(name, [Fittings(d, {}, extra_k=k)], OpenDischarge(z, exit_loss_k=0.0))


def _c(k: float, d: float = D) -> float:
    # Q = c·√(P − ρgz) for ΔP = K·ρ/2·(Q/A)²
    area = math.pi * d * d / 4
    return area * math.sqrt(2.0 / (k * RHO20))


def site_branches() -> list[Branch]:
    """Four branches of one design, one per termination (the nodal tests use them too)."""

    def br(name: str, term: object, length: float = 80.0, pos: float = 0.8) -> Branch:
        return Branch(
            name,
            [
                Pipe(length, D, 4.5e-5),
                Fittings(D, {"elbow_90": 6, "gate_valve": 2}),
                ControlValve(150.0, position=pos),
                Equipment(4e4, 0.03),
            ],
            term,  # type: ignore[arg-type]
        )

    return [
        br("A", Tank(6.0, level_m=2.0)),
        br("B", OpenDischarge(2.0)),
        br("C", HeldHeader(2e5)),
        br("D", ReturnHeader(5e4), length=150.0),
    ]


PUMP = PumpCurve([0.0, 0.05, 0.1, 0.15], [60.0, 57.0, 50.0, 38.0], count=2)


# ------------------------------------------------------------------ closed forms


def test_parallel_k_branches_closed_form_total_flow() -> None:
    # Σ c_i·√(P − ρ g z_i) over the open branches: closed form (Bernoulli + K loss)
    ks, zs = [12.0, 30.0, 8.0], [0.0, 6.0, 15.0]
    pairs = list(zip(ks, zs, strict=True))
    hdr = ParallelHeader([_k_branch(f"b{i}", k, z) for i, (k, z) in enumerate(pairs)])
    p = np.linspace(-1e4, 4e5, 301)
    expected = sum(_c(k) * np.sqrt(np.clip(p - RHO20 * water.G * z, 0.0, None)) for k, z in pairs)
    assert hdr.total_flow(p) == pytest.approx(expected, rel=1e-11, abs=1e-15)
    curve = hdr.system_curve(p)
    assert curve.thresholds_pa["b1"] == pytest.approx(RHO20 * water.G * 6.0)
    # the kinks: below 6 m only b0 flows, between 6 m and 15 m b0 and b1
    below = p < RHO20 * water.G * 6.0
    assert np.all(curve.branch_flows_m3s["b1"][below] == 0.0)
    assert np.all(np.diff(curve.total_flow_m3s) >= 0.0)


def test_operating_point_closed_form_linear_pump() -> None:
    # equal static heads s, linear pump P = P0 − k·Q (PCHIP is exact on two points):
    # x = √(P − s) solves x² + k·C·x − (P0 − s) = 0 with C = Σ c_i
    ks, z = [10.0, 25.0, 40.0], 4.0
    hdr = ParallelHeader([_k_branch(f"b{i}", k, z) for i, k in enumerate(ks)])
    h0, q_end, h_end = 50.0, 0.2, 10.0
    pump = PumpCurve([0.0, q_end], [h0, h_end])
    p0 = RHO20 * water.G * h0
    kq = RHO20 * water.G * (h0 - h_end) / q_end
    s = RHO20 * water.G * z
    c = sum(_c(k) for k in ks)
    x = (-kq * c + math.sqrt((kq * c) ** 2 + 4 * (p0 - s))) / 2
    op = operating_point(hdr, pump)
    assert op.ok
    assert op.header_pressure_pa == pytest.approx(s + x * x, rel=1e-10)
    assert op.total_flow_m3s == pytest.approx(c * x, rel=1e-9)
    for k, name in zip(ks, ["b0", "b1", "b2"], strict=True):
        assert op.branch_flows_m3s[name] == pytest.approx(_c(k) * x, rel=1e-9)


def test_operating_point_quadratic_pump_closed_form() -> None:
    # equal statics, quadratic pump P = P0 − b·Q² sampled at 41 points (PCHIP error
    # O(h³)): P − s = (P0 − s)/(1 + b·C²)
    ks, z = [15.0, 15.0], 2.0
    hdr = ParallelHeader([_k_branch(f"b{i}", k, z) for i, k in enumerate(ks)])
    qs = np.linspace(0.0, 0.3, 41)
    h0, a = 45.0, 300.0
    pump = PumpCurve(qs.tolist(), (h0 - a * qs**2).tolist())
    s = RHO20 * water.G * z
    c = sum(_c(k) for k in ks)
    b = RHO20 * water.G * a
    p0 = RHO20 * water.G * h0
    expected = s + (p0 - s) / (1 + b * c * c)
    assert operating_point(hdr, pump).header_pressure_pa == pytest.approx(expected, rel=1e-6)


# ------------------------------------------------------------------ pumps


def test_affinity_laws() -> None:
    # Q ∝ N, H ∝ N²; 10 % more speed: +21 % head (REFERENCES.md)
    q = np.linspace(0.0, 0.14, 15)
    fast = PUMP.at_speed(1.1)
    assert fast.head(1.1 * q) == pytest.approx(1.21 * PUMP.head(q), rel=1e-12)
    assert PUMP.head(q, speed_ratio=0.9) == pytest.approx(PUMP.at_speed(0.9).head(q))


def test_pumps_in_parallel_and_interpolation() -> None:
    one = PumpCurve([0.0, 0.05, 0.1, 0.15], [60.0, 57.0, 50.0, 38.0])
    q = np.linspace(0.0, 0.15, 31)
    assert PUMP.head(2 * q) == pytest.approx(one.head(q), rel=1e-12)  # two equal pumps
    assert one.head(np.array([0.0, 0.05, 0.1, 0.15])) == pytest.approx([60, 57, 50, 38])
    dense = one.head(np.linspace(0.0, 0.2, 2001))
    assert np.all(np.diff(dense) <= 0.0)  # PCHIP keeps the datasheet's monotony
    assert one.beyond_curve(0.16) and not one.beyond_curve(0.14)
    rise = one.pressure_rise(0.05, 20.0)
    assert float(rise) == pytest.approx(RHO20 * water.G * 57.0)


def test_pump_validation() -> None:
    with pytest.raises(ValueError, match="head_m"):
        PumpCurve([0.0, 0.1], [30.0, 35.0])
    with pytest.raises(ValueError, match="flow_m3s"):
        PumpCurve([0.1, 0.0], [30.0, 20.0])
    with pytest.raises(ValueError, match="count"):
        PumpCurve([0.0, 0.1], [30.0, 20.0], count=0)
    with pytest.raises(ValueError, match="speed_ratio"):
        PumpCurve([0.0, 0.1], [30.0, 20.0], speed_ratio=0.0)


# ------------------------------------------------------------------ operating point


def test_operating_point_statuses() -> None:
    hdr = ParallelHeader(site_branches())
    weak = PumpCurve([0.0, 0.1], [1.5, 1.0])  # 1.5 m shut-off: below every threshold
    op = operating_point(hdr, weak)
    assert op.status == "no_flow" and not op.ok and "threshold" in op.message
    assert op.total_flow_m3s == 0.0
    small = PumpCurve([0.0, 0.01], [80.0, 70.0])  # runs out far past its datasheet
    op = operating_point(hdr, small)
    assert op.status == "beyond_pump_curve" and "datasheet" in op.message
    op = operating_point(hdr, PUMP, speed_ratio=0.55)
    assert op.ok and "C" in op.branches_without_flow  # 2 bar header not reached
    assert op.branch_flows_m3s["C"] == 0.0


def test_conditions_are_passed_per_branch() -> None:
    hdr = ParallelHeader(site_branches())
    base = operating_point(hdr, PUMP)
    fouled = operating_point(hdr, PUMP, conditions={"A": {"resistance_ratio": 2.0}})
    assert fouled.branch_flows_m3s["A"] < base.branch_flows_m3s["A"]
    assert fouled.header_pressure_pa > base.header_pressure_pa
    with pytest.raises(ValueError, match="conditions"):
        operating_point(hdr, PUMP, conditions={"nope": {}})
    with pytest.raises(ValueError, match="unique"):
        ParallelHeader([site_branches()[0], site_branches()[0]])


branch_strategy = st.tuples(
    st.floats(5.0, 300.0),  # length
    st.floats(0.05, 0.3),  # diameter
    st.floats(20.0, 800.0),  # Kvs
    st.floats(0.1, 1.0),  # position
    st.floats(-5.0, 25.0),  # elevation
    st.floats(0.5, 3.0),  # resistance ratio
)


@settings(max_examples=40, deadline=None)
@given(st.lists(branch_strategy, min_size=1, max_size=6), st.floats(0.6, 1.2))
def test_property_mass_conserved_at_operating_point(
    specs: list[tuple[float, ...]], speed: float
) -> None:
    branches = []
    cond = {}
    for i, (length, d, kvs, pos, z, r) in enumerate(specs):
        branches.append(
            Branch(
                f"b{i}",
                [Pipe(length, d, 4.5e-5), ControlValve(kvs, position=pos)],
                OpenDischarge(z),
            )
        )
        cond[f"b{i}"] = {"resistance_ratio": r}
    hdr = ParallelHeader(branches)
    pump = PumpCurve([0.0, 0.1, 0.2, 0.3], [70.0, 66.0, 55.0, 35.0], count=2)
    op = operating_point(hdr, pump, conditions=cond, speed_ratio=speed)
    if op.status == "no_flow":
        assert all(v == 0.0 for v in op.branch_flows_m3s.values())
        return
    assert all(v >= 0.0 for v in op.branch_flows_m3s.values())
    # the pumps deliver what the branches take (mass), at the pressure they make
    assert sum(op.branch_flows_m3s.values()) == pytest.approx(op.total_flow_m3s, rel=1e-12)
    rise = float(pump.pressure_rise(op.total_flow_m3s, speed_ratio=speed))
    assert op.header_pressure_pa == pytest.approx(rise, rel=1e-8, abs=1e-3)
