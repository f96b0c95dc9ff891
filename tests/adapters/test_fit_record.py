"""adapters.fit_record: the typed fit of a branch-window, its store row, and the history
the diagnosis walks (`FitHistory`: a window with a step inside it is read as the state
after the step, dated to the step).

Invented numbers; the rules checked are the product's (adapters/fit_record.py).
"""

from __future__ import annotations

from collections.abc import Iterable
from typing import Any

import numpy as np
import pandas as pd
import pytest

from adapters.fit_record import (
    FIT_COLUMNS,
    AfterStep,
    FitHistory,
    FitSums,
    WindowFit,
    fits_of,
)
from adapters.migrations.tables import fits_t

T0 = pd.Timestamp("2026-03-02", tz="UTC")


def fits_frame(fits: Iterable[WindowFit]) -> pd.DataFrame:
    """*fits* as the store's frame would hold them (`FIT_COLUMNS`)."""
    return pd.DataFrame([f.to_row() for f in fits], columns=list(FIT_COLUMNS))


def _history(n: int = 3) -> pd.DataFrame:
    start = T0 + pd.to_timedelta(np.arange(n), unit="D")
    return pd.DataFrame({
        "branch": "C3-compressor",
        "window_start": start,
        "window_end": start + pd.Timedelta(days=1),
        "r": [1.00, 1.01, 1.02][:n],
        "r_low": [0.99, 1.00, 1.01][:n],
        "r_high": [1.01, 1.02, 1.03][:n],
        "samples": [140.0, 141.0, 142.0][:n],
        "s_pa": [4.0e4, 4.1e4, 4.2e4][:n],
        "end_pressure_pa": [4.0e4, 4.0e4, 4.0e4][:n],
        "identifiable": [True, True, True][:n],
        "sum_x": [10.0, 11.0, 12.0][:n],
    })  # fmt: skip


def _at(history: FitHistory, row: int, col: str) -> Any:
    if col in ("r", "change_at", "window_start", "identifiable"):
        return getattr(history, col)[row]
    return history.numbers[col][row]


def _with_tail(hist: pd.DataFrame, row: int, offset_s: float, **tail: float) -> pd.DataFrame:
    hist = hist.copy()
    for col in FIT_COLUMNS:
        if col.startswith("tail_"):
            hist[col] = np.nan
    hist.loc[row, "tail_offset_s"] = offset_s
    for col, value in tail.items():
        hist.loc[row, col] = value
    return hist


def test_history_without_tails_is_unchanged_and_dated_by_window_start() -> None:
    hist = _history()
    before = hist.copy()
    out = FitHistory.of(hist)
    assert list(out.change_at) == list(hist["window_start"])
    assert list(out.r) == list(hist["r"])
    for col in ("r_low", "samples", "s_pa", "sum_x"):
        assert list(out.numbers[col]) == list(hist[col])
    assert np.isnan(out.numbers["sum_xx"]).all()  # a column it lacks reads as NaN
    pd.testing.assert_frame_equal(hist, before)  # the caller's frame is left alone


def test_a_window_with_a_tail_is_read_as_its_tail_and_dated_to_the_step() -> None:
    # a step 9 h 30 min into the second window: the fit after it has r 1.48
    hist = _with_tail(_history(), 1, 9.5 * 3600 + 0.7, tail_r=1.48, tail_r_low=1.46,
                      tail_r_high=1.50, tail_samples=80.0, tail_s_pa=4.1e4, tail_sum_x=6.0)
    out = FitHistory.of(hist)
    assert [_at(out, 1, c) for c in ("r", "r_low", "r_high", "samples", "sum_x")] == [
        1.48, 1.46, 1.50, 80.0, 6.0]
    # dated to the step, to the second
    assert _at(out, 1, "change_at") == T0 + pd.Timedelta(days=1, hours=9.5)
    # the windows without a tail keep their own fit and start
    for j in (0, 2):
        assert _at(out, j, "r") == hist["r"].iloc[j]
        assert _at(out, j, "change_at") == hist["window_start"].iloc[j]


def test_a_tail_with_only_a_logged_end_pressure_moves_that_alone() -> None:
    # a back-pressure step too late in the window for a fit after it: the logged end
    # pressure of the tail is read, the window's r stays the whole window's
    hist = _with_tail(_history(), 2, 22 * 3600.0, tail_end_pressure_pa=7.0e4)
    out = FitHistory.of(hist)
    assert _at(out, 2, "end_pressure_pa") == 7.0e4
    assert _at(out, 2, "r") == hist["r"].iloc[2]
    assert _at(out, 2, "change_at") == T0 + pd.Timedelta(days=2, hours=22)


def test_a_tail_whose_back_pressure_was_not_identifiable_says_so() -> None:
    hist = _with_tail(_history(), 1, 3600.0, tail_r=1.2, tail_s_pa=np.nan)
    out = FitHistory.of(hist)
    assert np.isnan(_at(out, 1, "s_pa"))  # the whole window's s does not stand for the tail
    assert not bool(_at(out, 1, "identifiable"))
    assert _at(out, 0, "s_pa") == pytest.approx(4.0e4)


def test_history_reads_missing_and_text_as_nan() -> None:
    hist = _history().astype({"r_low": object})
    hist.loc[0, "r_low"], hist.loc[1, "r_low"] = "0.98", "n/a"
    out = FitHistory.of(hist)
    assert np.array_equal(out.numbers["r_low"], [0.98, np.nan, 1.01], equal_nan=True)
    assert out.numbers["r_low"].dtype == np.float64


def test_take_slices_every_array_alike() -> None:
    out = FitHistory.of(_with_tail(_history(), 1, 3600.0, tail_r=1.3)).take([2, 1])
    assert list(out.r) == [1.02, 1.3]
    assert list(out.change_at) == [T0 + pd.Timedelta(days=2), T0 + pd.Timedelta(days=1, hours=1)]
    assert len(out) == 2 and list(out.numbers["sum_x"]) == [12.0, 11.0]


def _record(**kw: Any) -> WindowFit:
    base: dict[str, Any] = {
        "branch": "C3-compressor", "window_start": T0, "window_end": T0 + pd.Timedelta(days=1),
        "status": "ok", "message": "r = 1.020 ± 0.010 from 140 samples", "samples": 140,
        "identifiable": True, "r": 1.02, "r_low": 1.01, "r_high": 1.03, "s_pa": 4.1e4,
        "mean_flow_m3s": 0.031, "sums": FitSums(140.0, 1.0e6, 1.1e6, 9.0e9, 9.5e9, 1.0e10),
    }  # fmt: skip
    return WindowFit(**{**base, **kw})


def test_the_record_owns_the_fits_tables_columns() -> None:
    assert tuple(c.name for c in fits_t.columns) == FIT_COLUMNS
    assert tuple(_record().to_row()) == FIT_COLUMNS


@pytest.mark.parametrize("after", [
    None,
    AfterStep(offset_s=5400.0, change=0.21, r=1.25, r_low=1.22, r_high=1.28, samples=60,
              s_pa=np.nan, end_pressure_pa=np.nan, sums=FitSums(60.0, 1.0, 2.0, 3.0, 4.0, 5.0)),
    AfterStep(offset_s=79200.0, change=2.0e4, end_pressure_pa=6.0e4),
])  # fmt: skip
def test_a_record_survives_its_row_and_its_frame(after: AfterStep | None) -> None:
    fit = _record(after_step=after, end_pressure_pa=4.0e4)
    (back,) = fits_of(fits_frame([fit]))
    assert back.after_step == after if after is None else _same(back.after_step, after)
    assert back.sums == fit.sums and back.r == fit.r and back.samples == 140
    assert back.identifiable is True and back.status == "ok"
    assert pd.Timestamp(back.window_start) == T0
    # the history reads the step's state from the same row
    hist = FitHistory.of(fits_frame([fit]))
    assert hist.r[0] == (after.r if after is not None and after.fitted else fit.r)


def _same(got: AfterStep | None, want: AfterStep) -> bool:
    assert got is not None
    for name in ("offset_s", "change", "r", "r_low", "r_high", "s_pa", "end_pressure_pa"):
        a, b = getattr(got, name), getattr(want, name)
        assert (np.isnan(a) and np.isnan(b)) or a == b, name
    assert got.samples == want.samples
    return got.sums == want.sums or all(
        np.isnan(getattr(got.sums, k)) and np.isnan(getattr(want.sums, k))
        for k in ("w", "x", "y", "xx", "xy", "yy"))


def test_a_window_without_a_fit_keeps_identifiable_unknown() -> None:
    fit = WindowFit(branch="C3-compressor", window_start=T0,
                    window_end=T0 + pd.Timedelta(days=1), status="no_data",
                    message="no readings of the header pressure PT-101 in this window")
    (back,) = fits_of(fits_frame([fit]))
    assert back.identifiable is None and back.samples == 0 and np.isnan(back.r)
    assert not back.counts and _record().counts
