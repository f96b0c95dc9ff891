"""A site file that names its schema (``[store] schema``): the site's own commands
(`ingest`, `analyze`, `status`) keep its results in that schema of a PostgreSQL store,
and a fleet over that store as its shared store finds them there, the schema being the
site's key.

Invented data: the example site (config/example-site.toml) twice, under two site names,
simulated for 3 days at 10-minute steps in 2029 (a span no other test writes, so rows of
it in the public schema could only come from here); the schemas get unique names (the
`schema_pair` fixture) and are dropped at the end.
"""

from __future__ import annotations

import json
import logging
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest
import sqlalchemy as sa

from adapters.store import SqlStore
from monitor.app.cli import main
from monitor.app.fleet import load_fleet
from tests.monitor.small_site import example_site

START = datetime(2029, 5, 6, 22, tzinfo=UTC)  # local midnight, Europe/Berlin (CEST)
END = START + timedelta(days=3)
SPAN = ["--from", START.isoformat(), "--to", END.isoformat()]


def _count(conn: sa.Connection, schema: str, table: str, column: str) -> int:
    """Rows of *table* in *schema* within [START, END) of *column*; 0 without the table."""
    if not sa.inspect(conn).has_table(table, schema=schema):
        return 0
    return int(conn.execute(sa.text(
        f'SELECT count(*) FROM "{schema}"."{table}" WHERE "{column}" >= :a AND "{column}" < :b'
    ), {"a": START, "b": END}).scalar_one())


@pytest.mark.server
def test_a_sites_own_commands_and_the_fleet_use_its_schema(
    tmp_path: Path, postgres_url: str, schema_pair: list[str],
    capsys: pytest.CaptureFixture[str], caplog: pytest.LogCaptureFixture,
) -> None:
    schemas = schema_pair
    a = example_site(tmp_path / "a", "Plant A", START, END, seed=3,
                     store=(postgres_url, schemas[0]))
    example_site(tmp_path / "b", "Plant B", START, END, seed=4, store=(postgres_url, schemas[1]))
    assert main(["ingest", str(a)]) == 0
    assert main(["analyze", str(a), *SPAN, "--quiet"]) == 0
    capsys.readouterr()
    assert main(["status", str(a), "--json"]) == 0
    status = json.loads(capsys.readouterr().out)
    # status reads the schema analyze wrote: every branch has a fit
    assert status["site"] == "Plant A" and len(status["fits_last"]) == 6
    engine = sa.create_engine(postgres_url)
    with engine.connect() as conn:
        assert _count(conn, schemas[0], "readings", "time") > 0
        # three whole local days for each of six branches
        assert _count(conn, schemas[0], "fits", "window_start") == 18
        for other in ("public", schemas[1]):  # nothing of it anywhere else
            assert _count(conn, other, "readings", "time") == 0, other
            assert _count(conn, other, "fits", "window_start") == 0, other
    assert not (tmp_path / "a" / "var").exists()  # the example's SQLite file: not made

    # a finding in site A's schema, as its daemon would record it
    store = SqlStore(postgres_url, schema=schemas[0])
    store.upsert_findings([{
        "branch": "B2-compressor", "kind": "restriction", "start": START,
        "detected": START + timedelta(days=1), "end": None, "confidence": 0.9,
        "message": "r rose", "evidence": {"extra_energy_kwh_per_day": 75.0,
                                          "lost_flow_m3h": 4.0}}])
    store.close()
    fleet = tmp_path / "fleet.toml"
    fleet.write_text(f'[fleet]\nname = "Shared"\nreport = "out/fleet.html"\n'
                     f'[store]\nurl = "{postgres_url}"\n'
                     '[[site]]\nfile = "a/site.toml"\n'
                     f'[[site]]\nfile = "b/site.toml"\nkey = "{schemas[1]}"\n')
    assert load_fleet(fleet).keys == tuple(schemas)  # A's schema is its key
    with caplog.at_level(logging.INFO, logger="monitor.app.cli_fleet"):
        assert main(["fleet", str(fleet), "--json"]) == 0
    ranking = json.loads(capsys.readouterr().out)
    assert ranking[0]["site"] == "Plant A" and ranking[0]["branch"] == "B2-compressor"
    assert ranking[0]["extra_energy_kwh_per_day"] == 75.0
    assert f"Plant A: results in schema {schemas[0]} " in caplog.text
    with engine.connect() as conn:  # no schema made from the site name
        assert not sa.inspect(conn).has_table("fits", schema="bw_plant_a")
    engine.dispose()
