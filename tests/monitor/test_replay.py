"""monitor.replay on its own: how a window with a step inside it is read (`read_tails`)
and how optional columns are read as numbers (`numeric`).

The replay of whole histories is tested through `monitor.diagnose` in
tests/monitor/test_diagnose.py (it decides at each window with only the data up to it:
`test_incremental_runs_agree`). Invented numbers; the rule checked is the product's (a
window with a tail is read as its tail, dated to the step: monitor/replay.py).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
import pytest

from monitor.findings import TAIL_COLUMNS
from monitor.replay import numeric, read_tails

T0 = pd.Timestamp("2026-03-02", tz="UTC")


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


def _at(frame: pd.DataFrame, row: int, col: str) -> Any:
    return frame[col].iloc[row]


def _with_tail(hist: pd.DataFrame, row: int, offset_s: float, **tail: float) -> pd.DataFrame:
    hist = hist.copy()
    for col in ["tail_offset_s", *TAIL_COLUMNS.values()]:
        hist[col] = np.nan
    hist.loc[row, "tail_offset_s"] = offset_s
    for col, value in tail.items():
        hist.loc[row, col] = value
    return hist


def test_history_without_tails_is_unchanged_and_dated_by_window_start() -> None:
    hist = _history()
    out = read_tails(hist)
    assert list(out["change_at"]) == list(hist["window_start"])
    pd.testing.assert_frame_equal(out.drop(columns="change_at"), hist)
    assert "change_at" not in hist.columns  # the caller's frame is left alone


def test_a_window_with_a_tail_is_read_as_its_tail_and_dated_to_the_step() -> None:
    # a step 9 h 30 min into the second window: the fit after it has r 1.48
    hist = _with_tail(_history(), 1, 9.5 * 3600 + 0.7, tail_r=1.48, tail_r_low=1.46,
                      tail_r_high=1.50, tail_samples=80.0, tail_s_pa=4.1e4, tail_sum_x=6.0)
    out = read_tails(hist)
    assert [_at(out, 1, c) for c in ("r", "r_low", "r_high", "samples", "sum_x")] == [
        1.48, 1.46, 1.50, 80.0, 6.0]
    # dated to the step, to the second
    assert _at(out, 1, "change_at") == T0 + pd.Timedelta(days=1, hours=9.5)
    # the windows without a tail keep their own fit and start
    for j in (0, 2):
        assert _at(out, j, "r") == _at(hist, j, "r")
        assert _at(out, j, "change_at") == _at(hist, j, "window_start")


def test_a_tail_with_only_a_logged_end_pressure_moves_that_alone() -> None:
    # a back-pressure step too late in the window for a fit after it: the logged end
    # pressure of the tail is read, the window's r stays the whole window's
    hist = _with_tail(_history(), 2, 22 * 3600.0, tail_end_pressure_pa=7.0e4)
    out = read_tails(hist)
    assert _at(out, 2, "end_pressure_pa") == 7.0e4
    assert _at(out, 2, "r") == _at(hist, 2, "r")
    assert _at(out, 2, "change_at") == T0 + pd.Timedelta(days=2, hours=22)


def test_a_tail_whose_back_pressure_was_not_identifiable_says_so() -> None:
    hist = _with_tail(_history(), 1, 3600.0, tail_r=1.2, tail_s_pa=np.nan)
    out = read_tails(hist)
    assert np.isnan(_at(out, 1, "s_pa"))  # the whole window's s does not stand for the tail
    assert not bool(_at(out, 1, "identifiable"))
    assert _at(out, 0, "s_pa") == pytest.approx(4.0e4)


def test_numeric_reads_missing_and_text_as_nan() -> None:
    frame = pd.DataFrame({"a": ["1.5", None, "n/a"], "b": [1, 2, 3]})
    assert np.array_equal(numeric(frame, "a"), [1.5, np.nan, np.nan], equal_nan=True)
    assert numeric(frame, "b").dtype == np.float64
    assert np.isnan(numeric(frame, "not there")).all() and len(numeric(frame, "x")) == 3
