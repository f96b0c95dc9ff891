"""A fleet's shared PostgreSQL store: every site's results in a schema of its own, named
by the site's key; `branchwatch fleet` (one process and ``--executor dask``) reads and
writes there instead of the site files' own stores, and ranks both sites' branches.

Invented data: the example site (config/example-site.toml) twice, under two site names,
simulated for 3 days at 10-minute steps from CSV exports ingested into each site's
schema; the schemas get unique names (the `schema_pair` fixture) and are dropped at the
end. The cluster: `distributed.LocalCluster` with two single-threaded worker processes.
"""

from __future__ import annotations

import json
import logging
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest

from adapters.store import SqlStore
from monitor.app.cli import main
from monitor.app.fleet import load_fleet
from monitor.app.ingest import ingest, open_source
from monitor.site.config import load_site
from tests.monitor.small_site import example_site

START = datetime(2026, 5, 3, 22, tzinfo=UTC)  # local midnight, Europe/Berlin (CEST)
END = START + timedelta(days=3)
SPAN = ["--from", START.isoformat(), "--to", END.isoformat()]


@pytest.fixture
def shared_fleet(tmp_path: Path, postgres_url: str, schema_pair: list[str]) -> Path:
    """A fleet file of two sites sharing the test database, their exports ingested into
    their schemas (`schema_pair`: dropped afterwards)."""
    keys = schema_pair
    example_site(tmp_path / "a", "Plant A", START, END, seed=3)
    example_site(tmp_path / "b", "Plant B", START, END, seed=4)
    fleet = tmp_path / "fleet.toml"
    fleet.write_text(f'[fleet]\nname = "Shared"\nreport = "out/fleet.html"\n'
                     f'[store]\nurl = "{postgres_url}"\n'
                     f'[[site]]\nfile = "a/site.toml"\nkey = "{keys[0]}"\n'
                     f'[[site]]\nfile = "b/site.toml"\nkey = "{keys[1]}"\n')
    for folder, key in zip("ab", keys, strict=True):
        site = load_site(tmp_path / folder / "site.toml")
        store = SqlStore(postgres_url, schema=key)
        ingest(site, store, open_source(site))
        store.close()
    return fleet


def _fits_by_schema(postgres_url: str, keys: tuple[str, ...]) -> dict[str, int]:
    out = {}
    for key in keys:
        store = SqlStore(postgres_url, schema=key)
        out[key] = len(store.read_fits())
        store.close()
    return out


def _check_run(fleet_file: Path, postgres_url: str, out: str,
               caplog: pytest.LogCaptureFixture) -> None:
    fleet = load_fleet(fleet_file)
    ranking = json.loads(out)
    assert {r["site"] for r in ranking} == {"Plant A", "Plant B"}
    assert len(ranking) == 2 * len(load_site(fleet.sites[0]).branches)
    # three whole local days for each of six branches, in each site's own schema
    assert _fits_by_schema(postgres_url, fleet.keys) == {k: 18 for k in fleet.keys}
    # the site files' own SQLite stores were not used
    assert not any((p.parent / "var").exists() for p in fleet.sites)
    said = [r.getMessage() for r in caplog.records if "shared store" in r.getMessage()]
    assert said == [f"Plant {x}: results in schema {k} of the fleet's shared store (the "
                    "site file's own [store] is not used in a fleet run)"
                    for x, k in zip("AB", fleet.keys, strict=True)]


@pytest.mark.server
def test_a_fleet_run_keeps_each_site_in_its_own_schema(
    shared_fleet: Path, postgres_url: str, capsys: pytest.CaptureFixture[str],
    caplog: pytest.LogCaptureFixture,
) -> None:
    with caplog.at_level(logging.INFO, logger="monitor.app.cli_fleet"):
        assert main(["fleet", str(shared_fleet), *SPAN, "--quiet", "--json"]) == 0
    _check_run(shared_fleet, postgres_url, capsys.readouterr().out, caplog)


@pytest.mark.server
def test_a_fleet_run_on_a_cluster_uses_the_shared_store(
    shared_fleet: Path, postgres_url: str, capsys: pytest.CaptureFixture[str],
    caplog: pytest.LogCaptureFixture,
) -> None:
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=":0") as cluster, \
            caplog.at_level(logging.INFO, logger="monitor.app.cli_fleet"):
        assert main(["fleet", str(shared_fleet), *SPAN, "--executor", "dask", "--scheduler",
                     cluster.scheduler_address, "--quiet", "--json"]) == 0
    _check_run(shared_fleet, postgres_url, capsys.readouterr().out, caplog)
