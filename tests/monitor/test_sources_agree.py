"""The same plant readings through a folder of European-style exports and through a
PostgreSQL table give the same screened data and the same fits (issue: data in).

Invented data: four days of the example site from the simulator, written once as CSV
exports with ';' delimiters, decimal commas and naive local timestamps (as many European
historians export), and once as a long table on the loopback PostgreSQL server.
"""

from __future__ import annotations

import math
from datetime import timedelta
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
import sqlalchemy as sa

from adapters.base import open_store
from adapters.units import from_si
from monitor.analysis.window import analyze_window
from monitor.app.demo import DEMO_START, EXAMPLE_SITE, simulate_site
from monitor.app.ingest import ingest, open_source, read_window
from monitor.app.windows import windows
from monitor.site.config import load_site, parse_site

DAYS = 4


def _european_exports(site: Any, sim: Any, folder: Path) -> None:
    zone = site.timezone
    times = pd.DatetimeIndex(sim.times).tz_localize("UTC").tz_convert(zone).tz_localize(None)
    cols = {tag: np.round(from_si(sim.values[tag], spec.unit, spec.kind), 4)
            for tag, spec in site.tags.items()}
    frame = pd.DataFrame(cols, index=times.strftime("%Y-%m-%d %H:%M:%S"))
    frame.index.name = "timestamp"
    folder.mkdir(parents=True)
    for day, part in frame.groupby(times.date):
        text = part.to_csv(sep=";", decimal=",", lineterminator="\r\n")
        (folder / f"export_{day:%Y%m%d}.csv").write_text(text, encoding="utf-8-sig")


def _long_table(site: Any, sim: Any, url: str, table: str) -> None:
    times = pd.DatetimeIndex(sim.times).tz_localize("UTC")
    parts = [
        pd.DataFrame({"time": times, "tag": tag,
                      "value": np.round(from_si(sim.values[tag], spec.unit, spec.kind), 4)})
        for tag, spec in site.tags.items()
    ]
    engine = sa.create_engine(url)
    with engine.begin() as conn:
        # a historian keeps no row for a sample it did not get (the CSV's empty cell)
        pd.concat(parts).dropna().to_sql(table, conn, index=False, chunksize=20_000)
    engine.dispose()


@pytest.mark.slow
def test_csv_folder_and_postgresql_table_agree(
    tmp_path: Path, postgres_url: str, unique_name: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    import tomllib

    base = tomllib.loads(EXAMPLE_SITE.read_text())
    csv_doc = {**base, "store": {"url": f"sqlite:///{tmp_path / 'csv.db'}"},
               "source": {"kind": "csv", "path": "inbox", "delimiter": ";", "decimal": ",",
                          "settle_seconds": "0 s"}}
    sql_doc = {**base, "store": {"url": f"sqlite:///{tmp_path / 'sql.db'}"},
               "source": {"kind": "sql", "table": unique_name, "url_env": "BW_TEST_SOURCE"}}
    csv_site = parse_site(csv_doc, path=tmp_path / "csv-site.toml")
    sql_site = parse_site(sql_doc, path=tmp_path / "sql-site.toml")
    site = load_site(EXAMPLE_SITE)
    end = DEMO_START + timedelta(days=DAYS)
    sim = simulate_site(site, DEMO_START, end, step_s=300.0, seed=3)
    _european_exports(site, sim, tmp_path / "inbox")
    _long_table(site, sim, postgres_url, unique_name)
    monkeypatch.setenv("BW_TEST_SOURCE", postgres_url)
    try:
        results = []
        for s in (csv_site, sql_site):
            store, source = open_store(s.store_url), open_source(s)
            try:
                summary = ingest(s, store, source)
                assert summary.quarantined == 0
                per_window = []
                for ws, we in windows(DEMO_START, end, s.window, s.timezone):
                    readings = read_window(s, store, source, ws, we)
                    per_window.append((readings, analyze_window(s, readings, ws, we)))
                results.append((summary, per_window))
            finally:
                source.close()
                store.close()
    finally:
        engine = sa.create_engine(postgres_url)
        with engine.begin() as conn:
            conn.exec_driver_sql(f'DROP TABLE IF EXISTS "{unique_name}"')
        engine.dispose()

    (csv_sum, csv_w), (sql_sum, sql_w) = results
    assert csv_sum.stored == sql_sum.stored > 0
    assert len(csv_w) == len(sql_w) == DAYS - 1  # whole local days only
    for (r_csv, a_csv), (r_sql, a_sql) in zip(csv_w, sql_w, strict=True):
        key = ["tag", "time"]
        left = r_csv.sort_values(key).reset_index(drop=True)
        right = r_sql.sort_values(key).reset_index(drop=True)
        pd.testing.assert_frame_equal(left, right, check_exact=False, rtol=1e-12)
        pd.testing.assert_frame_equal(a_csv.screening, a_sql.screening)
        for f_csv, f_sql in zip(a_csv.fits, a_sql.fits, strict=True):
            assert f_csv.status == f_sql.status
            if math.isfinite(f_csv.r):
                assert f_csv.r == pytest.approx(f_sql.r, rel=1e-12)
