"""Simulated historian data for a configured site, with injected faults and ground truth.

A site here is a `model.network.ParallelHeader` (branches from one supply header) fed by
a `model.network.PumpCurve`, and a `SiteTags` naming the tags a historian would log.
`simulate` makes a time series of what that historian would hold:

* the pump on a speed drive: day/night load (speed ratio), slow wander, and trips
  (pump off: no flow, header at 0 gauge);
* water temperature: an annual sine (about 12–30 °C by default) plus a daily swing;
* tank levels that fill and draw down, held/return header pressures that wander,
  control valves that move;
* at every sample the operating point of the network — the header pressure where the
  pump's delivery equals the sum of the branch flows at that speed and those conditions;
* instrument noise, quantisation, missing samples (NaN) and spikes;
* faults with their ground truth (`Fault` classes in `model.scenario`).

Speed: the operating point is solved for all timestamps at once. Each branch's curve is
written ``Q_i = c_i·√(P − P_static,i)``; with the ``c_i`` frozen, the header balance
``P = P_pump(Σ Q_i)`` is a cheap scalar problem per timestamp (Illinois false position
on a guaranteed bracket); then ``c_i`` is recomputed from the branch's true curve at the
new flow. ``c_i`` depends on Q only through the friction factor and exponents below 2, so
this fixed point contracts by a factor ``1 − n/2`` ≈ 0–0.1 per round and needs a handful
of rounds. A year of 1-minute samples for five branches takes seconds.

Conventions: times are numpy ``datetime64[ns]`` in UTC; values are SI (Pa gauge, m^3/s,
°C, m, 0–1). The module does no I/O and needs no pandas: callers build frames.
"""

from __future__ import annotations

import logging
import math
import zlib
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import NDArray
from scipy.signal import lfilter

from model import water
from model.branch import Branch, HeldHeader, OpenDischarge, ReturnHeader, Tank
from model.network import ParallelHeader, PumpCurve
from model.scenario import (
    F64,
    NS_PER_DAY,
    BackPressureStep,
    BranchTags,
    Cleaning,
    DriftingMeter,
    Fault,
    FoulingRamp,
    FrozenMeter,
    NoiseSpec,
    OperatingSpec,
    SiteTags,
    StepRestriction,
    TimeLike,
    Truth,
    active_between,
    apply_meter_faults,
    back_pressure_delta,
    ratio_truth,
    to_datetime64,
)

__all__ = [
    "BackPressureStep",
    "BranchTags",
    "Cleaning",
    "DriftingMeter",
    "Fault",
    "FoulingRamp",
    "FrozenMeter",
    "NoiseSpec",
    "OperatingSpec",
    "Simulation",
    "SiteTags",
    "StepRestriction",
    "Truth",
    "simulate",
]

logger = logging.getLogger(__name__)

_DAYS_PER_YEAR = 365.2425


# --------------------------------------------------------------------------- results


@dataclass(frozen=True)
class Simulation:
    """Simulated historian data: ``values[tag]`` [SI] at ``times`` (datetime64[ns] UTC)."""

    times: NDArray[np.datetime64]
    values: Mapping[str, F64]
    truth: Truth
    tags: SiteTags
    unconverged: int = field(default=0)


# --------------------------------------------------------------------------- profiles


def _rng(seed: int, name: str) -> np.random.Generator:
    # One stream per named component: adding a branch or a fault does not reshuffle
    # the noise of the others.
    return np.random.default_rng([seed, zlib.crc32(name.encode())])


def _ar1(rng: np.random.Generator, n: int, tau_samples: float) -> F64:
    """Stationary AR(1) series of unit variance with correlation time *tau_samples*."""
    if n == 0:
        return np.zeros(0)
    a = math.exp(-1.0 / max(tau_samples, 1e-9))
    e = rng.standard_normal(n) * math.sqrt(1.0 - a * a)
    x0 = rng.standard_normal()
    y, _ = lfilter([1.0], [1.0, -a], e, zi=[a * x0])
    return np.asarray(y, dtype=float)


def _sigmoid(z: F64) -> F64:
    return np.asarray(0.5 * (1.0 + np.tanh(0.5 * z)))


@dataclass(frozen=True)
class _Clock:
    days: F64  # since start [day]
    hour: F64  # of day, UTC [h]
    day_of_year: F64  # [day]
    weekend: NDArray[np.bool_]
    step_s: float


def _clock(times: NDArray[np.datetime64], step_s: float) -> _Clock:
    ns = times.astype("datetime64[ns]").astype(np.int64)
    days = (ns - ns[0]) / NS_PER_DAY if ns.size else np.zeros(0)
    day_ns = times.astype("datetime64[D]").astype("datetime64[ns]").astype(np.int64)
    hour = (ns - day_ns) / 3.6e12
    year_start = times.astype("datetime64[Y]").astype("datetime64[ns]").astype(np.int64)
    doy = (ns - year_start) / NS_PER_DAY
    weekday = (times.astype("datetime64[D]").astype(np.int64) + 3) % 7  # 1970-01-01: Thu
    return _Clock(np.asarray(days, float), hour, doy, weekday >= 5, step_s)


def _speed(spec: OperatingSpec, clock: _Clock, seed: int) -> tuple[F64, NDArray[np.bool_]]:
    w = max(spec.speed_ramp_h / 4.0, 1e-3)
    day = _sigmoid((clock.hour - spec.day_start_h) / w) - _sigmoid(
        (clock.hour - spec.day_end_h) / w
    )
    s = spec.speed_night + (spec.speed_day - spec.speed_night) * day
    s = np.where(clock.weekend, s * spec.weekend_factor, s)
    n = clock.days.size
    tau = spec.speed_tau_h * 3600.0 / clock.step_s
    s = s + spec.speed_wander * _ar1(_rng(seed, "speed"), n, tau)
    s = np.clip(s, 0.3, 1.2)
    running = np.ones(n, dtype=bool)
    rng = _rng(seed, "trips")
    span_years = (float(clock.days[-1]) if n else 0.0) / _DAYS_PER_YEAR
    n_trips = int(rng.poisson(max(spec.trips_per_year, 0.0) * span_years))
    if n_trips and n:
        starts = rng.uniform(0.0, float(clock.days[-1]), n_trips)
        lengths = rng.uniform(spec.trip_hours[0], spec.trip_hours[1], n_trips) / 24.0
        for t0, dt in zip(starts, lengths, strict=True):
            running &= ~((clock.days >= t0) & (clock.days < t0 + dt))
    return np.asarray(s, float), running


def _temperature(spec: OperatingSpec, clock: _Clock, seed: int) -> F64:
    annual = np.cos(2.0 * np.pi * (clock.day_of_year - spec.warmest_day) / _DAYS_PER_YEAR)
    daily = np.cos(2.0 * np.pi * (clock.hour - 15.0) / 24.0)
    tau = 6.0 * 3600.0 / clock.step_s
    wander = 0.3 * _ar1(_rng(seed, "temperature"), clock.days.size, tau)
    t = (
        spec.temperature_mean_c
        + spec.temperature_annual_amplitude_c * annual
        + spec.temperature_daily_swing_c * daily
        + wander
    )
    return np.asarray(np.clip(t, 0.5, 95.0), float)


def _level(spec: OperatingSpec, clock: _Clock, seed: int, name: str) -> F64:
    lo, hi = spec.level_range_m
    rng = _rng(seed, f"level:{name}")
    phase = rng.uniform(0.0, 2.0 * np.pi)
    cycle = np.sin(2.0 * np.pi * clock.days * 24.0 / spec.level_period_h + phase)
    slow = _ar1(rng, clock.days.size, 24.0 * 3600.0 / clock.step_s)
    z = np.clip(0.7 * cycle + 0.3 * slow, -1.0, 1.0)
    return np.asarray(0.5 * (lo + hi) + 0.5 * (hi - lo) * z, float)


def _valve(spec: OperatingSpec, clock: _Clock, seed: int, name: str) -> F64:
    lo, hi = spec.valve_range
    z = np.clip(
        0.6 * _ar1(_rng(seed, f"valve:{name}"), clock.days.size, 4 * 3600 / clock.step_s), -1, 1
    )
    return np.asarray(0.5 * (lo + hi) + 0.5 * (hi - lo) * z, float)


# --------------------------------------------------------------------------- operating point


@dataclass(frozen=True)
class _Conditions:
    """Per-branch true conditions for the samples being solved."""

    static: F64
    temperature_c: F64
    valve_position: F64 | None
    ratio: F64


def _dynamic(branch: Branch, q: F64, c: _Conditions, idx: NDArray[np.intp]) -> F64:
    """r·rest + valve [Pa] at flows q for the samples idx."""
    u = None if c.valve_position is None else c.valve_position[idx]
    rest, valve = branch.dp_dynamic_parts(q, temperature_c=c.temperature_c[idx], valve_position=u)
    return np.asarray(c.ratio[idx] * rest + valve)


def _illinois(
    func: Callable[[F64], F64],
    a: F64,
    b: F64,
    fa: F64,
    fb: F64,
    *,
    rtol: float,
    max_iter: int = 200,
) -> F64:
    """Vectorised Illinois false position for a decreasing func with fa > 0 ≥ fb."""
    a, b, fa, fb = a.copy(), b.copy(), fa.copy(), fb.copy()
    x = b.copy()
    done = fb == 0.0
    for _ in range(max_iter):
        if done.all():
            break
        denom = fb - fa
        with np.errstate(divide="ignore", invalid="ignore"):
            x_new = np.where(denom != 0.0, b - fb * (b - a) / denom, 0.5 * (a + b))
        x_new = np.where(done, x, x_new)
        fx = func(x_new)
        cross = fx * fb < 0.0
        a = np.where(~done & cross, b, a)
        fa = np.where(~done & cross, fb, np.where(~done, 0.5 * fa, fa))
        b = np.where(done, b, x_new)
        fb = np.where(done, fb, fx)
        x = np.where(done, x, x_new)
        scale = np.maximum(np.maximum(np.abs(a), np.abs(b)), 1.0)
        done |= (fx == 0.0) | (np.abs(b - a) <= rtol * scale)
    return x


def _solve_operating_points(
    branches: Sequence[Branch],
    conds: Sequence[_Conditions],
    pump_pressure: Callable[[F64, F64, F64], F64],
    speed: F64,
    rho: F64,
    idx: NDArray[np.intp],
    *,
    rtol: float = 1e-11,
    max_rounds: int = 60,
) -> tuple[F64, list[F64], int]:
    """Header pressure and branch flows at the samples *idx* (module docstring).

    *pump_pressure(q_total, speed, rho)* is the pressure rise the pump(s) give [Pa].
    Returns (P [Pa], flows [m^3/s] per branch, number of samples not converged).
    """
    m = idx.size
    sp, rh = speed[idx], rho[idx]
    statics = [c.static[idx] for c in conds]
    coef = []
    for b, c in zip(branches, conds, strict=True):
        d = b.pipe_diameter_m
        q0 = np.full(m, 1.5 * math.pi * d * d / 4.0 if d is not None else 0.01)
        dyn = _dynamic(b, q0, c, idx)
        with np.errstate(divide="ignore"):
            coef.append(np.asarray(q0 / np.sqrt(dyn)))
    shutoff = pump_pressure(np.zeros(m), sp, rh)
    p_lo = np.minimum(np.min(np.vstack(statics), axis=0), 0.0) - 1.0
    flows = [np.zeros(m) for _ in branches]
    p = shutoff.copy()
    converged = np.zeros(m, dtype=bool)
    for _ in range(max_rounds):

        def balance(pp: F64, k: Sequence[F64] = tuple(coef)) -> F64:
            total = np.zeros(m)
            for ki, si in zip(k, statics, strict=True):
                total += ki * np.sqrt(np.clip(pp - si, 0.0, None))
            return np.asarray(pump_pressure(total, sp, rh) - pp)

        p = _illinois(balance, p_lo, shutoff, balance(p_lo), balance(shutoff), rtol=rtol)
        worst = np.zeros(m)
        for i, (b, c) in enumerate(zip(branches, conds, strict=True)):
            q = coef[i] * np.sqrt(np.clip(p - statics[i], 0.0, None))
            flows[i] = q
            on = q > 0.0
            if not on.any():
                continue
            dyn = _dynamic(b, q[on], c, idx[on])
            new = coef[i].copy()
            with np.errstate(divide="ignore"):
                new[on] = q[on] / np.sqrt(dyn)
            change = np.zeros(m)
            with np.errstate(invalid="ignore", divide="ignore"):
                change[on] = np.abs(new[on] / coef[i][on] - 1.0)
            worst = np.maximum(worst, np.nan_to_num(change, nan=0.0))
            coef[i] = new
        converged = worst <= 1e-10
        if converged.all():
            break
    return p, flows, int(m - converged.sum())


# --------------------------------------------------------------------------- simulate


def _pump_pressure_fn(pump: PumpCurve) -> Callable[[F64, F64, F64], F64]:
    def rise(q_total: F64, speed: F64, rho: F64) -> F64:
        head = pump.head(q_total, speed_ratio=speed)
        return np.asarray(rho * water.G * np.clip(head, 0.0, None))

    return rise


def _resolve_tag(tag: str, tags: SiteTags) -> str:
    if tag in tags.branches:
        flow = tags.branches[tag].flow
        if flow is None:
            raise ValueError(f"faults: branch {tag!r} has no flow meter to fault")
        return flow
    if tag not in tags.all_tags():
        raise ValueError(f"faults: tag {tag!r} is not a tag of the site (see SiteTags)")
    return tag


def _check(
    branches: Sequence[Branch], tags: SiteTags, faults: Sequence[Fault]
) -> tuple[Fault, ...]:
    names = {b.name for b in branches}
    unknown = sorted(set(tags.branches) - names)
    if unknown:
        raise ValueError(f"tags: branches {unknown} are not in the header")
    by_name = {b.name: b for b in branches}
    out: list[Fault] = []
    for f in faults:
        if isinstance(f, FrozenMeter | DriftingMeter):
            # Store the resolved tag so the truth names the meter, not the branch.
            resolved = _resolve_tag(f.tag, tags)
            f = (
                FrozenMeter(resolved, f.start, f.end)
                if isinstance(f, FrozenMeter)
                else DriftingMeter(resolved, f.start, f.gain_per_day, f.offset_per_day, f.end)
            )
        elif f.branch not in names:
            raise ValueError(f"faults: branch {f.branch!r} is not in the header")
        elif isinstance(f, BackPressureStep) and isinstance(
            by_name[f.branch].termination, OpenDischarge
        ):
            raise ValueError(
                f"faults: branch {f.branch!r} ends in an open discharge; a back-pressure "
                "step needs a tank or a header"
            )
        out.append(f)
    return tuple(out)


def _measure(rng: np.random.Generator, v: F64, sd_abs: float, sd_rel: float) -> F64:
    out = v.copy()
    if sd_rel > 0.0:
        out = out * (1.0 + sd_rel * rng.standard_normal(v.size))
    if sd_abs > 0.0:
        out = out + sd_abs * rng.standard_normal(v.size)
    return np.asarray(out)


def _defects(
    rng: np.random.Generator, v: F64, keep: NDArray[np.bool_], noise: NoiseSpec, step: float
) -> F64:
    """Spikes, quantisation to *step* and missing samples (none in the frozen *keep*)."""
    out = v.copy()
    n = v.size
    if noise.spike_fraction > 0.0:
        spikes = (rng.random(n) < noise.spike_fraction) & ~keep
        sign = np.where(rng.random(n) < 0.5, -1.0, 1.0)
        scale = np.maximum(np.abs(out), np.nanmedian(np.abs(out)) if n else 0.0)
        out = np.where(spikes, out + sign * noise.spike_rel * scale, out)
    if step > 0.0:
        out = np.round(out / step) * step
    if noise.nan_fraction > 0.0:
        out[(rng.random(n) < noise.nan_fraction) & ~keep] = np.nan
    return out


def simulate(
    header: ParallelHeader,
    pump: PumpCurve,
    tags: SiteTags,
    *,
    start: TimeLike,
    end: TimeLike,
    step_s: float = 60.0,
    faults: Sequence[Fault] = (),
    seed: int = 0,
    noise: NoiseSpec | None = None,
    operation: OperatingSpec | None = None,
    chunk: int = 50_000,
) -> Simulation:
    """Simulate what the site's historian would log from *start* to *end* (exclusive).

    Parameters
    ----------
    header : the branches (`model.network.ParallelHeader`)
    pump : the pump(s) feeding the header from a basin at the header's level
    tags : tag names to produce (`SiteTags`)
    start, end : period [UTC]
    step_s : sample interval [s]
    faults : injected faults (`FoulingRamp`, `StepRestriction`, `BackPressureStep`,
        `FrozenMeter`, `DriftingMeter`, `Cleaning`)
    seed : random seed; the same seed gives the same data [-]
    noise : instrument noise and defects (default `NoiseSpec()`)
    operation : how the site is run (default `OperatingSpec()`)
    chunk : samples solved at once (memory bound) [-]

    Returns
    -------
    Simulation
    """
    noise = NoiseSpec() if noise is None else noise
    operation = OperatingSpec() if operation is None else operation
    if not (step_s > 0 and math.isfinite(step_s)):
        raise ValueError(f"step_s must be > 0, got {step_s!r}")
    if chunk < 1:
        raise ValueError(f"chunk must be >= 1, got {chunk!r}")
    t0, t1 = to_datetime64(start, "start"), to_datetime64(end, "end")
    if not t1 > t0:
        raise ValueError(f"end ({t1}) must be after start ({t0})")
    branches = list(header.branches)
    checked = _check(branches, tags, faults)
    times = np.arange(t0, t1, np.timedelta64(round(step_s * 1e9), "ns"))
    n = times.size
    clock = _clock(times, step_s)
    speed, running = _speed(operation, clock, seed)
    temp = _temperature(operation, clock, seed)
    rho = np.asarray(water.density(temp))

    conds: list[_Conditions] = []
    r_true: dict[str, F64] = {}
    static_true: dict[str, F64] = {}
    end_true: dict[str, F64] = {}
    levels: dict[str, F64] = {}
    end_logged: dict[str, F64] = {}
    positions: dict[str, F64] = {}
    for b in branches:
        bt = tags.branches.get(b.name, BranchTags())
        term = b.termination
        delta = back_pressure_delta(b.name, checked, times)
        if isinstance(term, Tank):
            lvl = (
                _level(operation, clock, seed, b.name)
                if bt.level is not None or term.level_m is None
                else np.full(n, float(term.level_m))
            )
            levels[b.name] = lvl
            # The gas blanket's change enters as an equivalent level: same ρ·g·Δh.
            static = b.static_pressure(temperature_c=temp, level_m=lvl + delta / (rho * water.G))
            p_end = term.gas_pressure_pa + rho * water.G * lvl + delta
        elif isinstance(term, HeldHeader | ReturnHeader):
            base = term.set_pressure_pa if isinstance(term, HeldHeader) else term.pressure_pa
            base = operation.default_end_pressure_pa if base is None else base
            wander = operation.end_pressure_wander_pa * _ar1(
                _rng(seed, f"end:{b.name}"), n, 3.0 * 3600.0 / step_s
            )
            p_end = base + wander + delta
            end_logged[b.name] = p_end
            static = b.static_pressure(temperature_c=temp, end_pressure_pa=p_end)
        else:
            p_end = np.zeros(n)
            static = b.static_pressure(temperature_c=temp)
        u = None
        if bt.valve_position is not None and b.has_control_valve:
            u = _valve(operation, clock, seed, b.name)
            positions[b.name] = u
        r = ratio_truth(b.name, checked, times)
        r_true[b.name] = r
        static_true[b.name] = np.asarray(static, float)
        end_true[b.name] = np.asarray(p_end, float)
        conds.append(_Conditions(static_true[b.name], temp, u, r))

    p_true = np.zeros(n)
    q_true = {b.name: np.zeros(n) for b in branches}
    rise = _pump_pressure_fn(pump)
    run_idx = np.flatnonzero(running)
    unconverged = 0
    for lo in range(0, run_idx.size, chunk):
        idx = run_idx[lo : lo + chunk]
        p, flows, n_bad = _solve_operating_points(branches, conds, rise, speed, rho, idx)
        p_true[idx] = p
        for b, q in zip(branches, flows, strict=True):
            q_true[b.name][idx] = q
        unconverged += n_bad
    if unconverged:
        logger.warning("simulate: %d samples did not converge to 1e-10", unconverged)
    speed_true = np.where(running, speed, 0.0)
    total = np.sum([q_true[b.name] for b in branches], axis=0) if branches else np.zeros(n)

    clean: dict[str, tuple[F64, float, float, float]] = {}  # tag -> (value, sd, rel, step)
    ns = noise
    clean[tags.header_pressure] = (p_true, ns.pressure_pa, 0.0, ns.pressure_step_pa)
    clean[tags.temperature] = (temp, ns.temperature_c, 0.0, ns.temperature_step_c)
    if tags.total_flow is not None:
        clean[tags.total_flow] = (total, ns.flow_m3s, ns.flow_rel, ns.flow_step_m3s)
    if tags.pump_speed is not None:
        clean[tags.pump_speed] = (speed_true, ns.speed, 0.0, 0.0)
    for b in branches:
        logged = tags.branches.get(b.name)
        if logged is None:
            continue
        bt = logged
        if bt.flow is not None:
            clean[bt.flow] = (q_true[b.name], ns.flow_m3s, ns.flow_rel, ns.flow_step_m3s)
        if bt.level is not None:
            if b.name not in levels:
                raise ValueError(f"tags: branch {b.name!r} has a level tag but no tank")
            clean[bt.level] = (levels[b.name], ns.level_m, 0.0, ns.level_step_m)
        if bt.end_pressure is not None:
            if b.name not in end_logged:
                raise ValueError(f"tags: branch {b.name!r} has an end-pressure tag but no header")
            clean[bt.end_pressure] = (end_logged[b.name], ns.pressure_pa, 0.0, ns.pressure_step_pa)
        if bt.valve_position is not None:
            if b.name not in positions:
                raise ValueError(f"tags: branch {b.name!r} has a valve tag but no control valve")
            clean[bt.valve_position] = (positions[b.name], ns.position, 0.0, ns.position_step)

    values: dict[str, F64] = {}
    instrument: dict[str, NDArray[np.bool_]] = {}
    for tag, (v, sd, rel, step) in clean.items():
        rng = _rng(seed, f"noise:{tag}")
        noisy = _measure(rng, v, sd, rel)
        faulted, bad = apply_meter_faults(tag, checked, times, v, noisy)
        if bad.any():
            instrument[tag] = bad
        frozen = np.zeros(n, dtype=bool)
        for f in checked:
            if isinstance(f, FrozenMeter) and f.tag == tag:
                frozen |= active_between(times, f.start, f.end)
        out = _defects(rng, faulted, frozen, noise, step)
        if tag in {bt.valve_position for bt in tags.branches.values()}:
            out = np.clip(out, 0.0, 1.0)
        values[tag] = out

    truth = Truth(
        resistance_ratio=r_true,
        static_pressure_pa=static_true,
        end_pressure_pa=end_true,
        flow_m3s=q_true,
        header_pressure_pa=p_true,
        temperature_c=temp,
        speed_ratio=speed_true,
        pump_running=running,
        instrument_fault=instrument,
        faults=checked,
    )
    return Simulation(times=times, values=values, truth=truth, tags=tags, unconverged=unconverged)
