"""What the diagnosis reports and what it reads: findings, thresholds, input columns.

`Finding` is one diagnosed condition of one branch; `DiagnosisSettings` and
`BranchSettings` hold the thresholds; the ``*_COLUMNS`` describe the frames
`monitor.analysis.diagnose.diagnose` takes. `Episodes` keeps the episodes of a condition that comes
and goes (low flow, a sick meter, a header imbalance): one finding per condition, not one
per day, ended once the condition has stayed away for ``clear_after_s``. `flow_pair`
writes a flow and its limit in the tag's own unit with the digits that show how they
compare. Everything here is plain data and formatting, shared by `monitor.analysis.diagnose` (the
whole site) and `monitor.analysis.replay` (one branch's history).
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from datetime import datetime
from typing import Any
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

import pandas as pd

from adapters.fit_record import HISTORY_NUMBERS
from adapters.records import MaintenanceKind
from adapters.units import UnitError, converter, from_si

__all__ = [
    "BALANCE_COLUMNS",
    "CHECKED_BY_FITS",
    "END_BY_EVENT",
    "EVENT_WORDS",
    "HISTORY_COLUMNS",
    "KINDS",
    "PRIORITIES",
    "SCREENING_COLUMNS",
    "BranchSettings",
    "DiagnosisSettings",
    "Episodes",
    "Finding",
    "episode_text",
    "flow_pair",
    "percent",
]

KINDS: tuple[str, ...] = (
    "fouling", "restriction", "back_pressure", "low_flow", "instrument", "imbalance",
    "backflow_hazard",
)  # fmt: skip
#: Which open findings a maintenance event ends. Those in `CHECKED_BY_FITS` end only when
#: the fits after the event show the resistance ratio back down (`monitor.analysis.replay`).
END_BY_EVENT: dict[str, frozenset[str]] = {
    MaintenanceKind.CLEANED: frozenset({"fouling", "restriction"}),
    MaintenanceKind.VALVE_SET: frozenset({"restriction", "back_pressure"}),
    MaintenanceKind.METER_CALIBRATED: frozenset({"instrument"}),
}
#: Findings of a raised resistance ratio: an event ends them only when r fell after it.
CHECKED_BY_FITS: frozenset[str] = frozenset({"fouling", "restriction"})
#: A finding's priority, kept in its evidence as ``priority`` (evidence holds numbers
#: only): the number → the word the report and the alarms show. Without one, a finding
#: is "medium"; a fouled branch past its cleaning limit is "high".
PRIORITIES: dict[float, str] = {1.0: "low", 2.0: "medium", 3.0: "high"}
#: How the messages name the work of an event kind.
EVENT_WORDS: dict[str, str] = {MaintenanceKind.CLEANED: "cleaning",
                               MaintenanceKind.VALVE_SET: "valve setting"}


@dataclass(frozen=True)
class Finding:
    """One diagnosed condition of a branch (or of the header for ``imbalance``).

    ``start`` is the estimated onset, ``detected`` the end of the window in which it was
    first reported, ``end`` when it cleared (None while open); all UTC. ``evidence`` holds
    numbers only (slopes per day, test statistics, steps in σ and in the series' unit).
    """

    branch: str
    kind: str
    start: datetime
    detected: datetime
    end: datetime | None
    confidence: float
    evidence: Mapping[str, float]
    message: str

    @property
    def priority(self) -> str:
        """"low", "medium" or "high" (evidence ``priority``, see `PRIORITIES`)."""
        return PRIORITIES.get(float(self.evidence.get("priority", 2.0)), "medium")

    def __post_init__(self) -> None:
        if self.kind not in KINDS:
            raise ValueError(f"kind must be one of {KINDS}, got {self.kind!r}")
        if not 0.0 <= self.confidence <= 1.0:
            raise ValueError(f"confidence must be in [0, 1], got {self.confidence}")

    def to_json_dict(self) -> dict[str, Any]:
        """The object of the findings file (DESIGN §5): ISO times, numbers, null."""

        def iso(t: datetime | None) -> str | None:
            return None if t is None else pd.Timestamp(t).tz_convert("UTC").isoformat()

        def num(v: float) -> float | None:
            return float(v) if math.isfinite(float(v)) else None

        return {
            "branch": self.branch,
            "kind": self.kind,
            "start": iso(self.start),
            "detected": iso(self.detected),
            "end": iso(self.end),
            "confidence": round(float(self.confidence), 3),
            "priority": self.priority,
            "evidence": {k: num(v) for k, v in self.evidence.items()},
            "message": self.message,
        }


@dataclass(frozen=True)
class BranchSettings:
    """Per-branch settings.

    cleaning_limit_r : resistance ratio at which cleaning is due [-]; 1.5 by default
        (cleaning is commonly planned at ~1.5–2× clean pressure drop, from memory)
    min_flow_m3s : branch minimum flow [m^3/s]; None = no low-flow check
    commissioning : (start, end) UTC of the baseline period; None = the first
        ``baseline_windows`` good windows of the history
    flow_unit : the unit of the branch's flow tag, in which messages state flows
    pressure_unit : the unit of the branch's end-pressure tag (else of the header
        pressure tag), in which messages state pressures; must be a pressure unit
    """

    cleaning_limit_r: float = 1.5
    min_flow_m3s: float | None = None
    commissioning: tuple[datetime, datetime] | None = None
    flow_unit: str = "m3/h"
    pressure_unit: str = "bar"

    def __post_init__(self) -> None:
        try:
            converter(self.pressure_unit, "pressure")
        except UnitError as exc:
            raise ValueError(f"pressure_unit must be a pressure unit, got "
                             f"{self.pressure_unit!r}") from exc  # fmt: skip
        if not self.cleaning_limit_r > 1.0:
            raise ValueError(f"cleaning_limit_r must be > 1, got {self.cleaning_limit_r}")
        if self.min_flow_m3s is not None and not self.min_flow_m3s >= 0:
            raise ValueError(f"min_flow_m3s must be >= 0, got {self.min_flow_m3s}")


#: The fewest windows a span of the diagnosis may hold (`DiagnosisSettings.for_window`).
SPAN_FLOORS = {"baseline_windows": 5, "level_windows": 5, "min_trend_windows": 10}


@dataclass(frozen=True)
class DiagnosisSettings:
    """Thresholds of the diagnosis. σ is the day-to-day scatter of the baseline.

    The defaults keep false findings below 0.5 per clean branch-year on daily windows with
    1–2 % scatter and AR(1) correlation up to 0.6 (tests/monitor/test_diagnose.py).
    """

    branches: Mapping[str, BranchSettings] = field(default_factory=dict)
    default_branch: BranchSettings = field(default_factory=BranchSettings)
    header_name: str = "header"
    baseline_windows: int = 14  # [windows]
    min_sigma_r: float = 0.004  # floor of σ_r: fits are never better than ~0.4 % [-]
    level_windows: int = 14  # windows that predict the next one [windows]
    step_z: float = 6.0  # jump of one window to call a step [σ]
    min_step_rel: float = 0.05  # and at least this relative rise of r [-]
    cusum_k: float = 1.0  # CUSUM reference value [σ]
    cusum_h: float = 12.0  # CUSUM decision interval [σ]
    trend_alpha: float = 0.001  # Mann–Kendall (Hamed–Rao) two-sided level [-]
    min_rise_r: float = 0.05  # fitted rise needed to call fouling [-]
    min_trend_windows: int = 20  # [windows]
    trend_persistence: int = 3  # consecutive windows the trend test must pass [windows]
    min_rise_sigma: float = 4.0  # fitted level above the reference, in σ [-]
    max_trend_windows: int = 180  # [windows]
    trend_lookbacks: tuple[int, ...] = (10, 20, 30, 60, 120, 180)  # trailing windows tested
    min_bp_step_pa: float = 1.0e4  # smallest back-pressure step reported (0.1 bar) [Pa]
    min_sigma_pa: float = 500.0  # floor of σ of pressures [Pa]
    bp_step_z: float = 6.0  # [σ]
    offset_evidence: float = 3.0  # |log-likelihood ratio| to decide static vs Q² [-]
    max_effective_samples: int = 30  # samples of a window are serially correlated [-]
    mixed_factor: float = 4.0  # a window's residual over the baseline's: step inside it
    at_once_z: float = 12.0  # jump reported in its own window, unconfirmed [σ]
    at_once_rel: float = 0.10  # and at least this relative rise of r [-]
    at_once_discount: float = 0.8  # confidence factor until the next window confirms [-]
    imbalance_windows: int = 3  # [windows]
    spike_fraction: float = 0.02  # spikes per sample that make a window suspect [-]
    spike_count: int = 30  # same, when the sample count is not given [-]
    spike_min_count: int = 10  # and never fewer spikes than this in a window [-]
    #: windows in a row a meter must look spiky (spikes alone) to be reported [windows]
    spike_windows: int = 2
    #: out-of-range samples that make a window suspect [-]: a lone reading beyond the
    #: range is a spike (screened out like one); a failed meter keeps reading there
    out_of_range_min_count: int = 3
    low_flow_deadband: float = 0.05  # fraction of the minimum to clear low flow [-]
    #: usable windows after a cleaning or valve setting that judge whether it worked
    verify_windows: int = 3
    timezone: str = "UTC"  # the site's zone: dates in finding messages are site time
    #: A condition that comes and goes (low flow, instrument, imbalance) is one finding
    #: until it has stayed away this long [s]. A week by default: the longest regular
    #: cycle of a plant's load is the week (weekend turndown), so a condition that comes
    #: back within one is the same condition returning with the load; a week without it
    #: is a condition gone.
    clear_after_s: float = 7 * 86_400.0
    balance_flow_unit: str = "m3/h"  # the total flow tag's unit, for imbalance messages

    @classmethod
    def for_window(
        cls, window_s: float, *, baseline_s: float | None = None, level_s: float | None = None,
        trend_min_s: float | None = None, trend_max_s: float | None = None, **kw: Any,
    ) -> DiagnosisSettings:
        """Settings for windows of *window_s* [s]: the spans that are times of the plant
        (the baseline, the level that predicts the next window, the shortest and longest
        trend) given as durations [s] — by default the daily windows' counts as days
        (14, 14, 20 and 180 days) — and converted to window counts, never fewer than
        `SPAN_FLOORS` (a median or a scatter of fewer windows is not worth reporting:
        our choice; a Mann–Kendall test is used from 10 points, common practice). The
        trailing look-backs of the trend test scale with the longest trend. Daily
        windows get the defaults exactly.

        The counts of windows *in a row* (``trend_persistence``, ``verify_windows``,
        ``imbalance_windows``, ``spike_windows``) stay counts: they confirm a result in
        successive windows, a statistical need, not a time of the plant.

        >>> s = DiagnosisSettings.for_window(60.0, baseline_s=1200.0, level_s=600.0,
        ...                                  trend_min_s=1200.0, trend_max_s=3 * 3600.0)
        >>> s.baseline_windows, s.level_windows, s.min_trend_windows, s.trend_lookbacks
        (20, 10, 20, (10, 20, 30, 60, 120, 180))
        >>> DiagnosisSettings.for_window(3600.0).baseline_windows  # 14 days of hours
        336
        """
        if not window_s > 0:
            raise ValueError(f"window_s must be positive, got {window_s}")
        day = 86_400.0

        def count(span_s: float | None, default_days: int, floor: int) -> int:
            span = default_days * day if span_s is None else span_s
            if not span > 0:
                raise ValueError(f"a diagnosis span must be positive, got {span} s")
            return max(floor, round(span / window_s))

        base = count(baseline_s, 14, SPAN_FLOORS["baseline_windows"])
        level = count(level_s, 14, SPAN_FLOORS["level_windows"])
        low = count(trend_min_s, 20, SPAN_FLOORS["min_trend_windows"])
        high = max(low, count(trend_max_s, 180, SPAN_FLOORS["min_trend_windows"]))
        looks = sorted({min(high, max(low // 2, round(k * high / 180)))
                        for k in (10, 20, 30, 60, 120, 180)})
        return cls(baseline_windows=base, level_windows=level, min_trend_windows=low,
                   max_trend_windows=high, trend_lookbacks=tuple(looks), **kw)

    def __post_init__(self) -> None:
        for name in ("baseline_windows", "level_windows", "min_trend_windows"):
            if getattr(self, name) < 3:
                raise ValueError(f"{name} must be at least 3, got {getattr(self, name)}")
        for name in ("step_z", "cusum_h", "min_rise_r", "min_sigma_r", "bp_step_z"):
            if not getattr(self, name) > 0:
                raise ValueError(f"{name} must be positive, got {getattr(self, name)}")
        if not self.clear_after_s >= 0:
            raise ValueError(f"clear_after_s must be >= 0, got {self.clear_after_s}")
        if self.verify_windows < 1:
            raise ValueError(f"verify_windows must be at least 1, got {self.verify_windows}")
        if not 0 < self.trend_alpha < 1:
            raise ValueError(f"trend_alpha must be in (0, 1), got {self.trend_alpha}")
        try:
            ZoneInfo(self.timezone)
        except (ZoneInfoNotFoundError, ValueError) as exc:
            raise ValueError(f"timezone {self.timezone!r} is not a known zone name") from exc

    def for_branch(self, name: str) -> BranchSettings:
        """The settings of branch *name* (the default ones when not configured)."""
        return self.branches.get(name, self.default_branch)


#: History columns: required first, then optional ones the diagnosis uses when present
#: (`adapters.fit_record.HISTORY_NUMBERS` says what each number is; a store's history has
#: all of `adapters.fit_record.FIT_COLUMNS`, whose ``tail_*`` columns — a step part-way
#: through a window — the diagnosis reads too).
HISTORY_COLUMNS: dict[str, tuple[str, ...]] = {
    "required": ("branch", "window_start", "window_end", "r"),
    "optional": ("identifiable", *HISTORY_NUMBERS),
}
#: Screening counts per window and tag; ``branch`` names the branch the tag belongs to
#: (the header's tags use `DiagnosisSettings.header_name`). ``first_flagged`` (optional)
#: is the time of the first flagged sample.
SCREENING_COLUMNS: tuple[str, ...] = (
    "branch", "window_start", "window_end", "tag", "frozen", "out_of_range", "spikes",
)  # fmt: skip
#: Header mass balance per window: residual = Σ branch flows − total flow [m^3/s] and its
#: combined expanded (95 %) uncertainty [m^3/s]. Optional ``header`` names the group.
BALANCE_COLUMNS: tuple[str, ...] = (
    "window_start", "window_end", "residual_m3s", "uncertainty_m3s",
)  # fmt: skip



@dataclass
class Episodes:
    """The episodes of one condition that comes and goes, window by window.

    Each episode runs from the start of its first window in the condition to the end of
    its last; ``worst`` is the worst value seen in them (the lowest when
    ``lower_is_worse``). Times are UTC.
    """

    spans: list[list[pd.Timestamp]] = field(default_factory=list)
    worst: float = math.nan
    lower_is_worse: bool = True
    active: bool = False

    def hold(self, start: pd.Timestamp, end: pd.Timestamp, value: float = math.nan) -> None:
        """The window [start, end) is in the condition, with *value*."""
        if self.active and self.spans:
            self.spans[-1][1] = end
        else:
            self.spans.append([start, end])
            self.active = True
        if math.isfinite(value):
            worse = (value < self.worst) if self.lower_is_worse else (value > self.worst)
            if not math.isfinite(self.worst) or worse:
                self.worst = value

    def clear(self) -> None:
        """The condition cleared: the current episode is over."""
        self.active = False

    @property
    def last_end(self) -> pd.Timestamp:
        return self.spans[-1][1]

    def gone(self, t: pd.Timestamp, clear_after_s: float) -> bool:
        """Cleared and away for at least *clear_after_s* at time *t*."""
        return bool(self.spans) and not self.active and (
            (t - self.last_end).total_seconds() >= clear_after_s
        )

    def evidence(self, until: pd.Timestamp) -> dict[str, float]:
        """Count, share of the time from the first episode to *until*, hours in the
        condition, first and last episode (UTC seconds since 1970)."""
        inside = sum((b - a).total_seconds() for a, b in self.spans)
        span = (max(until, self.last_end) - self.spans[0][0]).total_seconds()
        return {
            "episodes": float(len(self.spans)),
            "share_of_time": inside / span if span > 0 else 1.0,
            "hours_in_condition": inside / 3600.0,
            "first_episode_start_s": self.spans[0][0].timestamp(),
            "last_episode_start_s": self.spans[-1][0].timestamp(),
            "last_episode_end_s": self.last_end.timestamp(),
        }

    def describe(self, until: pd.Timestamp, timezone: str) -> str:
        """"3 episodes since 2026-03-02, 12 % of the time" (empty for a single one)."""
        if len(self.spans) < 2:
            return ""
        share = self.evidence(until)["share_of_time"]
        first = pd.Timestamp(self.spans[0][0]).tz_convert(timezone)
        return f"{len(self.spans)} episodes since {first:%Y-%m-%d}, {percent(share)} of the time"


def percent(share: float) -> str:
    """A share as a percentage with the digits that keep a small one from reading 0."""
    p = 100.0 * share
    if p >= 10.0 or p == 0.0:
        return f"{p:.0f} %"
    if p >= 1.0:
        return f"{p:.1f} %"
    return f"{p:.2f} %"


def flow_pair(values: Sequence[float], limit_m3s: float, unit: str) -> tuple[list[str], str]:
    """Flows [m^3/s] and their limit [m^3/s] as text in *unit* ("31.5", "30.0"), all with
    the same number of decimals: the fewest (at least one) at which every value that is
    below (above) the limit still reads below (above) it — 31.5 L/min against 30 L/min
    is not "1.9 below 1.8" in m3/h."""
    conv = [float(v) for v in from_si([*values, limit_m3s], unit, "flow")]
    *vals, lim = conv
    for digits in range(1, 7):
        ok = True
        for v, raw in zip(vals, values, strict=True):
            if not (math.isfinite(v) and float(raw) != limit_m3s):
                continue
            a, b = round(v, digits), round(lim, digits)
            if (float(raw) < limit_m3s) != (a < b) or a == b:
                ok = False
                break
        if ok:
            break
    return [f"{v:.{digits}f}" for v in vals], f"{lim:.{digits}f}"


def episode_text(evidence: Mapping[str, Any], *, timezone: str, flow_unit: str = "m3/h") -> str:
    """One line on a finding's episodes for the report and ``status``: "3 episodes, 12 %
    of the time, lowest 55.2 m3/h, last 2026-05-01" ("" when it has no episode figures)."""
    def num(key: str) -> float | None:
        v = evidence.get(key)
        return float(v) if isinstance(v, int | float) and math.isfinite(float(v)) else None

    n, share = num("episodes"), num("share_of_time")
    if n is None or share is None:
        return ""
    bits = [f"{n:.0f} episode{'s' if n != 1 else ''}", f"{percent(share)} of the time"]
    low, qmin = num("lowest_flow_m3s"), num("min_flow_m3s")
    if low is not None and qmin is not None:
        (low_t,), _ = flow_pair([low], qmin, flow_unit)
        bits.append(f"lowest {low_t} {flow_unit}")
    worst = num("worst_residual_m3s")
    if worst is not None:
        (w_t,), _ = flow_pair([abs(worst)], 0.0, flow_unit)
        bits.append(f"worst {'+' if worst > 0 else '-'}{w_t} {flow_unit}")
    last = num("last_episode_start_s")
    if last is not None and n > 1:
        bits.append(f"last {pd.Timestamp(last, unit='s', tz='UTC').tz_convert(timezone):%Y-%m-%d}")
    return ", ".join(bits)
