"""The nodal solver against the parallel header, nested root finding and mass balances."""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from scipy.optimize import brentq

from model.branch import Branch, HeldHeader, OpenDischarge, ReturnHeader, Tank
from model.elements import ControlValve, Equipment, Fittings, Pipe
from model.network import ParallelHeader, operating_point
from model.nodal import BranchLink, FixedPressure, Junction, PumpLink, solve_nodal
from tests.model.test_network import PUMP, D, site_branches


def test_nodal_agrees_with_parallel_header_and_pump() -> None:
    branches = site_branches()
    op = operating_point(ParallelHeader(branches), PUMP)
    nodes: list[FixedPressure | Junction] = [FixedPressure("basin", 0.0), Junction("supply")]
    links = [PumpLink(PUMP, "basin", "supply")] + [BranchLink(b, "supply") for b in branches]
    sol = solve_nodal(nodes, links)
    assert sol.ok, sol.message
    assert sol.pressures_pa["supply"] == pytest.approx(op.header_pressure_pa, rel=1e-9)
    for name, q in op.branch_flows_m3s.items():
        assert sol.flows_m3s[name] == pytest.approx(q, rel=1e-8)
    assert sol.flows_m3s["pump"] == pytest.approx(op.total_flow_m3s, rel=1e-8)
    assert sol.max_mass_error_m3s < 1e-10


def test_nodal_fixed_header_and_closed_branch() -> None:
    # fixed header pressure below one branch's threshold: that branch carries nothing
    branches = site_branches()
    p_s = 2.5e5
    nodes = [FixedPressure("supply", p_s)]
    sol = solve_nodal(nodes, [BranchLink(b, "supply") for b in branches])
    expected = ParallelHeader(branches).branch_flows(p_s)
    for name, q in expected.items():
        assert sol.flows_m3s[name] == pytest.approx(float(q), rel=1e-9, abs=1e-9)


def test_nodal_return_header_against_nested_root_finding() -> None:
    # three branches converge on a return header that drains through a return line to
    # an open basin; reference: the return pressure by brentq on its own mass balance
    def supply(name: str, length: float, pos: float) -> Branch:
        return Branch(
            name,
            [Pipe(length, D, 4.5e-5), ControlValve(120.0, position=pos), Equipment(3e4, 0.025)],
            ReturnHeader(elevation_m=3.0),
        )

    branches = [supply("R1", 60.0, 0.9), supply("R2", 120.0, 0.7), supply("R3", 90.0, 0.5)]
    d_ret = 0.2027  # 8" sch 40
    ret_line = Branch(
        "return line",
        [Pipe(200.0, d_ret, 4.5e-5), Fittings(d_ret, {"elbow_90": 6})],
        OpenDischarge(elevation_m=-2.0),
    )
    p_s = 3.0e5

    def imbalance(p_ret: float) -> float:
        into = sum(float(b.flow(p_s, end_pressure_pa=p_ret)) for b in branches)
        return into - float(ret_line.flow(p_ret))

    p_ret = brentq(imbalance, -1e5, p_s, xtol=1e-9)
    nodes: list[FixedPressure | Junction] = [FixedPressure("supply", p_s), Junction("return")]
    links = [BranchLink(b, "supply", "return") for b in branches] + [
        BranchLink(ret_line, "return")
    ]
    sol = solve_nodal(nodes, links)
    assert sol.ok, sol.message
    assert sol.pressures_pa["return"] == pytest.approx(p_ret, rel=1e-8)
    total = sum(sol.flows_m3s[b.name] for b in branches)
    assert sol.flows_m3s["return line"] == pytest.approx(total, rel=1e-10)


def test_nodal_validation() -> None:
    b = site_branches()[0]
    with pytest.raises(ValueError, match="unknown node"):
        solve_nodal([FixedPressure("s", 1e5)], [BranchLink(b, "x")])
    with pytest.raises(ValueError, match="ReturnHeader or HeldHeader"):
        solve_nodal([FixedPressure("s", 1e5), Junction("r")], [BranchLink(b, "s", "r")])
    with pytest.raises(ValueError, match="FixedPressure"):
        solve_nodal([Junction("s")], [BranchLink(b, "s")])


def test_nodal_newton_converges_quadratically() -> None:
    # Newton's method converges quadratically near the root (Todini & Pilati 1988 build the
    # global gradient algorithm on Newton–Raphson): e_{k+1} <= C·e_k², e_k the largest
    # flow error after k steps relative to the largest solved flow. The iterates are the
    # solver's own, stopped after k steps (max_iter=k; the warning it logs is expected).
    branches = site_branches()
    nodes: list[FixedPressure | Junction] = [FixedPressure("basin", 0.0), Junction("supply")]
    links = [PumpLink(PUMP, "basin", "supply")] + [BranchLink(b, "supply") for b in branches]
    sol = solve_nodal(nodes, links)
    assert sol.ok, sol.message
    q_star = np.array(list(sol.flows_m3s.values()))
    scale = float(np.max(q_star))

    def error(k: int) -> float:
        q = np.array(list(solve_nodal(nodes, links, max_iter=k).flows_m3s.values()))
        return float(np.max(np.abs(q - q_star))) / scale

    errors = [error(k) for k in range(1, sol.iterations)]
    # above the round-off floor (the slopes are finite differences of relative step
    # 1e-7, and a double carries 16 digits), every step squares the error
    pairs = [(a, b) for a, b in itertools.pairwise(errors) if a > 1e-9]
    assert len(pairs) >= 3, errors
    for a, b in pairs:
        # measured: e_{k+1}/e_k² from 0.37 to 0.97; a wrong slope (linear convergence)
        # makes the ratio grow without bound as e_k falls
        assert b <= 3.0 * a * a, errors


def test_nodal_pump_return_header_and_closed_branch() -> None:
    # pump from the basin, branches to a return header that drains to the basin, one
    # branch held shut by a high back-pressure: mass balances at every junction
    def supply(name: str, pos: float) -> Branch:
        return Branch(
            name,
            [Pipe(90.0, D, 4.5e-5), ControlValve(120.0, position=pos), Equipment(3e4, 0.025)],
            ReturnHeader(),
        )

    d_ret = 0.2027
    ret_line = Branch(
        "return line", [Pipe(150.0, d_ret, 4.5e-5), Fittings(d_ret, {"exit": 1})], Tank(0.0, 2.0)
    )
    high = Branch("to 9 bar", [Pipe(30.0, D, 4.5e-5)], HeldHeader(set_pressure_pa=9e5))
    nodes: list[FixedPressure | Junction] = [
        FixedPressure("basin", 0.0),
        Junction("supply"),
        Junction("return"),
    ]
    s1 = supply("S1", 0.9)
    links: list[BranchLink | PumpLink] = [
        PumpLink(PUMP, "basin", "supply"),
        BranchLink(s1, "supply", "return"),
        BranchLink(supply("S2", 0.6), "supply", "return"),
        BranchLink(high, "supply"),
        BranchLink(ret_line, "return"),
    ]
    sol = solve_nodal(nodes, links)
    assert sol.ok, sol.message
    assert sol.flows_m3s["to 9 bar"] == 0.0  # the pump cannot reach 9 bar
    assert sol.max_mass_error_m3s < 1e-9
    q_in = sol.flows_m3s["S1"] + sol.flows_m3s["S2"]
    assert sol.flows_m3s["pump"] == pytest.approx(q_in, rel=1e-9)
    assert sol.flows_m3s["return line"] == pytest.approx(q_in, rel=1e-9)
    # each link sits on its own curve at the solved pressures
    p_sup, p_ret = sol.pressures_pa["supply"], sol.pressures_pa["return"]
    assert float(s1.dp(sol.flows_m3s["S1"], end_pressure_pa=p_ret)) == pytest.approx(
        p_sup, rel=1e-7
    )
    assert float(PUMP.pressure_rise(sol.flows_m3s["pump"])) == pytest.approx(p_sup, rel=1e-7)
