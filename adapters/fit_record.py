"""One branch's fit over one analysis window, as one typed record, and a history of them.

`WindowFit` is what `monitor.analysis.window` makes of a branch-window: the main fit (a
`model.fit.FitResult` with the window's conditions) and, where a step came part-way
through the window, `AfterStep`: when it came and the fit of the samples after it. The
record owns the column list of the ``fits`` table (`FIT_FLOATS`, `FIT_COLUMNS`): the
store maps rows from it (`WindowFit.to_row`, `WindowFit.from_row`), the fits CSV is
written from it, and `FitHistory` reads a stored (or foreign) history into the typed
arrays the diagnosis walks.

Units are SI: pressures [Pa gauge], flows [m^3/s], times UTC. A number that was not
measured or not fitted is NaN (NULL in the store).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field, fields
from datetime import datetime
from typing import Any

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from model.robust import USABLE_STATUSES

__all__ = [
    "FIT_COLUMNS",
    "FIT_FLOATS",
    "FIT_SUMS",
    "HISTORY_NUMBERS",
    "AfterStep",
    "FitHistory",
    "FitSums",
    "WindowFit",
    "fits_of",
]

NAN = math.nan
#: The weighted sums of a fit's samples, as the store names them (`FitSums`).
FIT_SUMS: tuple[str, ...] = ("sum_w", "sum_x", "sum_y", "sum_xx", "sum_xy", "sum_yy")
#: The main fit's numbers besides its sums, in the store's column order.
_MAIN = (
    *("r", "r_low", "r_high", "s_pa", "s_low_pa", "s_high_pa"),
    *("flow_min_m3s", "flow_max_m3s", "residual_std_pa", "corr_rs"),
    *("temperature_c", "header_pressure_pa"),
    # added by 0002_window_checks
    *("s_fixed_pa", "flow_span", "mean_flow_m3s", "end_pressure_pa", "residual_autocorr"),
)
#: `AfterStep`'s numbers besides its sums, as the store names them (added by
#: 0004_window_tail).
_AFTER = (
    *("tail_offset_s", "tail_change", "tail_r", "tail_r_low", "tail_r_high", "tail_samples"),
    *("tail_s_pa", "tail_end_pressure_pa"),
)
_AFTER_SUMS = tuple(f"tail_{c}" for c in FIT_SUMS)
#: The ``fits`` table's Double columns, in its order (`adapters.migrations.tables`).
FIT_FLOATS: tuple[str, ...] = (*_MAIN, *FIT_SUMS, *_AFTER, *_AFTER_SUMS)
#: Every column of the ``fits`` table, in its order.
FIT_COLUMNS: tuple[str, ...] = (
    "branch", "window_start", "window_end", *_MAIN[:6], "identifiable", "samples",
    *_MAIN[6:12], "status", "message", "computed_at", *_MAIN[12:], *FIT_SUMS, *_AFTER,
    *_AFTER_SUMS,
)  # fmt: skip
#: The numbers the diagnosis reads of each window besides ``r`` (`FitHistory.numbers`):
#: the state of a window, after a step inside it where there was one. ``bp_sse_static`` and
#: ``bp_sse_resistance`` are not the store's: a foreign history may carry the fit's own
#: comparison of "constant offset" with "offset ∝ Q²" instead of the sums.
HISTORY_NUMBERS: tuple[str, ...] = (
    "r_low", "r_high", "s_pa", "s_fixed_pa", "samples", "mean_flow_m3s",
    "end_pressure_pa", "residual_std_pa", *FIT_SUMS, "bp_sse_static", "bp_sse_resistance",
)  # fmt: skip
#: What of the main fit the state after a step replaces (`FitHistory.of`).
_AFTER_REPLACES: dict[str, str] = {
    "r": "tail_r", "r_low": "tail_r_low", "r_high": "tail_r_high",
    "samples": "tail_samples", "s_pa": "tail_s_pa", "end_pressure_pa": "tail_end_pressure_pa",
    **dict(zip(FIT_SUMS, _AFTER_SUMS, strict=True)),
}  # fmt: skip


def _float(value: Any) -> float:
    """*value* as a float; None, NA and what is not a number become NaN."""
    if value is None or value is pd.NA:
        return NAN
    try:
        return float(value)
    except (TypeError, ValueError):
        return NAN


@dataclass(frozen=True)
class FitSums:
    """Weighted sums over a fit's samples of 1, x, y, x², x·y, y² [-], [Pa], [Pa], [Pa²],
    [Pa²], [Pa²] (``x`` the clean dynamic ΔP, ``y`` = P_s − the known static pressure):
    enough to test any later baseline against "constant offset" and "offset ∝ Q²"
    without the samples (`model.fit.FitResult`)."""

    w: float = NAN
    x: float = NAN
    y: float = NAN
    xx: float = NAN
    xy: float = NAN
    yy: float = NAN

    @classmethod
    def of(cls, source: Any) -> FitSums:
        """The ``sum_*`` attributes of *source* (a `model.fit.FitResult`)."""
        return cls(*(float(getattr(source, c)) for c in FIT_SUMS))

    @classmethod
    def from_row(cls, row: Mapping[str, Any], prefix: str = "") -> FitSums:
        return cls(*(_float(row.get(f"{prefix}{c}")) for c in FIT_SUMS))

    def columns(self, prefix: str = "") -> dict[str, float]:
        """As the store's columns: ``{prefix}sum_w`` … ``{prefix}sum_yy``."""
        return {f"{prefix}{c}": getattr(self, f.name)
                for c, f in zip(FIT_SUMS, fields(self), strict=True)}


@dataclass(frozen=True)
class AfterStep:
    """A step part-way through a window, and the state after it.

    Attributes
    ----------
    offset_s : when the step came, after the window start [s].
    change : the step's size in the signal that showed it (relative change of the
        resistance relation, or a logged end pressure's step [Pa]).
    r, r_low, r_high : the resistance ratio of the samples after the step and its
        interval [-]; NaN when too few samples followed it for a fit of their own.
    samples : samples of that fit (None when there was none).
    s_pa : its fitted back-pressure [Pa] (NaN where not fitted or not identifiable).
    end_pressure_pa : median logged end pressure after the step [Pa] (NaN when none).
    sums : the weighted sums of that fit.
    """

    offset_s: float
    change: float
    r: float = NAN
    r_low: float = NAN
    r_high: float = NAN
    samples: int | None = None
    s_pa: float = NAN
    end_pressure_pa: float = NAN
    sums: FitSums = field(default_factory=FitSums)

    @property
    def fitted(self) -> bool:
        """The samples after the step gave a resistance ratio."""
        return math.isfinite(self.r)

    def columns(self) -> dict[str, Any]:
        return {
            "tail_offset_s": self.offset_s, "tail_change": self.change, "tail_r": self.r,
            "tail_r_low": self.r_low, "tail_r_high": self.r_high,
            "tail_samples": NAN if self.samples is None else float(self.samples),
            "tail_s_pa": self.s_pa, "tail_end_pressure_pa": self.end_pressure_pa,
            **self.sums.columns("tail_"),
        }  # fmt: skip

    @classmethod
    def from_row(cls, row: Mapping[str, Any]) -> AfterStep | None:
        """The step of a stored row; None when the row has none."""
        offset = _float(row.get("tail_offset_s"))
        if not math.isfinite(offset):
            return None
        n = _float(row.get("tail_samples"))
        return cls(
            offset_s=offset, change=_float(row.get("tail_change")),
            r=_float(row.get("tail_r")), r_low=_float(row.get("tail_r_low")),
            r_high=_float(row.get("tail_r_high")),
            samples=int(n) if math.isfinite(n) else None, s_pa=_float(row.get("tail_s_pa")),
            end_pressure_pa=_float(row.get("tail_end_pressure_pa")),
            sums=FitSums.from_row(row, "tail_"),
        )  # fmt: skip


@dataclass(frozen=True)
class WindowFit:
    """The fit of one branch over one analysis window ``[window_start, window_end)``.

    The numbers are `model.fit.FitResult`'s (see there), with the window's conditions:
    ``temperature_c`` and ``header_pressure_pa`` are the means over the fitted samples
    [°C], [Pa]; ``end_pressure_pa`` the median logged end pressure [Pa]. ``identifiable``
    is None where there was no fit to judge. ``after_step`` is the state after a step
    part-way through the window, when the analysis found one. ``computed_at`` is set by
    the store when left None.
    """

    branch: str
    window_start: datetime
    window_end: datetime
    status: str
    message: str = ""
    samples: int = 0
    identifiable: bool | None = None
    r: float = NAN
    r_low: float = NAN
    r_high: float = NAN
    s_pa: float = NAN
    s_low_pa: float = NAN
    s_high_pa: float = NAN
    s_fixed_pa: float = NAN
    flow_min_m3s: float = NAN
    flow_max_m3s: float = NAN
    flow_span: float = NAN
    mean_flow_m3s: float = NAN
    residual_std_pa: float = NAN
    residual_autocorr: float = NAN
    corr_rs: float = NAN
    temperature_c: float = NAN
    header_pressure_pa: float = NAN
    end_pressure_pa: float = NAN
    sums: FitSums = field(default_factory=FitSums)
    after_step: AfterStep | None = None
    computed_at: datetime | None = None

    @property
    def counts(self) -> bool:
        """The window gave a fit the diagnosis may read (status ``ok`` or
        ``not_identifiable``): the "usable" of the run summaries."""
        return self.status in USABLE_STATUSES

    def to_row(self) -> dict[str, Any]:
        """The store's row: every column of `FIT_COLUMNS`, in its order."""
        row: dict[str, Any] = {
            "branch": self.branch, "window_start": self.window_start,
            "window_end": self.window_end, "identifiable": self.identifiable,
            "samples": int(self.samples), "status": self.status, "message": self.message,
            "computed_at": self.computed_at,
            **{c: getattr(self, c) for c in _MAIN},
            **self.sums.columns(),
        }  # fmt: skip
        row.update(self.after_step.columns() if self.after_step is not None
                   else dict.fromkeys((*_AFTER, *_AFTER_SUMS), NAN))
        return {c: row[c] for c in FIT_COLUMNS}

    @classmethod
    def from_row(cls, row: Mapping[str, Any]) -> WindowFit:
        """The record of a stored row (or a row of a fits frame)."""
        ident = row.get("identifiable")
        samples = _float(row.get("samples"))
        computed = row.get("computed_at")
        return cls(
            branch=str(row["branch"]), window_start=pd.Timestamp(row["window_start"]),
            window_end=pd.Timestamp(row["window_end"]), status=str(row["status"]),
            message=str(row.get("message") or ""),
            samples=int(samples) if math.isfinite(samples) else 0,
            identifiable=None if pd.isna(ident) else bool(ident),
            **{c: _float(row.get(c)) for c in _MAIN},
            sums=FitSums.from_row(row), after_step=AfterStep.from_row(row),
            computed_at=None if computed is None or pd.isna(computed)
            else pd.Timestamp(computed),
        )  # fmt: skip


def fits_of(frame: pd.DataFrame) -> list[WindowFit]:
    """The records of a fits frame (`FIT_COLUMNS`, as `read_fits` gives), in row order."""
    return [WindowFit.from_row({str(k): v for k, v in row.items()})
            for row in frame.to_dict("records")]


def _numbers(frame: pd.DataFrame, name: str) -> NDArray[np.float64]:
    """Column *name* of *frame* as floats (NaN where missing or not a number)."""
    if name in frame.columns:
        return np.asarray(pd.to_numeric(frame[name], errors="coerce"), dtype=float)
    return np.full(len(frame), np.nan)


@dataclass(frozen=True)
class FitHistory:
    """Branch-windows as typed arrays in row order: what the diagnosis walks.

    Each window is read as its state: where a step came part-way through it
    (`AfterStep`), as the state after the step, dated to the step (``change_at``; the
    window start elsewhere). A step that left too few samples for a fit of their own
    still carries its logged end pressure.

    Attributes
    ----------
    branch : branch names.
    window_start, window_end : the windows (UTC).
    change_at : when each window's state began (UTC, whole seconds).
    identifiable : the back-pressure was known (not fitted) or fitted apart from ``r``.
    r : the resistance ratio [-].
    numbers : the numbers of `HISTORY_NUMBERS` [SI], NaN where absent.
    """

    branch: NDArray[np.object_]
    window_start: pd.DatetimeIndex
    window_end: pd.DatetimeIndex
    change_at: pd.DatetimeIndex
    identifiable: NDArray[np.bool_]
    r: NDArray[np.float64]
    numbers: dict[str, NDArray[np.float64]]

    @classmethod
    def of(cls, frame: pd.DataFrame) -> FitHistory:
        """The history of a fits frame (`FIT_COLUMNS`, or a foreign one with at least
        branch, window_start, window_end and r; any of `HISTORY_NUMBERS` it lacks is NaN)."""
        n = len(frame)
        numbers = {c: _numbers(frame, c) for c in ("r", *HISTORY_NUMBERS)}
        has_ident = "identifiable" in frame.columns
        if has_ident:
            ident = frame["identifiable"].astype("boolean").fillna(False).to_numpy(bool)
        else:
            ident = np.zeros(n, dtype=bool)
        start = pd.DatetimeIndex(frame["window_start"])
        offset = _numbers(frame, "tail_offset_s")
        step = np.isfinite(offset)
        if step.any():
            fitted = step & np.isfinite(_numbers(frame, "tail_r"))
            # a known termination in the whole window (not fitted) is known in the tail
            known = ident & ~np.isfinite(numbers["s_pa"])
            for col, src in _AFTER_REPLACES.items():
                if src not in frame.columns:
                    continue
                value = _numbers(frame, src)
                rows = step if col == "end_pressure_pa" else fitted
                # a tail's s is NaN where it was not identifiable; other NaNs: not logged
                rows = rows if col == "s_pa" else rows & np.isfinite(value)
                numbers[col] = np.where(rows, value, numbers[col])
            if has_ident:
                ident = np.where(fitted, known | np.isfinite(numbers["s_pa"]), ident)
        change_at = (start + pd.to_timedelta(np.where(step, offset, 0.0), unit="s")).floor("s")
        return cls(
            branch=frame["branch"].to_numpy(object), window_start=start,
            window_end=pd.DatetimeIndex(frame["window_end"]),
            change_at=pd.DatetimeIndex(change_at), identifiable=np.asarray(ident, bool),
            r=numbers.pop("r"), numbers=numbers,
        )  # fmt: skip

    def __len__(self) -> int:
        return len(self.branch)

    def take(self, rows: Any) -> FitHistory:
        """The windows at positions *rows* (integers), in that order."""
        idx = np.asarray(rows, dtype=np.intp)
        return FitHistory(
            self.branch[idx], self.window_start[idx], self.window_end[idx],
            self.change_at[idx], self.identifiable[idx], self.r[idx],
            {c: v[idx] for c, v in self.numbers.items()},
        )
