"""The back-flow hazard from logged data: where the header falls below a branch's static
back-pressure and the branch has no check valve.

Below its threshold pressure a branch carries no flow (DESIGN §2); without a check valve,
water can then run back from a tank or a pressurised header into the supply. This module
turns logged readings into that condition, sample by sample, for every branch that can
have it (`hazard_branches`), and turns the samples into findings (`backflow_findings`):
one finding per branch and condition, not one per day, with its share of time, its worst
margin and when it happens (site-local hour, load, pump speed). The alarm that comes on at
ingest is `monitor.app.alarm_process.evaluate_backflow`; the same samples feed it (`static_margin`).

`cannot_flow` gives, per flow meter, the times its branch cannot flow: the instrument
screening and the frozen-meter alarm leave a meter alone that reads about zero then.

Everything here is a pure function of a site and a readings frame (``time`` UTC, ``tag``,
``value`` SI, ``good``).
"""

from __future__ import annotations

import logging
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import datetime, timedelta

import numpy as np
import pandas as pd

from adapters.units import from_si
from model.branch import HeldHeader, OpenDischarge, ReturnHeader, Tank
from monitor.analysis.findings import Finding
from monitor.site.config import BranchConfig, Site

__all__ = [
    "HAZARD_COLUMNS",
    "BackflowFindingSettings",
    "backflow_findings",
    "cannot_flow",
    "hazard_branches",
    "hazard_samples",
    "near_zero",
    "resting_samples",
    "static_margin",
    "termination_words",
]

logger = logging.getLogger(__name__)

#: Columns of the hazard samples frame (`hazard_samples`): pressures [Pa gauge], total
#: flow [m^3/s] and pump speed [-] as logged at the time of each header sample (NaN when
#: not logged).
HAZARD_COLUMNS: tuple[str, ...] = (
    "branch", "time", "header_pa", "static_pa", "load_m3s", "speed",
)  # fmt: skip


def hazard_branches(site: Site) -> list[BranchConfig]:
    """The branches that can run back: no check valve, and a termination that holds water
    or pressure (tank, pressure-held header, return header). An open discharge has nothing
    behind it to push water back but the pipe's own content, so it is left out."""
    return [
        b for b in site.branches
        if not b.model.check_valve and not isinstance(b.model.termination, OpenDischarge)
    ]  # fmt: skip


def termination_words(branch: BranchConfig) -> str:
    """What water would run back from, in words."""
    term = branch.model.termination
    if isinstance(term, Tank):
        return "the tank"
    if isinstance(term, HeldHeader):
        return "the pressure-held header it feeds"
    if isinstance(term, ReturnHeader):
        return "the return header"
    return "the branch's termination"


def _tolerance(site: Site) -> pd.Timedelta:
    """How old a condition tag's reading may be to stand for a header sample."""
    return pd.Timedelta(seconds=max(900.0, 3.0 * site.analysis.sample_period))


def _series(readings: pd.DataFrame, tag: str | None) -> pd.DataFrame:
    """Good, finite readings of *tag* as a (time, value) frame sorted by time."""
    if tag is None:
        return pd.DataFrame({"time": pd.Series([], dtype="datetime64[ns, UTC]"),
                             "value": pd.Series([], dtype=float)})
    part = readings[(readings["tag"] == tag) & readings["good"].to_numpy(bool)]
    part = part[np.isfinite(part["value"].to_numpy(float))]
    out = pd.DataFrame({"time": pd.to_datetime(part["time"]).dt.tz_convert("UTC"),
                        "value": part["value"].to_numpy(float)})
    return out.sort_values("time").drop_duplicates("time", keep="last").reset_index(drop=True)


def _at(base: pd.DataFrame, other: pd.DataFrame, tol: pd.Timedelta) -> np.ndarray:
    """Values of *other* at the times of *base*: the newest at or before, within *tol*."""
    if other.empty or base.empty:
        return np.full(len(base), np.nan)
    merged = pd.merge_asof(base[["time"]], other, on="time", direction="backward",
                           tolerance=tol)
    return merged["value"].to_numpy(float)


def static_margin(
    site: Site, branch: BranchConfig, readings: pd.DataFrame, *, running_only: bool = True
) -> pd.DataFrame:
    """Header pressure and the branch's static back-pressure at every header sample.

    Returns a frame indexed by UTC time with ``header_pa`` and ``static_pa`` [Pa gauge]
    (`model.branch.Branch.static_pressure` with the logged temperature, tank level or end
    pressure where the branch logs them, else their configured or nominal values; NaN
    where a needed condition is neither logged nor configured), and ``load_m3s``,
    ``speed`` (NaN when not logged).

    With *running_only*, ``static_pa`` is NaN where the header is below the site's
    ``running_pressure`` (the pumps count as stopped): the back-flow check judges a
    running system. A stopped pump is its own condition — the whole header is without
    pressure, and what runs back then depends on the pumps' own check valves, which the
    site file does not describe — and a pump trip would otherwise raise one back-flow
    alarm per branch at once (an alarm flood, EEMUA 191).
    """
    tol = _tolerance(site)
    head = _series(readings, site.header_pressure_tag)
    if head.empty:
        return pd.DataFrame(columns=["header_pa", "static_pa", "load_m3s", "speed"],
                            index=pd.DatetimeIndex([], tz="UTC"), dtype=float)
    temp = _at(head, _series(readings, site.header_temperature_tag), tol)
    temp = np.where(np.isfinite(temp), temp, site.design_temperature_c)
    conditions: dict[str, np.ndarray] = {}
    for key, tag in (("level_m", branch.level_tag), ("end_pressure_pa", branch.end_pressure_tag)):
        if tag is None:
            continue
        vals = _at(head, _series(readings, tag), tol)
        if key in branch.nominal:
            vals = np.where(np.isfinite(vals), vals, branch.nominal[key])
        conditions[key] = vals
    try:
        static = np.asarray(
            branch.model.static_pressure(temperature_c=temp, **conditions), dtype=float
        ) * np.ones(len(head))
    except ValueError as exc:  # a needed condition neither logged nor configured
        logger.warning("back-flow check of %s skipped: %s", branch.name, exc)
        static = np.full(len(head), np.nan)
    header = head["value"].to_numpy(float)
    if running_only:
        static = np.where(header >= site.running_pressure_pa, static, np.nan)
    return pd.DataFrame(
        {
            "header_pa": header,
            "static_pa": static,
            "load_m3s": _at(head, _series(readings, site.total_flow_tag), tol),
            "speed": _at(head, _series(readings, site.pump_speed_tag), tol),
        },
        index=pd.DatetimeIndex(head["time"]),
    )


def hazard_samples(site: Site, readings: pd.DataFrame) -> pd.DataFrame:
    """`static_margin` of every `hazard_branches` branch, stacked (`HAZARD_COLUMNS`)."""
    parts = []
    for b in hazard_branches(site):
        m = static_margin(site, b, readings)
        if m.empty:
            continue
        frame = m.reset_index(names="time")
        frame.insert(0, "branch", b.name)
        parts.append(frame[list(HAZARD_COLUMNS)])
    if not parts:
        return pd.DataFrame({c: pd.Series([], dtype="datetime64[ns, UTC]" if c == "time"
                                          else (object if c == "branch" else float))
                             for c in HAZARD_COLUMNS})
    return pd.concat(parts, ignore_index=True)


def cannot_flow(site: Site, readings: pd.DataFrame) -> dict[str, pd.Series]:
    """Per branch flow tag: True at the header samples where the branch cannot flow (the
    header at or below its threshold pressure, or the pumps stopped: header below the
    site's ``running_pressure``), False where it can; any branch, with or without a check
    valve. A branch whose threshold cannot be computed is left out."""
    out: dict[str, pd.Series] = {}
    for b in site.branches:
        if b.flow_tag is None:
            continue
        m = static_margin(site, b, readings, running_only=False)
        ok = (np.isfinite(m["header_pa"].to_numpy(float))
              & np.isfinite(m["static_pa"].to_numpy(float)))
        if m.empty or not ok.any():
            continue
        header = m["header_pa"].to_numpy(float)
        stopped = header < site.running_pressure_pa
        out[b.flow_tag] = pd.Series(
            ((header <= m["static_pa"].to_numpy(float)) & ok) | stopped, index=m.index
        )
    return out


def near_zero(site: Site, tag: str) -> float:
    """A flow meter's "about zero" [m^3/s]: 2 % of its span (the tag's high limit, else
    twice the largest minimum flow of the branches it meters); 0 for other tags. A
    meter's low-flow cut-off is commonly set at 1–2 % of span (common practice, from
    memory)."""
    spec = site.tags[tag]
    if spec.kind != "flow":
        return 0.0
    if spec.high is not None and spec.high > 0:
        return 0.02 * spec.high
    mins = [b.min_flow_m3s for b in site.branches if b.flow_tag == tag]
    return 0.02 * 2.0 * max(mins, default=0.0)


def resting_samples(
    site: Site, readings: pd.DataFrame, *, reach: int = 3
) -> np.ndarray:
    """Per row of *readings*: True for a flow meter's sample that reads about zero
    (`near_zero`) while its branch cannot flow (`cannot_flow`), and for the samples of
    that meter within *reach* samples of one (the 7-point spike screen sees them). A
    healthy meter shows exactly that when the flow stops and starts with the header
    pressure: neither frozen nor spiking."""
    out = np.zeros(len(readings), dtype=bool)
    if readings.empty:
        return out
    stops = cannot_flow(site, readings)
    for tag, mask in stops.items():
        rows = np.flatnonzero((readings["tag"] == tag).to_numpy(bool))
        if len(rows) == 0 or not mask.any():
            continue
        times = pd.DatetimeIndex(pd.to_datetime(readings["time"].iloc[rows])).tz_convert("UTC")
        order = np.argsort(times.asi8, kind="stable")
        rows, times = rows[order], times[order]
        m = mask[~mask.index.duplicated(keep="last")].sort_index()
        stopped = m.reindex(times, method="ffill").fillna(False).to_numpy(bool)
        values = np.abs(readings["value"].to_numpy(float)[rows])
        rest = stopped & (values <= near_zero(site, tag))
        if reach > 0 and rest.any():
            near = np.convolve(rest.astype(float), np.ones(2 * reach + 1), mode="same") > 0
            rest = near & (stopped | (np.convolve(stopped.astype(float),
                                                  np.ones(2 * reach + 1), mode="same") > 0))
        out[rows] = rest
    return out


@dataclass(frozen=True)
class BackflowFindingSettings:
    """How hazard samples become findings.

    clear_after : a finding ends once the condition has not been seen for this long [s];
        a condition that comes back sooner (every night) is the same finding (7 days, our
        choice: a weekly pattern still counts as one condition)
    max_gap : samples further apart than this are not counted as time in hazard [s]
    timezone : the site's zone (hours of day and dates in the message)
    pressure_unit, flow_unit : the header pressure's and total flow's tag units
    terminations : branch → what water would run back from, in words
    """

    clear_after: timedelta = timedelta(days=7)
    max_gap: timedelta = timedelta(minutes=15)
    timezone: str = "UTC"
    pressure_unit: str = "bar"
    flow_unit: str = "m3/h"
    terminations: Mapping[str, str] | None = None


def backflow_findings(
    samples: pd.DataFrame, settings: BackflowFindingSettings, *, now: datetime
) -> list[Finding]:
    """One ``backflow_hazard`` finding per branch and condition from hazard samples.

    *samples*: `HAZARD_COLUMNS` (as `hazard_samples` gives them); samples after *now*
    are ignored. A hazard sample is one with ``header_pa < static_pa``. Hazard samples
    closer than ``clear_after`` belong to one finding; its ``start`` is the first hazard
    sample, ``detected`` the second one in a row (when the ingest alarm would come),
    ``end`` the last hazard sample once ``clear_after`` has passed since it (else None).

    Evidence: ``share_of_time`` (time in hazard over the time observed from start to end
    or *now*), ``hours_in_hazard``, ``episodes``, ``worst_margin_bar`` (header − static at
    the worst sample, negative, in bar), ``worst_header_bar``, ``worst_static_bar``,
    ``worst_local_hour`` (site-local hour of day of the worst sample, fractional),
    ``typical_local_hour`` (circular mean hour of the hazard samples), and, when logged,
    ``load_at_worst_m3h`` (total flow) and ``pump_speed_at_worst`` (fraction).
    """
    missing = [c for c in HAZARD_COLUMNS if c not in samples.columns]
    if missing:
        raise ValueError(f"hazard samples lack column(s) {missing}; need {list(HAZARD_COLUMNS)}")
    t_now = pd.Timestamp(now)
    if t_now.tzinfo is None:
        raise ValueError(f"now must be timezone-aware (UTC), got {now!r}")
    frame = samples.copy()
    frame["time"] = pd.to_datetime(frame["time"]).dt.tz_convert("UTC")
    frame = frame[frame["time"] <= t_now]
    out: list[Finding] = []
    for name, part in frame.groupby("branch", sort=True):
        part = part.sort_values("time").reset_index(drop=True)
        if len(part) < 2:
            continue
        out.extend(_branch_findings(str(name), part, settings, t_now))
    return out


def _branch_findings(
    name: str, part: pd.DataFrame, cfg: BackflowFindingSettings, t_now: pd.Timestamp
) -> list[Finding]:
    t = part["time"]
    margin = (part["header_pa"] - part["static_pa"]).to_numpy(float)
    judged = np.isfinite(margin)  # NaN: not judged (pumps stopped, a condition unknown)
    hazard = judged & (margin < 0)
    t_ns = t.to_numpy("datetime64[ns]").view("int64")
    dt = np.diff(t_ns) / 1e9
    # time of each sample: until the next one, when that is close enough
    weight = np.r_[np.where(dt <= cfg.max_gap.total_seconds(), dt, 0.0), 0.0] * judged
    # a hazard that counts: two hazard samples in a row (one sample is no condition)
    pair = hazard & (np.r_[hazard[1:], False] | np.r_[False, hazard[:-1]])
    idx = np.flatnonzero(pair)
    if len(idx) == 0:
        return []
    clear_ns = cfg.clear_after.total_seconds() * 1e9
    groups: list[list[int]] = [[int(idx[0])]]
    for i in idx[1:]:
        if t_ns[i] - t_ns[groups[-1][-1]] > clear_ns:
            groups.append([])
        groups[-1].append(int(i))
    out = []
    for g in groups:
        out.append(_finding(name, part, margin, weight, np.asarray(g), cfg, t_now))
    return out


def _finding(
    name: str, part: pd.DataFrame, margin: np.ndarray, weight: np.ndarray,
    g: np.ndarray, cfg: BackflowFindingSettings, t_now: pd.Timestamp,
) -> Finding:
    times = part["time"]
    start = times.iloc[g[0]]
    last = times.iloc[g[-1]]
    ended = t_now - last >= pd.Timedelta(cfg.clear_after)
    span_end = last if ended else t_now
    in_span = ((times >= start) & (times <= span_end)).to_numpy(bool)
    observed = float(weight[in_span].sum())
    in_hazard = float(weight[g].sum())
    episodes = 1 + int(np.sum(np.diff(g) > 1))
    worst = int(g[np.nanargmin(margin[g])])
    local = times.iloc[g].dt.tz_convert(cfg.timezone)
    hours = (local.dt.hour + local.dt.minute / 60.0).to_numpy(float)
    ang = hours / 24.0 * 2 * math.pi
    typical = (math.atan2(float(np.sin(ang).mean()), float(np.cos(ang).mean()))
               / (2 * math.pi) * 24.0) % 24.0
    worst_local = times.iloc[worst].tz_convert(cfg.timezone)
    load = float(part["load_m3s"].iloc[worst])
    speed = float(part["speed"].iloc[worst])
    p_unit = cfg.pressure_unit
    bar = 1e-5
    header, static = float(part["header_pa"].iloc[worst]), float(part["static_pa"].iloc[worst])
    evidence: dict[str, float] = {
        "share_of_time": in_hazard / observed if observed > 0 else math.nan,
        "hours_in_hazard": in_hazard / 3600.0,
        "episodes": float(episodes),
        "worst_margin_bar": margin[worst] * bar,
        "worst_header_bar": header * bar,
        "worst_static_bar": static * bar,
        "worst_local_hour": worst_local.hour + worst_local.minute / 60.0,
        "typical_local_hour": typical,
    }
    if math.isfinite(load):
        evidence["load_at_worst_m3h"] = load * 3600.0
    if math.isfinite(speed):
        evidence["pump_speed_at_worst"] = speed

    def p(v: float) -> float:
        return float(from_si(v, p_unit, "pressure"))

    below = p(header) - p(static)
    when = [f"at {worst_local:%H:%M} site time on {worst_local:%Y-%m-%d}"]
    if math.isfinite(load):
        when.append(f"total flow {float(from_si(load, cfg.flow_unit, 'flow')):.3g} "
                    f"{cfg.flow_unit}")
    if math.isfinite(speed):
        when.append(f"pump speed {speed:.0%}")
    source = (cfg.terminations or {}).get(name, "its termination")
    clock = round(typical * 60) % 1440  # minutes after local midnight
    local_start = start.tz_convert(cfg.timezone)
    message = (
        f"{name} has no check valve and the header pressure fell below its static "
        f"back-pressure {evidence['share_of_time']:.0%} of the time since "
        f"{local_start:%Y-%m-%d} ({episodes} episode{'s' if episodes != 1 else ''}, "
        f"mostly around {clock // 60:02d}:{clock % 60:02d} site "
        f"time), by up to {abs(below):.2f} {p_unit} (header {p(header):.2f} against "
        f"{p(static):.2f} {p_unit}) {', '.join(when)}: water can run back from {source} "
        f"into the supply. Keep the header above {p(static):.2f} {p_unit} or fit a check "
        "valve, as site procedures decide"
        + (f"; not seen since {last.tz_convert(cfg.timezone):%Y-%m-%d %H:%M}." if ended else ".")
    )
    detected = times.iloc[g[1]] if len(g) > 1 else start
    return Finding(
        branch=name, kind="backflow_hazard", start=start.to_pydatetime(),
        detected=detected.to_pydatetime(), end=last.to_pydatetime() if ended else None,
        confidence=0.9, evidence=evidence, message=message,
    )


def settings_for(site: Site, branches: Sequence[BranchConfig] | None = None
                 ) -> BackflowFindingSettings:
    """The finding settings of *site*: its zone, its tags' units, its terminations."""
    spec = site.tags.get(site.header_pressure_tag)
    flow = site.tags.get(site.total_flow_tag) if site.total_flow_tag else None
    chosen = hazard_branches(site) if branches is None else branches
    return BackflowFindingSettings(
        max_gap=_tolerance(site).to_pytimedelta(),
        timezone=site.timezone,
        pressure_unit=spec.unit if spec is not None else "bar",
        flow_unit=flow.unit if flow is not None else "m3/h",
        terminations={b.name: termination_words(b) for b in chosen},
    )
