"""Branch curves and their inverse: statics, thresholds, terminations, back-flow, properties."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from model import water
from model.branch import Branch, HeldHeader, OpenDischarge, ReturnHeader, Tank
from model.elements import ControlValve, Elevation, Equipment, Fittings, Pipe

D4 = 0.1023  # 4" schedule 40 inner diameter [m] (ASME B36.10)


def _cw_branch(termination: object = None, **kw: object) -> Branch:
    elements = [
        Pipe(80.0, D4, 4.5e-5),
        Fittings(D4, {"elbow_90": 6, "gate_valve": 2, "tee_branch": 1}),
        ControlValve(160.0, "equal_percentage", position=0.8),
        Equipment(40_000.0, 120.0 / 3600.0, exponent=1.85),
    ]
    term = termination if termination is not None else Tank(6.0, level_m=2.0)
    return Branch("CW-7", elements, term, **kw)  # type: ignore[arg-type]


def test_six_metres_static_head_is_about_0_6_bar() -> None:
    # a branch ending 6 m up at an open discharge needs ≈ 0.6 bar before it flows
    # (common practice: 10 m of water ≈ 1 bar)
    b = Branch("up6", [Pipe(20.0, D4, 4.5e-5)], OpenDischarge(elevation_m=6.0))
    p = float(b.threshold_pressure())
    assert p == pytest.approx(6.0 * float(water.density(20.0)) * water.G, rel=1e-12)
    assert p / 1e5 == pytest.approx(0.6, rel=0.03)


def test_no_flow_at_or_below_threshold() -> None:
    # a branch ending below a static head gets no flow until the header exceeds it
    # (common practice; REFERENCES.md)
    b = _cw_branch()
    thr = float(b.threshold_pressure())
    p = np.array([-1e5, 0.0, thr * 0.5, thr, thr + 1.0, thr + 1e5])
    q = b.flow(p)
    assert np.all(q[:4] == 0.0)
    assert np.all(q[4:] > 0.0)
    assert np.all(np.diff(q) >= 0.0)


def test_static_pressure_of_each_termination() -> None:
    rho = float(water.density(30.0))
    g = water.G
    pipe = Pipe(10.0, D4, 4.5e-5)
    tank = Branch("t", [pipe, Elevation(2.0)], Tank(5.0, level_m=1.5, gas_pressure_pa=2e4))
    assert float(tank.static_pressure(temperature_c=30.0)) == pytest.approx(
        2e4 + rho * g * (5.0 + 1.5 + 2.0)
    )
    # logged level overrides the fixed one, and broadcasts
    lv = tank.static_pressure(temperature_c=30.0, level_m=np.array([0.0, 3.0]))
    assert lv == pytest.approx(2e4 + rho * g * (7.0 + np.array([0.0, 3.0])))
    held = Branch("h", [pipe], HeldHeader(set_pressure_pa=3e5, elevation_m=-1.0))
    assert float(held.static_pressure(temperature_c=30.0)) == pytest.approx(3e5 - rho * g)
    assert float(held.static_pressure(temperature_c=30.0, end_pressure_pa=1e5)) == (
        pytest.approx(1e5 - rho * g)
    )
    ret = Branch("r", [pipe], ReturnHeader(pressure_pa=5e4))
    assert float(ret.static_pressure()) == pytest.approx(5e4)
    with pytest.raises(ValueError, match="level_m"):
        Branch("t2", [pipe], Tank(5.0)).static_pressure()
    with pytest.raises(ValueError, match="end_pressure_pa"):
        Branch("h2", [pipe], HeldHeader()).static_pressure()


def test_open_discharge_adds_exit_loss_once() -> None:
    pipe = Pipe(30.0, D4, 4.5e-5)
    open_b = Branch("o", [pipe], OpenDischarge())
    q = 0.02
    v = q / (math.pi * D4**2 / 4)
    rho = float(water.density(20.0))
    # exit loss K = 1 on the discharge velocity (Crane TP-410; DESIGN §2)
    assert float(open_b.dp(q) - pipe.dp(q)) == pytest.approx(rho * v**2 / 2, rel=1e-12)
    with pytest.raises(ValueError, match="exit"):
        Branch("o2", [pipe, Fittings(D4, {"exit": 1})], OpenDischarge())
    no_exit = Branch("o3", [pipe, Fittings(D4, {"exit": 1})], OpenDischarge(exit_loss_k=0.0))
    assert float(no_exit.dp(q)) == pytest.approx(float(open_b.dp(q)), rel=1e-12)


def test_dp_composition_and_resistance_ratio() -> None:
    b = _cw_branch()
    q = np.array([0.01, 0.03])
    static = b.static_pressure()
    rest, valve = b.dp_dynamic_parts(q)
    assert np.all(valve == 0.0)  # no position given: the valve is in "rest"
    assert b.dp(q, resistance_ratio=1.4) == pytest.approx(static + 1.4 * rest)
    rest_p, valve_p = b.dp_dynamic_parts(q, valve_position=0.6)
    assert np.all(valve_p > 0.0)
    assert b.dp(q, valve_position=0.6, resistance_ratio=2.0) == pytest.approx(
        static + 2.0 * rest_p + valve_p
    )
    element_sum = sum(e.dp(q) for e in b.elements)
    assert b.dp_dynamic(q) == pytest.approx(element_sum, rel=1e-12)


def test_closed_valve_gives_no_flow() -> None:
    b = _cw_branch()
    q = b.flow(np.full(3, 5e5), valve_position=np.array([0.0, 0.5, 1.0]))
    assert q[0] == 0.0 and 0.0 < q[1] < q[2]


def test_backflow_hazard() -> None:
    no_cv = _cw_branch()
    thr = float(no_cv.threshold_pressure())
    p = np.array([thr - 1e4, thr, thr + 1e4])
    assert no_cv.backflow_hazard(p).tolist() == [True, False, False]
    with_cv = Branch(
        "cv",
        [Pipe(10.0, D4, 4.5e-5), Fittings(D4, {"check_valve_swing": 1})],
        Tank(6.0, level_m=2.0),
    )
    assert with_cv.check_valve
    assert not np.any(with_cv.backflow_hazard(p))
    assert not _cw_branch(check_valve=True).backflow_hazard(thr - 1e4)


def test_flow_broadcasts_over_conditions() -> None:
    b = _cw_branch()
    p = np.linspace(1e5, 6e5, 7)
    t = np.array([[10.0], [35.0]])
    q = b.flow(p, temperature_c=t, resistance_ratio=1.2, level_m=1.0)
    assert q.shape == (2, 7)
    back = b.dp(q[:, 1:], temperature_c=t, resistance_ratio=1.2, level_m=1.0)
    assert back == pytest.approx(np.broadcast_to(p[1:], (2, 6)), rel=1e-10)


def test_velocity_and_diameter() -> None:
    b = _cw_branch()
    assert b.pipe_diameter_m == D4
    assert float(b.velocity(0.01)) == pytest.approx(0.01 / (math.pi * D4**2 / 4))


def test_bad_input_names_argument() -> None:
    b = _cw_branch()
    with pytest.raises(ValueError, match="resistance_ratio"):
        b.flow(3e5, resistance_ratio=0.0)
    with pytest.raises(ValueError, match="header_pressure_pa"):
        b.flow(float("nan"))
    with pytest.raises(ValueError, match="position"):
        b.flow(3e5, valve_position=2.0)
    with pytest.raises(ValueError, match="elements"):
        Branch("x", ["pipe"], OpenDischarge())  # type: ignore[list-item]
    with pytest.raises(ValueError, match="no element with a pressure loss"):
        Branch("x", [Elevation(3.0)], Tank(0.0, 1.0))


# ------------------------------------------------------------------ properties (hypothesis)

branch_params = st.fixed_dictionaries(
    {
        "length": st.floats(1.0, 500.0),
        "d": st.floats(0.02, 0.4),
        "eps": st.floats(0.0, 5e-4),
        "k": st.floats(0.0, 50.0),
        "kvs": st.floats(5.0, 2000.0),
        "pos": st.floats(0.05, 1.0),
        "n": st.floats(1.0, 2.5),
        "z": st.floats(-10.0, 30.0),
        "t": st.floats(1.0, 95.0),
        "r": st.floats(0.3, 5.0),
    }
)


def _random_branch(p: dict[str, float]) -> Branch:
    d = p["d"]
    return Branch(
        "h",
        [
            Pipe(p["length"], d, p["eps"]),
            Fittings(d, {}, extra_k=p["k"]),
            ControlValve(p["kvs"], "equal_percentage", position=p["pos"]),
            Equipment(3e4, 0.7 * d**2, exponent=p["n"]),
        ],
        OpenDischarge(elevation_m=p["z"]),
    )


@settings(max_examples=60, deadline=None)
@given(branch_params)
def test_property_curve_monotone(p: dict[str, float]) -> None:
    b = _random_branch(p)
    q = np.concatenate([[0.0], np.logspace(-9, 1, 300)])
    dp = b.dp(q, temperature_c=p["t"], resistance_ratio=p["r"])
    assert np.all(np.diff(dp) > 0)


@settings(max_examples=60, deadline=None)
@given(branch_params, st.lists(st.floats(-2e5, 2e7), min_size=1, max_size=30))
def test_property_flows_non_negative_and_monotone(p: dict[str, float], ps: list[float]) -> None:
    b = _random_branch(p)
    pressures = np.sort(np.asarray(ps))
    q = b.flow(pressures, temperature_c=p["t"], resistance_ratio=p["r"])
    assert np.all(q >= 0.0) and np.all(np.isfinite(q))
    assert np.all(np.diff(q) >= 0.0)


@settings(max_examples=80, deadline=None)
@given(branch_params, st.floats(-8.0, 0.5))
def test_property_inverse_of_forward(p: dict[str, float], log_q: float) -> None:
    # flow(dp(Q)) == Q: compare in the dynamic part so static cancellation does not limit
    b = _random_branch(p)
    q = 10.0**log_q
    kw = {"temperature_c": p["t"], "resistance_ratio": p["r"]}
    ps = b.dp(q, **kw)
    back = float(b.flow(ps, **kw))
    dyn = float(ps - b.static_pressure(temperature_c=p["t"]))
    # the round trip is limited by the rounding of P_s = static + dyn
    tol = 1e-9 + 4e-16 * abs(float(ps)) / dyn
    assert back == pytest.approx(q, rel=tol)


# ------------------------------------------------------------------ stacked and blocked solves


def _mixed_branches() -> list[Branch]:
    d2 = 0.0525  # 2" sch 40
    return [
        _cw_branch(),
        _cw_branch(OpenDischarge(3.0)),
        _cw_branch(HeldHeader(set_pressure_pa=1.5e5)),
        Branch("small", [Pipe(200.0, d2, 4.5e-5), Fittings(d2, {"elbow_90": 10})], Tank(1.0, 0.5)),
        Branch("valve only", [ControlValve(40.0, "linear", position=0.5)], Tank(0.0, 1.0)),
        Branch("pump-like", [Equipment(1e5, 0.02, exponent=1.0)], ReturnHeader(2e4)),
    ]


def test_stacked_flows_equal_one_at_a_time() -> None:
    from model.branch import stacked_flows

    branches = _mixed_branches()
    p = np.linspace(-2e4, 9e5, 257)
    conds: list[dict[str, object]] = [
        {"resistance_ratio": 1.3},
        {"temperature_c": 45.0},
        {"end_pressure_pa": np.linspace(1e5, 3e5, 257)},  # an array condition
        {},
        {"valve_position": 0.0},  # shut: no flow at any pressure
        {"temperature_c": np.full(257, 30.0)},
    ]
    stacked = stacked_flows(branches, p, conds)
    for b, c, q in zip(branches, conds, stacked, strict=True):
        alone = b.flow(p, **c)  # type: ignore[arg-type]
        assert q == pytest.approx(alone, rel=1e-12, abs=0.0)
    assert np.all(stacked[4] == 0.0)


def test_large_arrays_are_solved_in_blocks_with_the_same_answer() -> None:
    # more elements than one block (32 768), along both block layouts
    b = _cw_branch()
    p = np.linspace(0.0, 8e5, 70_001)
    q = b.flow(p)
    idx = np.arange(0, p.size, 997)
    assert q[idx] == pytest.approx(b.flow(p[idx]), rel=1e-12, abs=0.0)
    p2 = p[:40_000].reshape(40, 1000)
    t2 = np.linspace(5.0, 60.0, 40)[:, None]
    q2 = b.flow(p2, temperature_c=t2)
    assert q2[7] == pytest.approx(b.flow(p2[7], temperature_c=float(t2[7, 0])), rel=1e-12)
    p3 = np.broadcast_to(p[:40_000], (2, 40_000))  # rows longer than a block
    q3 = b.flow(p3, temperature_c=np.array([[15.0], [50.0]]))
    assert q3[1, ::101] == pytest.approx(b.flow(p3[1, ::101], temperature_c=50.0), rel=1e-12)


def test_flow_is_accurate_against_forward_curve() -> None:
    # the inverse reproduces the header pressure through the element-by-element forward
    # curve (dp), an independent code path from the solver's compiled coefficients
    for b in _mixed_branches():
        thr = float(b.threshold_pressure())
        p = thr + np.geomspace(1e-3, 1e6, 200)
        q = b.flow(p)
        assert np.all(q > 0)
        assert b.dp(q) - thr == pytest.approx(p - thr, rel=1e-9)


def test_inverse_across_the_laminar_turbulent_kinks() -> None:
    # flows whose pipe Reynolds number sits on and around 2000 and 4000, where the
    # friction law changes form: the inverse must stay exact there too
    d = 0.05
    pipe = Pipe(300.0, d, 4.5e-5)
    b = Branch("slow", [pipe, Fittings(d, {"elbow_90": 2})], Tank(2.0, 1.0))
    nu = float(water.viscosity(20.0) / water.density(20.0))
    re = np.concatenate(
        [np.linspace(1700, 2300, 301), np.linspace(3600, 4400, 401), [2000.0, 4000.0]]
    )
    q = re * nu * math.pi * d / 4
    back = b.flow(b.dp(q))
    assert back == pytest.approx(q, rel=1e-9)


@settings(max_examples=25, deadline=None)
@given(st.lists(branch_params, min_size=1, max_size=5), st.floats(-1e5, 3e6))
def test_property_stacked_equals_single(params: list[dict[str, float]], p_top: float) -> None:
    from model.branch import stacked_flows

    branches = [_random_branch(p) for p in params]
    conds = [{"temperature_c": p["t"], "resistance_ratio": p["r"]} for p in params]
    pressures = np.linspace(-1e5, p_top, 64)
    for b, c, q in zip(branches, conds, stacked_flows(branches, pressures, conds), strict=True):
        assert q == pytest.approx(b.flow(pressures, **c), rel=1e-10, abs=0.0)
