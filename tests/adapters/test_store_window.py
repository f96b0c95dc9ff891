"""One analysis window's results go into the store together and come back the same."""

from __future__ import annotations

import math
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pandas as pd
import pytest

from adapters.base import open_store
from adapters.fit_record import FitSums, WindowFit

W0 = datetime(2026, 6, 1, 22, tzinfo=UTC)
W1 = W0 + timedelta(days=1)


def _window(r: float) -> dict[str, object]:
    fits = [WindowFit(
        branch="B1", window_start=W0, window_end=W1, r=r, r_low=r - 0.01,
        r_high=r + 0.01, samples=1200, status="ok", sums=FitSums(w=1200.0, xy=3.5e12),
        mean_flow_m3s=0.04, end_pressure_pa=6.1e4,
    )]
    screening = pd.DataFrame({
        "branch": ["B1", "header"], "window_start": [W0, W0], "window_end": [W1, W1],
        "tag": ["FT-110", "PT-100"], "frozen": [12, 0], "out_of_range": [0, 1],
        "spikes": [3, 0], "samples": [1440, 1440],
    })
    balance = {"window_start": W0, "window_end": W1, "residual_m3s": 1e-4,
               "uncertainty_m3s": 2e-3, "samples": 1300}
    health = pd.DataFrame({"tag": ["FT-110"], "day": [pd.Timestamp(W0).floor("D")],
                           "flag": ["frozen"], "count": [12]})
    return {"fits": fits, "screening": screening, "balance": balance, "health": health}


def _roundtrip(url: str) -> None:
    store = open_store(url)
    try:
        store.store_window(**_window(1.20))  # type: ignore[arg-type]
        store.store_window(**_window(1.25))  # type: ignore[arg-type]  # same window again
        fits = store.read_fits()
        assert len(fits) == 1 and fits["r"].iloc[0] == pytest.approx(1.25)
        assert fits["sum_xy"].iloc[0] == pytest.approx(3.5e12)
        assert fits["end_pressure_pa"].iloc[0] == pytest.approx(6.1e4)
        assert math.isnan(fits["sum_yy"].iloc[0])
        checks = store.read_screening()
        assert sorted(checks["tag"]) == ["FT-110", "PT-100"]
        assert int(checks.loc[checks["tag"] == "FT-110", "frozen"].iloc[0]) == 12
        assert checks["window_start"].iloc[0] == pd.Timestamp(W0)
        bal = store.read_balance(end=W1)
        assert len(bal) == 1 and bal["uncertainty_m3s"].iloc[0] == pytest.approx(2e-3)
        assert store.read_balance(start=W1).empty
    finally:
        store.close()


def test_store_window_sqlite(tmp_path: Path) -> None:
    _roundtrip(f"sqlite:///{tmp_path / 'bw.db'}")


def test_store_window_postgresql(postgres_url: str, unique_name: str) -> None:
    import sqlalchemy as sa

    engine = sa.create_engine(postgres_url)
    with engine.begin() as conn:
        conn.exec_driver_sql(f'CREATE SCHEMA "{unique_name}"')
    try:
        _roundtrip(postgres_url + f"?options=-csearch_path%3D{unique_name}")
    finally:
        with engine.begin() as conn:
            conn.exec_driver_sql(f'DROP SCHEMA "{unique_name}" CASCADE')
        engine.dispose()
