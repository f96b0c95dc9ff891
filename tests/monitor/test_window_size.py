"""A changed [analysis] window: fits of the old size are kept but not read (issue 12).

The demo site (invented data, tests/monitor/small_site.py): two days analysed in daily
windows, then the window set to 6 hours and the same days analysed again.
"""

from __future__ import annotations

import csv
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pandas as pd
import pytest

from adapters.base import open_store
from monitor.app.cli import main
from monitor.app.windows import current_fits
from monitor.site.config import load_site
from tests.monitor.small_site import copy_site, ingested_site


@pytest.fixture(scope="module")
def built(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return ingested_site(tmp_path_factory.mktemp("window"))


def test_fits_of_another_window_size_are_not_mixed_in(built: Path, tmp_path: Path) -> None:
    site_file, _ = copy_site(built, tmp_path / "s")
    day = ["--from", "2026-04-01", "--to", "2026-04-03", "--quiet"]
    assert main(["analyze", str(site_file), *day]) == 0
    site_file.write_text(site_file.read_text().replace('window = "1 day"', 'window = "6 h"'))
    out = tmp_path / "fits.csv"
    assert main(["analyze", str(site_file), *day, "--fits", str(out)]) == 0
    site = load_site(site_file)
    store = open_store(site.store_url)
    try:
        every = store.read_fits()
    finally:
        store.close()
    lengths = (every["window_end"] - every["window_start"]).dt.total_seconds() / 3600
    assert {6.0} < set(lengths.round(3))  # both sizes are kept in the store ...
    assert set(((current_fits(site, every)["window_end"] - current_fits(site, every)[
        "window_start"]).dt.total_seconds() / 3600).round(3)) == {6.0}  # ... one is read
    with out.open() as fh:
        rows = list(csv.DictReader(fh))
    spans = {(pd.Timestamp(r["window_end"]) - pd.Timestamp(r["window_start"])) for r in rows}
    assert spans == {pd.Timedelta(hours=6)}  # the export holds the present size only


def test_a_daylight_saving_day_is_a_day() -> None:
    # windows of whole days are local days: 23 h on the spring-forward day (EU: last
    # Sunday of March, Directive 2000/84/EC)
    import tomllib

    from monitor.site.config import parse_site

    doc = tomllib.loads((Path(__file__).resolve().parents[2] / "config" /
                         "example-site.toml").read_text())
    site = parse_site(doc, path="site.toml")
    a = datetime(2026, 3, 28, 23, tzinfo=UTC)
    fits = pd.DataFrame({"branch": ["B1", "B1", "B1"],
                         "window_start": [a - timedelta(hours=24), a, a + timedelta(hours=23)],
                         "window_end": [a, a + timedelta(hours=23), a + timedelta(hours=29)]})
    assert len(current_fits(site, fits)) == 2
