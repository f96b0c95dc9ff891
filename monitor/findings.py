"""What the diagnosis reports and what it reads: findings, thresholds, input columns.

`Finding` is one diagnosed change of one branch; `DiagnosisSettings` and `BranchSettings`
hold the thresholds; the ``*_COLUMNS`` describe the frames `monitor.diagnose.diagnose`
takes. Everything here is plain data, shared by `monitor.diagnose` (the whole site) and
`monitor.replay` (one branch's history).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from datetime import datetime
from typing import Any
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

import pandas as pd

__all__ = [
    "BALANCE_COLUMNS",
    "CHECKED_BY_FITS",
    "END_BY_EVENT",
    "EVENT_WORDS",
    "HISTORY_COLUMNS",
    "KINDS",
    "SCREENING_COLUMNS",
    "TAIL_COLUMNS",
    "BranchSettings",
    "DiagnosisSettings",
    "Finding",
]

KINDS: tuple[str, ...] = (
    "fouling", "restriction", "back_pressure", "low_flow", "instrument", "imbalance",
    "backflow_hazard",
)  # fmt: skip
#: Which open findings a maintenance event ends. Those in `CHECKED_BY_FITS` end only when
#: the fits after the event show the resistance ratio back down (`monitor.replay`).
END_BY_EVENT: dict[str, frozenset[str]] = {
    "cleaned": frozenset({"fouling", "restriction"}),
    "valve_set": frozenset({"restriction", "back_pressure"}),
    "meter_calibrated": frozenset({"instrument"}),
}
#: Findings of a raised resistance ratio: an event ends them only when r fell after it.
CHECKED_BY_FITS: frozenset[str] = frozenset({"fouling", "restriction"})
#: How the messages name the work of an event kind.
EVENT_WORDS: dict[str, str] = {"cleaned": "cleaning", "valve_set": "valve setting"}


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
    """

    cleaning_limit_r: float = 1.5
    min_flow_m3s: float | None = None
    commissioning: tuple[datetime, datetime] | None = None

    def __post_init__(self) -> None:
        if not self.cleaning_limit_r > 1.0:
            raise ValueError(f"cleaning_limit_r must be > 1, got {self.cleaning_limit_r}")
        if self.min_flow_m3s is not None and not self.min_flow_m3s >= 0:
            raise ValueError(f"min_flow_m3s must be >= 0, got {self.min_flow_m3s}")


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

    def __post_init__(self) -> None:
        for name in ("baseline_windows", "level_windows", "min_trend_windows"):
            if getattr(self, name) < 3:
                raise ValueError(f"{name} must be at least 3, got {getattr(self, name)}")
        for name in ("step_z", "cusum_h", "min_rise_r", "min_sigma_r", "bp_step_z"):
            if not getattr(self, name) > 0:
                raise ValueError(f"{name} must be positive, got {getattr(self, name)}")
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


#: History columns: required first, then optional ones the diagnosis uses when present.
#: ``sum_w, sum_x, sum_y, sum_xx, sum_xy, sum_yy`` are the weighted sums over the samples
#: of the window's fit (``x`` = clean dynamic ΔP [Pa], ``y`` = P_s − P_static,known [Pa],
#: weights [-]); from them the diagnosis compares "constant offset" with "offset ∝ Q²"
#: against its own baseline. Without them it uses ``bp_sse_static`` and
#: ``bp_sse_resistance`` (the same comparison made by the fit against its baseline).
HISTORY_COLUMNS: dict[str, tuple[str, ...]] = {
    "required": ("branch", "window_start", "window_end", "r"),
    "optional": (
        "r_low", "r_high", "s_pa", "s_fixed_pa", "identifiable", "samples",
        "mean_flow_m3s", "end_pressure_pa", "residual_std_pa",
        "sum_w", "sum_x", "sum_y", "sum_xx", "sum_xy", "sum_yy",
        "bp_sse_static", "bp_sse_resistance",
    ),
}  # fmt: skip
#: A window's tail (optional): where a step part-way through it came [s after the window
#: start] and the fit of the samples after it (`monitor.analysis`). The diagnosis reads
#: such a window as its tail — the new state — so the step is named in the window it came
#: in, and dated to the step itself.
TAIL_COLUMNS: dict[str, str] = {
    "r": "tail_r", "r_low": "tail_r_low", "r_high": "tail_r_high",
    "samples": "tail_samples", "s_pa": "tail_s_pa", "end_pressure_pa": "tail_end_pressure_pa",
    **{c: f"tail_{c}" for c in ("sum_w", "sum_x", "sum_y", "sum_xx", "sum_xy", "sum_yy")},
}  # fmt: skip
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

