"""What a simulated site goes through: the injected faults, how the site is run and
logged, and the ground truth.

Faults (`Fault`): fouling ramps, step restrictions, back-pressure steps, frozen and
drifting meters, cleanings, with the time profile each one gives r, the termination
pressure or a meter reading (`ratio_truth`, `back_pressure_delta`, `apply_meter_faults`).
Specs: the tags a historian logs (`SiteTags`, `BranchTags`), how the site is operated
(`OperatingSpec`) and the instruments' noise and defects (`NoiseSpec`). `Truth` is what
really happened. `model.simulate` turns these into historian data.

Conventions: times are numpy ``datetime64[ns]`` in UTC; values are SI.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import ClassVar, Literal

import numpy as np
from numpy.typing import NDArray

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
    "SiteTags",
    "StepRestriction",
    "TimeLike",
    "Truth",
    "to_datetime64",
]

TimeLike = datetime | np.datetime64 | str
F64 = NDArray[np.float64]
NS_PER_DAY = 86_400 * 10**9


def to_datetime64(value: TimeLike, name: str = "time") -> np.datetime64:
    """A UTC ``datetime64[ns]`` from an aware or naive (taken as UTC) time or ISO string."""
    if isinstance(value, datetime):
        if value.tzinfo is not None:
            value = value.astimezone(UTC).replace(tzinfo=None)
        return np.datetime64(value, "ns")
    if isinstance(value, np.datetime64):
        return value.astype("datetime64[ns]")
    if isinstance(value, str):
        text = value.strip()
        if text.endswith("Z"):
            text = text[:-1]
        elif text.endswith("+00:00"):
            text = text[:-6]
        try:
            return np.datetime64(text, "ns")
        except ValueError as exc:
            raise ValueError(f"{name}: {value!r} is not an ISO time (UTC or naive)") from exc
    raise TypeError(f"{name} must be a datetime, numpy datetime64 or ISO string")


# --------------------------------------------------------------------------- faults


@dataclass(frozen=True)
class FoulingRamp:
    """Fouling of *branch* from *start*: r rises to *r_end* [-].

    ``shape="linear"``: r = 1 + (r_end − 1)·min(1, t/days).
    ``shape="asymptotic"`` (Kern & Seaton 1959): r = 1 + (r_end − 1)·(1 − e^(−t/τ)),
    τ = days/3, so 95 % of the rise is reached after *days*. A `Cleaning` of the branch
    ends the ramp.
    """

    branch: str
    start: TimeLike
    days: float
    r_end: float
    shape: Literal["linear", "asymptotic"] = "linear"
    kind: ClassVar[str] = "fouling"

    def __post_init__(self) -> None:
        if not (self.days > 0 and math.isfinite(self.days)):
            raise ValueError(f"days must be > 0, got {self.days!r}")
        if not (self.r_end > 0 and math.isfinite(self.r_end)):
            raise ValueError(f"r_end must be > 0, got {self.r_end!r}")
        if self.shape not in ("linear", "asymptotic"):
            raise ValueError(f"shape must be 'linear' or 'asymptotic', got {self.shape!r}")


@dataclass(frozen=True)
class StepRestriction:
    """A restriction (valve left throttled, debris) from *time*: r multiplied by *ratio*.

    Cleared at *end* (None: stays).
    """

    branch: str
    time: TimeLike
    ratio: float
    end: TimeLike | None = None
    kind: ClassVar[str] = "restriction"

    def __post_init__(self) -> None:
        if not (self.ratio > 0 and math.isfinite(self.ratio)):
            raise ValueError(f"ratio must be > 0, got {self.ratio!r}")


@dataclass(frozen=True)
class BackPressureStep:
    """The termination pressure of *branch* moves by *delta_pa* [Pa] from *time*.

    A held or return header's pressure, or a tank's gas blanket. Not for open
    discharges. When the termination pressure is logged the tag shows the change; a
    tank's level tag does not (the gas pressure is not logged). Reverts at *end*.
    """

    branch: str
    time: TimeLike
    delta_pa: float
    end: TimeLike | None = None
    kind: ClassVar[str] = "back_pressure"


@dataclass(frozen=True)
class FrozenMeter:
    """The reading of *tag* (a tag, or a branch name: its flow meter) holds its last
    value from *start* until *end* (None: to the end)."""

    tag: str
    start: TimeLike
    end: TimeLike | None = None
    kind: ClassVar[str] = "instrument"


@dataclass(frozen=True)
class DriftingMeter:
    """The reading of *tag* (or a branch's flow meter) drifts from *start*.

    reading = true·(1 + gain_per_day·d) + offset_per_day·d, d the days since *start*
    (*gain_per_day* [1/day], *offset_per_day* [SI unit of the tag per day]); the drift
    stops growing at *end* (recalibrated: None means never).
    """

    tag: str
    start: TimeLike
    gain_per_day: float = 0.0
    offset_per_day: float = 0.0
    end: TimeLike | None = None
    kind: ClassVar[str] = "instrument"


@dataclass(frozen=True)
class Cleaning:
    """*branch* cleaned at *time*: ends every fouling ramp of the branch begun before."""

    branch: str
    time: TimeLike
    kind: ClassVar[str] = "cleaning"


Fault = FoulingRamp | StepRestriction | BackPressureStep | FrozenMeter | DriftingMeter | Cleaning


# --------------------------------------------------------------------------- specs


@dataclass(frozen=True)
class BranchTags:
    """Tags logged for one branch; None where not logged (an unmetered branch)."""

    flow: str | None = None
    level: str | None = None
    end_pressure: str | None = None
    valve_position: str | None = None


@dataclass(frozen=True)
class SiteTags:
    """Tag names of a site: header, pump and per-branch (`BranchTags` by branch name)."""

    header_pressure: str
    temperature: str
    branches: Mapping[str, BranchTags]
    total_flow: str | None = None
    pump_speed: str | None = None

    def all_tags(self) -> tuple[str, ...]:
        """Every tag name, in a fixed order."""
        out = [self.header_pressure, self.temperature]
        out += [t for t in (self.total_flow, self.pump_speed) if t is not None]
        for name in sorted(self.branches):
            bt = self.branches[name]
            out += [
                t for t in (bt.flow, bt.level, bt.end_pressure, bt.valve_position) if t is not None
            ]
        return tuple(out)


@dataclass(frozen=True)
class OperatingSpec:
    """How the site is run (all times in UTC hours).

    speed_day, speed_night : pump speed ratio by day and by night [-]
    day_start_h, day_end_h : the day shift [h UTC]; transitions take about speed_ramp_h [h]
    weekend_factor : speed ratio multiplier on Saturdays and Sundays [-]
    speed_wander : standard deviation of slow speed variation [-] (correlation speed_tau_h)
    trips_per_year : mean number of pump trips [1/year]; each lasts trip_hours [h]
    temperature_mean_c, temperature_annual_amplitude_c, warmest_day : annual sine
        [°C], [°C], [day of year]
    temperature_daily_swing_c : half the daily swing, warmest at 15:00 [°C]
    level_range_m : tank levels move within this range [m]
    level_period_h : fill/draw cycle [h]
    end_pressure_wander_pa : standard deviation of held/return header wander [Pa]
    default_end_pressure_pa : header pressure where the config gives none [Pa]
    valve_range : control valves move within this travel range [-]
    """

    speed_day: float = 1.0
    speed_night: float = 0.75
    day_start_h: float = 6.0
    day_end_h: float = 20.0
    speed_ramp_h: float = 0.5
    weekend_factor: float = 0.9
    speed_wander: float = 0.015
    speed_tau_h: float = 2.0
    trips_per_year: float = 4.0
    trip_hours: tuple[float, float] = (0.5, 6.0)
    temperature_mean_c: float = 21.0
    temperature_annual_amplitude_c: float = 9.0
    warmest_day: float = 200.0
    temperature_daily_swing_c: float = 1.5
    level_range_m: tuple[float, float] = (1.0, 4.0)
    level_period_h: float = 11.0
    end_pressure_wander_pa: float = 1500.0
    default_end_pressure_pa: float = 1.5e5
    valve_range: tuple[float, float] = (0.55, 0.95)


@dataclass(frozen=True)
class NoiseSpec:
    """Instrument noise (standard deviations), quantisation steps and data defects.

    Set everything to zero (``NoiseSpec.none()``) for exact data.
    """

    pressure_pa: float = 300.0
    flow_rel: float = 0.004
    flow_m3s: float = 2.0e-5
    temperature_c: float = 0.05
    level_m: float = 0.003
    position: float = 0.003
    speed: float = 0.001
    pressure_step_pa: float = 100.0  # 1 mbar historian resolution
    flow_step_m3s: float = 1.0e-5  # 0.036 m^3/h
    temperature_step_c: float = 0.1
    level_step_m: float = 0.001
    position_step: float = 0.001
    nan_fraction: float = 0.001
    spike_fraction: float = 0.0003
    spike_rel: float = 0.3

    @classmethod
    def none(cls) -> NoiseSpec:
        """No noise, no quantisation, no NaNs, no spikes."""
        return cls(**{f: 0.0 for f in cls.__dataclass_fields__})


# --------------------------------------------------------------------------- results


@dataclass(frozen=True)
class Truth:
    """What really happened (noise-free, fault-free instruments).

    resistance_ratio : r per branch over time [-]
    static_pressure_pa : true static back-pressure P_e + ρ·g·Δz per branch [Pa]
    end_pressure_pa : true termination pressure per branch [Pa gauge]
    flow_m3s : true flow per branch [m^3/s]
    header_pressure_pa, temperature_c, speed_ratio : [Pa], [°C], [-]
    pump_running : bool per sample
    instrument_fault : per faulted tag, True where its reading is frozen or drifting
    faults : the injected faults
    """

    resistance_ratio: Mapping[str, F64]
    static_pressure_pa: Mapping[str, F64]
    end_pressure_pa: Mapping[str, F64]
    flow_m3s: Mapping[str, F64]
    header_pressure_pa: F64
    temperature_c: F64
    speed_ratio: F64
    pump_running: NDArray[np.bool_]
    instrument_fault: Mapping[str, NDArray[np.bool_]]
    faults: tuple[Fault, ...]


# --------------------------------------------------------------------------- fault effects


def active_between(
    times: NDArray[np.datetime64], start: TimeLike, end: TimeLike | None
) -> NDArray[np.bool_]:
    """Which *times* fall in [*start*, *end*) (no *end*: from *start* on)."""
    t0 = to_datetime64(start, "start")
    on = times >= t0
    if end is not None:
        on &= times < to_datetime64(end, "end")
    return np.asarray(on)


def ratio_truth(name: str, faults: Sequence[Fault], times: NDArray[np.datetime64]) -> F64:
    """True r(t) of one branch: (1 + Σ fouling excess)·Π restriction ratios."""
    n = times.size
    cleanings = sorted(
        to_datetime64(f.time, "time")
        for f in faults
        if isinstance(f, Cleaning) and f.branch == name
    )
    excess = np.zeros(n)
    factor = np.ones(n)
    for f in faults:
        if isinstance(f, FoulingRamp) and f.branch == name:
            t0 = to_datetime64(f.start, "start")
            stop = next((c for c in cleanings if c > t0), None)
            on = active_between(times, t0, stop)
            d = (times - t0).astype("timedelta64[ns]").astype(np.int64) / NS_PER_DAY
            if f.shape == "linear":
                grow = np.clip(d / f.days, 0.0, 1.0)
            else:
                grow = 1.0 - np.exp(-3.0 * np.clip(d, 0.0, None) / f.days)
            excess += np.where(on, (f.r_end - 1.0) * grow, 0.0)
        elif isinstance(f, StepRestriction) and f.branch == name:
            factor *= np.where(active_between(times, f.time, f.end), f.ratio, 1.0)
    return np.asarray((1.0 + excess) * factor)


def back_pressure_delta(name: str, faults: Sequence[Fault], times: NDArray[np.datetime64]) -> F64:
    """The termination-pressure offset of branch *name* at *times* from its
    back-pressure steps [Pa]."""
    delta = np.zeros(times.size)
    for f in faults:
        if isinstance(f, BackPressureStep) and f.branch == name:
            delta += np.where(active_between(times, f.time, f.end), f.delta_pa, 0.0)
    return delta


def apply_meter_faults(
    tag: str, faults: Sequence[Fault], times: NDArray[np.datetime64], clean: F64, reading: F64
) -> tuple[F64, NDArray[np.bool_]]:
    """Apply drifts (to the clean value, before noise is added in *reading*) and freezes."""
    out = reading.copy()
    bad = np.zeros(times.size, dtype=bool)
    for f in faults:
        if isinstance(f, DriftingMeter) and f.tag == tag:
            t0 = to_datetime64(f.start, "start")
            d = (times - t0).astype("timedelta64[ns]").astype(np.int64) / NS_PER_DAY
            if f.end is not None:
                d_end = (to_datetime64(f.end, "end") - t0).astype("timedelta64[ns]").astype(
                    np.int64
                ) / NS_PER_DAY
                d = np.minimum(d, d_end)
            d = np.clip(d, 0.0, None)
            out = out + clean * f.gain_per_day * d + f.offset_per_day * d
            bad |= d > 0
    for f in faults:
        if isinstance(f, FrozenMeter) and f.tag == tag:
            on = active_between(times, f.start, f.end)
            idx = np.flatnonzero(on)
            if idx.size:
                held = out[idx[0] - 1] if idx[0] > 0 else out[idx[0]]
                out[on] = held
                bad |= on
    return out, bad
