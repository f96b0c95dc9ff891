"""Screening of historian readings: which samples a fit may trust.

Pure pandas/numpy on a readings frame (``time`` UTC, ``tag``, ``value`` SI, ``good``; see
`adapters.records`); no I/O. Per tag, each sample gets these flags:

==============  ===============================================================  ========
flag            meaning                                                          unusable
==============  ===============================================================  ========
bad_quality     the source marked the sample bad                                 yes
no_value        no number (NaN)                                                  yes
out_of_range    outside the configured low/high or a physical limit (flow below  yes
                −noise, pressure below −1 bar gauge, temperature outside
                0–100 °C)
frozen          no change beyond the tolerance for longer than the frozen time   yes
spike           Hampel filter: 7-point window, |x − median| > 3·1.4826·MAD       yes
                (Hampel 1974), the scale floored at the tag's noise level
                (configured absolute and relative, and estimated from the data)
                and at its resolution (the level spacing of a coarse signal)
rate            change from the previous accepted sample faster than plausible   yes
gap             first sample after a gap longer than the maximum gap             no
pump_off        header pressure (or total flow) below the running threshold      yes
startup         within the settling time after the pump started                  yes
==============  ===============================================================  ========

`screen` returns a `ScreenResult`: the per-sample flags, the gaps as intervals, the
``usable`` mask and `ScreenResult.health_counts` (tag, day, flag, count) for the report's
data-health section; the per-sample checks it combines are in `monitor.analysis.sample_checks`.
`to_wide` puts readings on a regular grid for fitting; `running_mask` and `steady_mask`
select pump-running and steady periods on that grid.

>>> import pandas as pd
>>> t = pd.date_range("2025-03-01", periods=9, freq="min", tz="UTC")
>>> r = pd.DataFrame({"time": t, "tag": "FT-203", "good": True,
...                   "value": [0.0300, 0.0302, 0.0299, 0.0301, 0.09, 0.0300, 0.0298,
...                             0.0301, 0.0300]})
>>> res = screen(r, {"FT-203": TagLimits(kind="flow")})
>>> res.flags.loc[res.flags["spike"], "value"].tolist()
[0.09]
"""

from __future__ import annotations

import logging
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from adapters.records import READING_COLUMNS, TagSpec
from monitor.analysis.sample_checks import find_gaps, frozen_runs, hampel_outliers, too_fast

__all__ = [
    "FLAGS",
    "UNUSABLE_FLAGS",
    "ScreenResult",
    "ScreenSettings",
    "TagLimits",
    "running_mask",
    "screen",
    "steady_mask",
    "to_wide",
]

log = logging.getLogger(__name__)

FLAGS: tuple[str, ...] = (
    "bad_quality",
    "no_value",
    "out_of_range",
    "frozen",
    "spike",
    "rate",
    "gap",
    "pump_off",
    "startup",
)
#: Flags that exclude a sample from fitting (``gap`` only marks where data resumed).
UNUSABLE_FLAGS: tuple[str, ...] = tuple(f for f in FLAGS if f != "gap")

ONE_BAR_PA = 1.0e5

#: Per quantity kind: (noise [SI], relative noise [-], max rate [SI/s], physical low [SI],
#: physical high [SI]). Noise levels and rates are common practice for plant transmitters
#: (flow meters scatter about 1 % of reading, pressure transmitters less), not a standard.
_KIND_DEFAULTS: dict[str, tuple[float, float, float | None, float | None, float | None]] = {
    "pressure": (500.0, 0.005, 2.0e5, -ONE_BAR_PA, None),  # 5 mbar; 2 bar/s
    "flow": (1.0e-4, 0.01, 0.05, None, None),  # 0.36 m3/h; low is −noise
    "temperature": (0.1, 0.0, 0.5, 0.0, 100.0),  # liquid water at plant pressure
    "level": (0.005, 0.0, 0.05, None, None),
    "position": (0.005, 0.0, 0.5, -0.05, 1.05),
}
_OTHER = (0.0, 0.0, None, None, None)


@dataclass(frozen=True)
class TagLimits:
    """What is plausible for one tag, in SI.

    Parameters
    ----------
    kind
        Quantity kind (``pressure``, ``flow``, ``temperature``, ``level``, ``position``
        or any other key of `adapters.units.SI_UNITS`); fixes the physical limits and
        the defaults below.
    low, high
        Configured range (instrument range) [SI]; None for none.
    noise
        Measurement noise, one standard deviation [SI]: floor of the Hampel scale, and
        the negative flow a meter may show at rest. None: the kind's default.
    noise_rel
        Noise as a fraction of the reading [-]; the Hampel scale is floored at the
        larger of the two. None: the kind's default.
    max_rate
        Largest plausible change per second [SI/s]; None: the kind's default
        (no check for kinds without one).
    frozen_tolerance
        A change of at most this much counts as "no change" [SI] (default 0: identical
        values).
    """

    kind: str
    low: float | None = None
    high: float | None = None
    noise: float | None = None
    noise_rel: float | None = None
    max_rate: float | None = None
    frozen_tolerance: float = 0.0

    def __post_init__(self) -> None:
        if self.low is not None and self.high is not None and self.low >= self.high:
            raise ValueError(f"low must be below high, got low={self.low}, high={self.high}")
        if self.noise is not None and self.noise < 0:
            raise ValueError(f"noise must be >= 0, got {self.noise}")
        if self.noise_rel is not None and not 0 <= self.noise_rel < 1:
            raise ValueError(f"noise_rel must be in [0, 1), got {self.noise_rel}")
        if self.max_rate is not None and self.max_rate <= 0:
            raise ValueError(f"max_rate must be > 0, got {self.max_rate}")
        if self.frozen_tolerance < 0:
            raise ValueError(f"frozen_tolerance must be >= 0, got {self.frozen_tolerance}")

    @classmethod
    def from_spec(cls, spec: TagSpec) -> TagLimits:
        """Limits of a configured tag (its kind and instrument range)."""
        return cls(kind=spec.kind, low=spec.low, high=spec.high)

    @property
    def noise_si(self) -> float:
        """Noise [SI], configured or the kind's default (0 for unknown kinds)."""
        return self.noise if self.noise is not None else _KIND_DEFAULTS.get(self.kind, _OTHER)[0]

    @property
    def noise_rel_si(self) -> float:
        """Relative noise [-], configured or the kind's default."""
        if self.noise_rel is not None:
            return self.noise_rel
        return _KIND_DEFAULTS.get(self.kind, _OTHER)[1]

    @property
    def rate_si(self) -> float | None:
        """Largest plausible rate [SI/s], configured or the kind's default."""
        if self.max_rate is not None:
            return self.max_rate
        return _KIND_DEFAULTS.get(self.kind, _OTHER)[2]

    def bounds(self) -> tuple[float, float]:
        """Effective (low, high) [SI]: the tighter of configured and physical limits."""
        phys_low, phys_high = _KIND_DEFAULTS.get(self.kind, _OTHER)[3:]
        if self.kind == "flow":
            phys_low = -self.noise_si
        lows = [v for v in (self.low, phys_low) if v is not None]
        highs = [v for v in (self.high, phys_high) if v is not None]
        return (max(lows) if lows else -np.inf, min(highs) if highs else np.inf)


@dataclass(frozen=True)
class ScreenSettings:
    """Thresholds of the screening; the defaults suit 1 s – 1 min historian data.

    Parameters
    ----------
    max_gap_s
        Longer than this without a sample is a gap [s].
    frozen_s
        No change for at least this long is a frozen value [s].
    hampel_k
        Hampel threshold in robust standard deviations [-] (3, Hampel 1974).
    running_pressure_pa
        The pump runs while the header pressure is above this [Pa gauge].
    running_flow_m3s
        …and, when a total-flow tag is given, the total flow is above this [m^3/s].
    settling_s
        After a pump start, samples are not steady for this long [s].
    steady_window_s
        Window of the steady-state test [s].
    steady_flow_rel, steady_pressure_rel
        Largest rolling coefficient of variation (std/mean) in the window for flow and
        pressure [-].
    steady_flow_floor_m3s, steady_pressure_floor_pa
        Means below these count as these in the relative variation, so that a near-zero
        mean does not make every window unsteady [m^3/s], [Pa].
    """

    max_gap_s: float = 600.0
    frozen_s: float = 3600.0
    hampel_k: float = 3.0
    running_pressure_pa: float = 0.5 * ONE_BAR_PA
    running_flow_m3s: float = 1.0e-3
    settling_s: float = 600.0
    steady_window_s: float = 900.0
    steady_flow_rel: float = 0.05
    steady_pressure_rel: float = 0.03
    steady_flow_floor_m3s: float = 1.0e-3
    steady_pressure_floor_pa: float = 0.1 * ONE_BAR_PA

    def __post_init__(self) -> None:
        for name in (
            "max_gap_s",
            "frozen_s",
            "hampel_k",
            "steady_window_s",
            "steady_flow_rel",
            "steady_pressure_rel",
        ):
            if not getattr(self, name) > 0:
                raise ValueError(f"{name} must be > 0, got {getattr(self, name)}")
        if self.settling_s < 0:
            raise ValueError(f"settling_s must be >= 0, got {self.settling_s}")


@dataclass(frozen=True)
class ScreenResult:
    """Outcome of `screen`.

    ``flags``: the readings (time, tag, value, good) sorted by tag and time, one bool
    column per flag of `FLAGS` and ``usable``. ``gaps``: tag, start, end, duration_s —
    every stretch without samples longer than the maximum gap (including at the edges
    of the screened window when one was given).
    """

    flags: pd.DataFrame
    gaps: pd.DataFrame
    settings: ScreenSettings = field(default_factory=ScreenSettings)

    @property
    def usable(self) -> pd.Series:
        """True where a sample may be used for fitting (aligned with ``flags``)."""
        return self.flags["usable"]

    def for_tag(self, tag: str) -> pd.DataFrame:
        """Flags of one tag, indexed by time."""
        part = self.flags[self.flags["tag"] == tag]
        return part.drop(columns="tag").set_index("time")

    def health_counts(self) -> pd.DataFrame:
        """Counts per tag, UTC day and flag (columns tag, day, flag, count).

        Besides the flags (a gap counts on the day it began) there are ``samples`` and
        ``usable`` rows, so the report can give shares. Zero counts are left out.
        """
        flags = self.flags
        tag_codes, tags = pd.factorize(flags["tag"])
        day_codes, days = pd.factorize(flags["time"].dt.floor("D"))
        n_days = max(len(days), 1)
        cell = tag_codes * n_days + day_codes
        size = len(tags) * n_days
        # integer counting per flag on (tag, day) cells: one pass each, no groupby
        names = [f for f in (*FLAGS, "usable", "samples") if f != "gap"]
        counts = (
            np.stack(
                [
                    np.bincount(
                        cell if f == "samples" else cell[flags[f].to_numpy(bool)], minlength=size
                    )
                    for f in names
                ]
            )
            if size
            else np.zeros((len(names), 0), dtype="int64")
        )
        which, nz = np.nonzero(counts)
        long = pd.DataFrame(
            {
                "tag": np.asarray(tags, dtype=object)[nz // n_days],
                "day": days[nz % n_days] if len(days) else flags["time"].dt.floor("D")[:0],
                "flag": np.asarray(names, dtype=object)[which],
                "count": counts[which, nz].astype("int64"),
            }
        )
        gaps = self.gaps.assign(day=self.gaps["start"].dt.floor("D"))
        gap_counts = gaps.groupby(["tag", "day"]).size().rename("count").reset_index()
        if len(gap_counts):  # the gap flag is counted from the gap intervals
            long = pd.concat([long, gap_counts.assign(flag="gap")], ignore_index=True)
        out = long.sort_values(["day", "tag", "flag"]).reset_index(drop=True)
        out["count"] = out["count"].astype("int64")
        out["day"] = out["day"].astype("datetime64[ns, UTC]")  # the project's time unit
        for col in ("tag", "flag"):  # plain objects, as in readings frames
            out[col] = out[col].astype(object)
        return out[["tag", "day", "flag", "count"]]


def screen(
    readings: pd.DataFrame,
    specs: Mapping[str, TagLimits],
    settings: ScreenSettings | None = None,
    *,
    start: pd.Timestamp | None = None,
    end: pd.Timestamp | None = None,
    header_pressure_tag: str | None = None,
    total_flow_tag: str | None = None,
    resting: np.ndarray | None = None,
) -> ScreenResult:
    """Flag every sample of *readings* (see the module docstring for the flags).

    Parameters
    ----------
    readings
        Readings frame (``time`` UTC, ``tag``, ``value`` SI, ``good``).
    specs
        Limits per tag; a tag without limits is screened for quality, gaps, frozen
        values and spikes only (noise floor 0).
    settings
        Thresholds; defaults of `ScreenSettings` when None.
    start, end
        The window screened (UTC): a tag silent at its start or end, or throughout,
        counts as a gap there.
    header_pressure_tag, total_flow_tag
        When given, samples of every tag taken while the pump is off or still settling
        are flagged ``pump_off`` / ``startup`` (see `running_mask`).
    resting
        Per row of *readings*, True for a flow meter's sample taken while its branch
        cannot flow and reading about zero (`monitor.analysis.backflow.resting_samples`): such a
        sample is never flagged frozen or a spike — a flow that stops and starts with the
        header pressure is the process, not the meter.
    """
    settings = settings or ScreenSettings()
    missing = set(READING_COLUMNS) - set(readings.columns)
    if missing:
        raise ValueError(f"readings lacks columns {sorted(missing)}")
    if not isinstance(readings["time"].dtype, pd.DatetimeTZDtype):
        raise ValueError("readings time must be timezone-aware UTC (datetime64[ns, UTC])")
    frame = readings.loc[:, list(READING_COLUMNS)]
    # By tag, then time: one factorisation gives the tag codes (sorted, so the codes
    # follow the sorted tags) and the sort is on integers.
    codes, tags = pd.factorize(frame["tag"], sort=True)
    t_ns = frame["time"].dt.tz_convert("UTC").to_numpy("datetime64[ns]").view("int64")
    order = np.lexsort((t_ns, codes))
    codes, t_ns = codes[order], t_ns[order]
    if resting is not None and len(resting) != len(frame):
        raise ValueError(f"resting has {len(resting)} entries for {len(frame)} readings")
    rest = np.asarray(resting, dtype=bool)[order] if resting is not None else None
    frame = frame.take(order).reset_index(drop=True)
    frame["time"] = frame["time"].dt.tz_convert("UTC")
    value = frame["value"].to_numpy("float64")
    t_s = (t_ns / 1e9).astype("float64")
    n = len(frame)

    limits = [specs.get(tag, TagLimits(kind="other")) for tag in tags]
    noise = np.array([lim.noise_si for lim in limits])[codes] if n else np.zeros(0)
    noise_rel = np.array([lim.noise_rel_si for lim in limits])[codes] if n else np.zeros(0)
    low = np.array([lim.bounds()[0] for lim in limits])[codes] if n else np.zeros(0)
    high = np.array([lim.bounds()[1] for lim in limits])[codes] if n else np.zeros(0)
    rate = np.array([lim.rate_si or np.inf for lim in limits])[codes] if n else np.zeros(0)
    tol = np.array([lim.frozen_tolerance for lim in limits])[codes] if n else np.zeros(0)
    is_flow = np.array([lim.kind == "flow" for lim in limits])[codes] if n else np.zeros(0, bool)

    flags = {name: np.zeros(n, dtype=bool) for name in FLAGS}
    flags["bad_quality"] = ~frame["good"].to_numpy(bool)
    flags["no_value"] = ~np.isfinite(value)
    flags["out_of_range"] = np.isfinite(value) & ((value < low) | (value > high))
    valid = ~(flags["bad_quality"] | flags["no_value"] | flags["out_of_range"])
    flags["frozen"] = frozen_runs(value, t_s, codes, valid, tol, noise, is_flow, settings.frozen_s)
    flags["spike"] = valid & hampel_outliers(
        np.where(valid, value, np.nan), codes, noise, noise_rel, settings.hampel_k
    )
    if rest is not None:
        flags["frozen"] &= ~rest
        flags["spike"] &= ~rest
    accepted = valid & ~flags["spike"]
    flags["rate"] = accepted & too_fast(value, t_s, codes, accepted, rate)
    new_run = np.r_[True, codes[1:] != codes[:-1]] if n else np.zeros(0, bool)
    dt_prev = np.r_[np.inf, np.diff(t_s)] if n else np.zeros(0)
    flags["gap"] = ~new_run & (dt_prev > settings.max_gap_s)
    gaps = find_gaps(frame, codes, tags, t_s, new_run, settings.max_gap_s, start, end, specs)
    if header_pressure_tag is not None:
        off, settling = _pump_state(frame, flags, header_pressure_tag, total_flow_tag, settings)
        flags["pump_off"], flags["startup"] = off, settling

    for name in FLAGS:
        frame[name] = flags[name]
    frame["usable"] = ~np.logical_or.reduce([flags[f] for f in UNUSABLE_FLAGS])
    if n:
        log.debug(
            "screened %d samples of %d tags: %d usable", n, len(tags), int(frame["usable"].sum())
        )
    return ScreenResult(flags=frame, gaps=gaps, settings=settings)


def _pump_state(
    frame: pd.DataFrame,
    flags: Mapping[str, np.ndarray],
    pressure_tag: str,
    flow_tag: str | None,
    settings: ScreenSettings,
) -> tuple[np.ndarray, np.ndarray]:
    """(pump off, settling) for every sample, from the running state at its time."""
    ok = ~(flags["bad_quality"] | flags["no_value"] | flags["out_of_range"] | flags["spike"])
    tags = [pressure_tag] if flow_tag is None else [pressure_tag, flow_tag]
    sel = frame["tag"].isin(tags).to_numpy() & ok
    t_ns = frame["time"].to_numpy("datetime64[ns]").view("int64")
    n = len(frame)
    # The state tags on one time axis (mean per time, the last value held where only one
    # tag has a sample): integer counting and a running maximum, no pivot or merge.
    times, at = np.unique(t_ns[sel], return_inverse=True)
    tag_of = frame["tag"].to_numpy(object)[sel]
    value = frame["value"].to_numpy("float64")[sel]
    columns: dict[str, np.ndarray] = {}
    for tag in tags:
        mine = tag_of == tag
        if not mine.any():
            continue
        count = np.bincount(at[mine], minlength=len(times))
        total = np.bincount(at[mine], weights=value[mine], minlength=len(times))
        with np.errstate(invalid="ignore", divide="ignore"):
            col = np.where(count > 0, total / count, np.nan)
        last = np.maximum.accumulate(np.where(count > 0, np.arange(len(times)), 0))
        columns[tag] = col[last]
    if pressure_tag not in columns:
        return np.zeros(n, dtype=bool), np.zeros(n, dtype=bool)
    index = pd.DatetimeIndex(times.view("datetime64[ns]")).tz_localize("UTC")
    state_frame = pd.DataFrame(columns, index=index)
    running = running_mask(state_frame, pressure_tag, flow_tag, settings, settle=False)
    settled = running_mask(state_frame, pressure_tag, flow_tag, settings, settle=True)
    # each sample takes the last state at or before it, within the maximum gap
    pos = np.searchsorted(times, t_ns, side="right") - 1
    prior = np.maximum(pos, 0)
    tolerance = pd.Timedelta(seconds=settings.max_gap_s).value
    known = (pos >= 0) & (t_ns - times[prior] <= tolerance) if len(times) else np.zeros(n, bool)
    run = known & running.to_numpy(bool)[prior]
    settle = known & settled.to_numpy(bool)[prior]
    return known & ~run, known & run & ~settle


def running_mask(
    wide: pd.DataFrame,
    pressure_tag: str,
    flow_tag: str | None = None,
    settings: ScreenSettings | None = None,
    *,
    settle: bool = True,
) -> pd.Series:
    """True where the pump runs (and, with *settle*, has run for the settling time).

    Running: header pressure above ``running_pressure_pa`` and, when *flow_tag* is
    given, total flow above ``running_flow_m3s``. A start is a step from not running to
    running; the first ``settling_s`` after it are not settled. Data that begins with
    the pump running is taken as settled (no start was seen). NaN counts as not running.

    Parameters
    ----------
    wide
        Frame indexed by UTC time, one column per tag (e.g. from `to_wide`) [SI].
    """
    settings = settings or ScreenSettings()
    for tag in (pressure_tag, flow_tag):
        if tag is not None and tag not in wide.columns:
            raise KeyError(f"tag {tag!r} is not a column of the wide frame")
    running = (wide[pressure_tag] > settings.running_pressure_pa).to_numpy(bool)
    if flow_tag is not None:
        running = running & (wide[flow_tag] > settings.running_flow_m3s).to_numpy(bool)
    out = pd.Series(running, index=wide.index, name="running")
    if not settle or settings.settling_s == 0 or len(out) == 0:
        return out
    times = pd.Series(wide.index, index=wide.index)
    started = out & ~out.shift(1, fill_value=True)
    since = times - times.where(started).ffill()
    young = since.notna() & (since < pd.Timedelta(seconds=settings.settling_s))
    return out & ~young


def steady_mask(
    wide: pd.DataFrame,
    flow_tags: Sequence[str],
    pressure_tags: Sequence[str],
    settings: ScreenSettings | None = None,
) -> pd.Series:
    """True where flows and pressures are steady over the centred steady window.

    Steady: for every flow tag the rolling coefficient of variation (std / |mean|, the
    mean floored at ``steady_flow_floor_m3s``) is at most ``steady_flow_rel``, and the
    same for the pressure tags; the window must be at least half filled. Transients —
    pump starts and stops, valve moves, set-point changes — fail the test.

    Parameters
    ----------
    wide
        Frame indexed by UTC time on a regular grid, one column per tag (`to_wide`).
    """
    settings = settings or ScreenSettings()
    if not isinstance(wide.index, pd.DatetimeIndex):
        raise ValueError("wide must be indexed by time (a DatetimeIndex)")
    window = pd.Timedelta(seconds=settings.steady_window_s)
    ok = pd.Series(True, index=wide.index, name="steady")
    groups = (
        (flow_tags, settings.steady_flow_rel, settings.steady_flow_floor_m3s),
        (pressure_tags, settings.steady_pressure_rel, settings.steady_pressure_floor_pa),
    )
    step = wide.index.to_series().diff().median() if len(wide) > 1 else window
    need = max(2, int(0.5 * window / step)) if pd.notna(step) and step > pd.Timedelta(0) else 2
    for tags, limit, floor in groups:
        for tag in tags:
            if tag not in wide.columns:
                raise KeyError(f"tag {tag!r} is not a column of the wide frame")
            roll = wide[tag].rolling(window, center=True, min_periods=need)
            cv = roll.std() / roll.mean().abs().clip(lower=floor)
            ok &= (cv <= limit).fillna(False)
    return ok


def to_wide(
    readings: pd.DataFrame,
    freq: str | pd.Timedelta,
    *,
    start: pd.Timestamp | None = None,
    end: pd.Timestamp | None = None,
) -> pd.DataFrame:
    """Readings on a regular UTC grid: mean of the good samples in each bin.

    Bins are ``[t, t + freq)`` labelled by their start; columns are the tags (sorted);
    empty bins are NaN. With *start*/*end* the grid covers ``[start, end)``, else from
    the first to the last sample's bin.

    >>> t = pd.to_datetime(["2025-03-01T00:00:10Z", "2025-03-01T00:00:50Z",
    ...                     "2025-03-01T00:02:05Z"])
    >>> r = pd.DataFrame({"time": t, "tag": "PT-100", "value": [2.0e5, 2.2e5, 2.1e5],
    ...                   "good": True})
    >>> to_wide(r, "1min")["PT-100"].tolist()
    [210000.0, nan, 210000.0]
    """
    freq = pd.Timedelta(freq)
    if freq <= pd.Timedelta(0):
        raise ValueError(f"freq must be a positive duration, got {freq}")
    good = readings[readings["good"].to_numpy(bool) & np.isfinite(readings["value"])]
    bins = good["time"].dt.tz_convert("UTC").dt.floor(freq)
    wide = good["value"].groupby([bins, good["tag"]]).mean().unstack("tag")
    if start is None or end is None:
        if len(bins) == 0:
            return pd.DataFrame(
                index=pd.DatetimeIndex([], dtype="datetime64[ns, UTC]", name="time")
            )
        start = start if start is not None else bins.min()
        end = end if end is not None else bins.max() + freq
    grid = pd.date_range(
        pd.Timestamp(start).tz_convert("UTC").floor(freq),
        pd.Timestamp(end).tz_convert("UTC"),
        freq=freq,
        inclusive="left",
        name="time",
    ).as_unit("ns")
    wide = wide.reindex(grid).reindex(columns=sorted(wide.columns))
    wide.columns.name = None
    return wide.astype("float64")
