"""Networks of nodes and links, solved for every node's pressure and every link's flow.

Nodes (`Junction`, `FixedPressure`) joined by links (`BranchLink`, `PumpLink`), at least
one node at a fixed pressure. `solve_nodal` uses the global gradient algorithm of
Todini & Pilati (1988): Newton's method on link flows and nodal pressures together,
eliminating the flows so each step solves one symmetric positive definite system in the
nodal pressures. Used where branches converge on a return header that drains through a
return line; branches from one supply header alone are `model.network.ParallelHeader`.

Pressures are gauge [Pa], flows [m^3/s].
"""

from __future__ import annotations

import logging
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np

from model.branch import Branch, HeldHeader, ReturnHeader
from model.network import PumpCurve

__all__ = [
    "BranchLink",
    "FixedPressure",
    "Junction",
    "NodalSolution",
    "PumpLink",
    "solve_nodal",
]

log = logging.getLogger(__name__)


@dataclass(frozen=True)
class Junction:
    """A node whose pressure the solver finds; *demand_m3s* [m^3/s] leaves there."""

    name: str
    demand_m3s: float = 0.0


@dataclass(frozen=True)
class FixedPressure:
    """A boundary node held at *pressure_pa* [Pa gauge] (a basin, a held header)."""

    name: str
    pressure_pa: float


@dataclass(frozen=True)
class BranchLink:
    """A branch from node *from_node* to node *to_node* (or to its own termination).

    With *to_node*, the branch must end in a `ReturnHeader` or `HeldHeader`, whose
    pressure is then that node's; without it, the termination is the boundary.
    *conditions* are the branch's condition keywords (scalars), without
    ``end_pressure_pa`` when *to_node* is given.
    """

    branch: Branch
    from_node: str
    to_node: str | None = None
    conditions: Mapping[str, Any] = field(default_factory=dict)

    @property
    def name(self) -> str:
        """The branch's name."""
        return self.branch.name

    def head_loss(self, q: np.ndarray) -> np.ndarray:
        """P_from − P_to [Pa] the link needs for flow q >= 0 [m^3/s]."""
        if self.to_node is None:
            return self.branch.dp(q, **self.conditions)
        return self.branch.dp(q, end_pressure_pa=0.0, **self.conditions)


@dataclass(frozen=True)
class PumpLink:
    """Pumps lifting water from *from_node* to *to_node* (with a check valve)."""

    pump: PumpCurve
    from_node: str
    to_node: str
    name: str = "pump"
    temperature_c: float = 20.0

    def head_loss(self, q: np.ndarray) -> np.ndarray:
        """P_from − P_to [Pa] at flow q >= 0 [m^3/s]: minus the pressure rise."""
        return np.asarray(-self.pump.pressure_rise(q, self.temperature_c))


Node = Junction | FixedPressure
Link = BranchLink | PumpLink


@dataclass(frozen=True)
class NodalSolution:
    """Pressures at every node [Pa gauge] and flows in every link [m^3/s].

    status "ok" or "not_converged"; *max_mass_error_m3s* the largest imbalance left at a
    junction; *iterations* the Newton steps taken.
    """

    pressures_pa: Mapping[str, float]
    flows_m3s: Mapping[str, float]
    status: Literal["ok", "not_converged"]
    message: str
    iterations: int
    max_mass_error_m3s: float

    @property
    def ok(self) -> bool:
        """True when the solver converged."""
        return self.status == "ok"


def _check_network(nodes: Sequence[Node], links: Sequence[Link]) -> None:
    names = [n.name for n in nodes]
    if len(set(names)) != len(names):
        raise ValueError(f"nodes: names must be unique; got {names}")
    if not any(isinstance(n, FixedPressure) for n in nodes):
        raise ValueError("nodes: at least one FixedPressure node (or a link to a termination)")
    link_names = [lk.name for lk in links]
    if len(set(link_names)) != len(link_names):
        raise ValueError(f"links: names must be unique; got {link_names}")
    for lk in links:
        for end in (lk.from_node, lk.to_node):
            if end is not None and end not in names:
                raise ValueError(f"links: {lk.name!r} refers to unknown node {end!r}")
        if isinstance(lk, BranchLink) and lk.to_node is not None:
            if not isinstance(lk.branch.termination, ReturnHeader | HeldHeader):
                raise ValueError(
                    f"links: {lk.name!r} ends at node {lk.to_node!r}, so its branch must end "
                    "in a ReturnHeader or HeldHeader"
                )
            if "end_pressure_pa" in lk.conditions:
                raise ValueError(
                    f"links: {lk.name!r}: end_pressure_pa comes from node {lk.to_node!r}"
                )


def solve_nodal(
    nodes: Sequence[Node],
    links: Sequence[Link],
    *,
    tol_m3s: float = 1e-12,
    max_iter: int = 100,
) -> NodalSolution:
    """Solve a network of branches and pumps by the global gradient algorithm.

    Todini & Pilati (1988), "A gradient algorithm for the analysis of pipe networks".
    Unknowns: link flows Q and junction pressures P. With A the link–junction incidence
    (+1 at a link's from-node, −1 at its to-node), h(Q) each link's required P_from − P_to
    and D = diag(h'(Q)), each Newton step solves

        (Aᵀ D⁻¹ A) δP = Aᵀ D⁻¹ E − M,     δQ = D⁻¹ (A δP − E)

    with E = h(Q) − ΔP (energy residuals) and M = AᵀQ + demand (mass residuals). Aᵀ D⁻¹ A
    is symmetric positive definite when every h rises with Q, which branch curves and
    pump curves (as losses) do. Flow runs one way only (branches carry no reverse flow
    in this model, pumps have check valves): below zero each h continues as a line of
    very steep slope, so a link that would reverse carries a negligible flow (reported
    as zero) instead of a negative one.

    Parameters
    ----------
    nodes : sequence of Junction and FixedPressure
        Nodes; at least one fixed.
    links : sequence of BranchLink and PumpLink
        Links; flow is positive from ``from_node`` to ``to_node``.
    tol_m3s : float
        Stop when the largest flow change and mass imbalance fall below this [m^3/s].
    max_iter : int
        Newton steps at most [-].
    """
    _check_network(nodes, links)
    free = [n for n in nodes if isinstance(n, Junction)]
    fixed = {n.name: n.pressure_pa for n in nodes if isinstance(n, FixedPressure)}
    index = {n.name: i for i, n in enumerate(free)}
    m, n = len(links), len(free)
    a = np.zeros((m, n))
    p_known = np.zeros(m)  # fixed-node part of P_from − P_to
    for j, lk in enumerate(links):
        for end, sign in ((lk.from_node, 1.0), (lk.to_node, -1.0)):
            if end is None:
                continue
            if end in index:
                a[j, index[end]] = sign
            else:
                p_known[j] += sign * fixed[end]
    demand = np.array([nd.demand_m3s for nd in free])

    def curve(q: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        h = np.empty(m)
        dh = np.empty(m)
        for j, lk in enumerate(links):
            qj = max(q[j], 0.0)
            step = 1e-7 * max(qj, 1e-4)
            pair = lk.head_loss(np.array([qj, qj + step]))
            h[j] = pair[0]
            dh[j] = (pair[1] - pair[0]) / step
        return h, dh

    h0, _ = curve(np.zeros(m))
    q = np.array([_start_flow(lk) for lk in links])
    p = np.full(n, np.mean(list(fixed.values())) if fixed else 0.0)
    status: Literal["ok", "not_converged"] = "not_converged"
    it = 0
    for it in range(1, max_iter + 1):
        h, dh = curve(q)
        scale = max(float(np.max(np.abs(dh))), 1.0)
        stiff = 1e8 * scale
        neg = q < 0.0
        # below zero flow: h(0) + stiff·Q, the one-way rule (see docstring); a tiny
        # floor keeps D invertible where a quadratic curve is flat at Q = 0
        h = np.where(neg, h0 + stiff * q, h)
        dh = np.where(neg, stiff, np.maximum(dh, 1e-10 * scale))
        e = h - (a @ p + p_known)
        mres = a.T @ q + demand
        dinv = 1.0 / dh
        s = a.T @ (dinv[:, None] * a)
        rhs = a.T @ (dinv * e) - mres
        try:
            dp = np.linalg.solve(s, rhs) if n else np.zeros(0)
        except np.linalg.LinAlgError:
            return _nodal_result(nodes, links, free, fixed, p, q, a, demand, "not_converged",
                                 "singular nodal matrix: a junction has no open link", it)
        dq = dinv * (a @ dp - e)
        p = p + dp
        q = q + dq
        if np.max(np.abs(dq)) <= tol_m3s and np.max(np.abs(a.T @ q + demand), initial=0.0) <= (
            tol_m3s
        ):
            status = "ok"
            break
    message = "" if status == "ok" else f"no convergence after {max_iter} Newton steps"
    return _nodal_result(nodes, links, free, fixed, p, q, a, demand, status, message, it)


def _start_flow(lk: Link) -> float:
    if isinstance(lk, PumpLink):
        return 0.5 * lk.pump.max_flow_m3s
    d = lk.branch.pipe_diameter_m
    return 1.5 * math.pi * d * d / 4.0 if d is not None else 0.01


def _nodal_result(
    nodes: Sequence[Node],
    links: Sequence[Link],
    free: Sequence[Junction],
    fixed: Mapping[str, float],
    p: np.ndarray,
    q: np.ndarray,
    a: np.ndarray,
    demand: np.ndarray,
    status: Literal["ok", "not_converged"],
    message: str,
    iterations: int,
) -> NodalSolution:
    q_out = np.maximum(q, 0.0)
    pressures = {nd.name: float(p[i]) for i, nd in enumerate(free)}
    pressures.update(fixed)
    mass = float(np.max(np.abs(a.T @ q_out + demand), initial=0.0))
    if status != "ok":
        log.warning("nodal solver: %s", message)
    return NodalSolution(
        pressures_pa={nd.name: pressures[nd.name] for nd in nodes},
        flows_m3s={lk.name: float(v) for lk, v in zip(links, q_out, strict=True)},
        status=status,
        message=message,
        iterations=iterations,
        max_mass_error_m3s=mass,
    )
