"""The fleet file and the fleet summary: every site's branches ranked by what their open
findings cost, on one escaped HTML page; `branchwatch fleet` end to end.

Invented data: the example site (config/example-site.toml) twice, under two site names,
with findings written into SQLite stores by hand; costs are the findings' own evidence
numbers, so the ranking is checked against the rule in `monitor.app.fleet.fleet_ranking`.
"""

from __future__ import annotations

import re
import shutil
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import pytest

from adapters.store import SqlStore
from monitor.app.cli import main
from monitor.app.demo import EXAMPLE_SITE
from monitor.app.fleet import build_fleet_report, fleet_ranking, load_fleet, site_key
from monitor.site.config import ConfigError, load_site

T0 = datetime(2026, 6, 1, tzinfo=UTC)
CONFIG = Path(__file__).resolve().parents[2] / "config"


def _site_file(folder: Path, name: str) -> Path:
    folder.mkdir(parents=True)
    text = EXAMPLE_SITE.read_text()
    text = re.sub(r'(?m)^name = ".*"$', f'name = "{name}"', text, count=1)
    (folder / "site.toml").write_text(text)
    return folder / "site.toml"


def _finding(branch: str, kind: str, *, kwh: float = 0.0, lost: float = 0.0,
             end: datetime | None = None, confidence: float = 0.9,
             message: str = "r rose") -> dict[str, Any]:
    return {"branch": branch, "kind": kind, "start": T0, "detected": T0 + timedelta(days=1),
            "end": end, "confidence": confidence, "message": message,
            "evidence": {"extra_energy_kwh_per_day": kwh, "lost_flow_m3h": lost}}


@pytest.fixture
def fleet_file(tmp_path: Path) -> Path:
    a = _site_file(tmp_path / "a", "Plant <A>")
    b = _site_file(tmp_path / "b", "Plant B")
    for path, rows in (
        (a, [_finding("B1-reactor", "fouling", kwh=40.0, lost=5.0,
                      message="fouling <script>alert(1)</script>"),
             _finding("B2-compressor", "restriction", kwh=300.0, end=T0 + timedelta(days=3))]),
        (b, [_finding("B2-compressor", "restriction", kwh=120.0, lost=9.0),
             _finding("B4-process", "back_pressure", confidence=0.7)]),
    ):
        (path.parent / "var").mkdir()
        store = SqlStore(load_site(path).store_url)
        store.upsert_findings(rows)
        store.close()
    fleet = tmp_path / "fleet.toml"
    fleet.write_text('[fleet]\nname = "Two plants & more"\nreport = "out/fleet.html"\n'
                     '[[site]]\nfile = "a/site.toml"\n[[site]]\nfile = "b/site.toml"\n')
    return fleet


def test_branches_are_ranked_by_the_cost_of_their_open_findings(fleet_file: Path) -> None:
    fleet = load_fleet(fleet_file)
    sites = [load_site(p) for p in fleet.sites]
    stores = [SqlStore(s.store_url) for s in sites]
    ranking = fleet_ranking(list(zip(sites, stores, strict=True)))
    for s in stores:
        s.close()
    top = [(c.site, c.branch, c.extra_energy_kwh_per_day) for c in ranking[:3]]
    # the closed 300 kWh/day restriction counts for nothing
    assert top == [("Plant B", "B2-compressor", 120.0), ("Plant <A>", "B1-reactor", 40.0),
                   ("Plant B", "B4-process", 0.0)]
    assert len(ranking) == sum(len(s.branches) for s in sites)
    assert all(not c.findings for c in ranking[3:])
    assert ranking[0].lost_flow_m3h == 9.0 and ranking[0].findings == ("restriction",)


def test_the_summary_page_escapes_every_text(fleet_file: Path) -> None:
    fleet = load_fleet(fleet_file)
    sites = [load_site(p) for p in fleet.sites]
    stores = [SqlStore(s.store_url) for s in sites]
    page = build_fleet_report(fleet.name, fleet_ranking(list(zip(sites, stores, strict=True))),
                              generated=T0, sites=2)
    for s in stores:
        s.close()
    assert "<script>" not in page and "&lt;script&gt;" in page
    assert "Plant &lt;A&gt;" in page and "Two plants &amp; more" in page
    assert "it does not control" in page


def test_cli_fleet_writes_the_page(fleet_file: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["fleet", str(fleet_file)]) == 0
    out = capsys.readouterr().out
    assert "1. Plant B / B2-compressor: restriction; 120 kWh/day, 9.0 m3/h lost" in out
    page = (fleet_file.parent / "out" / "fleet.html").read_text()
    assert page.index("B2-compressor") < page.index("B1-reactor")


def test_the_example_fleet_file_loads() -> None:
    fleet = load_fleet(CONFIG / "example-fleet.toml")
    assert fleet.sites == ((CONFIG / "example-site.toml").resolve(),)


@pytest.mark.parametrize(("text", "message"), [
    ('[store]\nurl = "sqlite:///fleet.db"\n[[site]]\nfile = "a/site.toml"\n',
     r"store: a SQLite file cannot be a fleet's shared store \(workers on other machines "
     "cannot share a file; a fleet needs a database server\\)"),
    ('[store]\nurl = "mysql+pymysql://db/fleet"\n[[site]]\nfile = "a/site.toml"\n',
     "shared store must be PostgreSQL"),
    ('[store]\nurl = "postgresql://u:pw@db/fleet"\n[[site]]\nfile = "a/site.toml"\n',
     "store.url: a password in fleet.toml is not allowed"),
    ('[store]\nurl_env = "BW_TEST_NO_SUCH_VARIABLE"\n[[site]]\nfile = "a/site.toml"\n',
     "store.url_env"),
    ('[store]\nhost = "db"\n[[site]]\nfile = "a/site.toml"\n', "store.host: unknown key"),
    ('[store]\nurl = "postgresql://db/fleet"\n[[site]]\nfile = "a/site.toml"\n'
     '[[site]]\nfile = "b/site.toml"\n',
     r"site\[1\]: the key made from its site name 'Plant A': 'bw_plant_a' is already the "
     r"key of site\[0\]"),
    ('[store]\nurl = "postgresql://db/fleet"\n[[site]]\nfile = "a/site.toml"\nkey = "k"\n'
     '[[site]]\nfile = "b/site.toml"\nkey = "k"\n',
     r"site\[1\].key: 'k' is already the key of site\[0\]"),
    ('[store]\nurl = "postgresql://db/fleet"\n[[site]]\nfile = "a/site.toml"\n'
     'key = "Plant-A"\n', r"site\[0\].key: 'Plant-A' is not a site key \(lowercase"),
    ('[store]\nurl = "postgresql://db/fleet"\n[[site]]\nfile = "a/site.toml"\n'
     f'key = "{"a" * 41}"\n', "is not a site key"),
    ('[store]\nurl = "postgresql://db/fleet"\n[[site]]\nfile = "a/site.toml"\n'
     'key = "pg_a"\n', "is not a site key"),
    ('[[site]]\nfile = "a/site.toml"\nkey = "bw_a"\n',
     r"site\[0\].key: a key names the site's schema in the fleet's shared store"),
    ("[fleet]\n", "list at least one site file"),
    ('[[site]]\nfile = "nowhere.toml"\n', r"site\[0\].file: 'nowhere.toml' is not a file"),
    ('[[site]]\nfile = "a/site.toml"\n[[site]]\nfile = "a/../a/site.toml"\n',
     "is listed twice"),
    ('[fleet]\ncolour = "red"\n[[site]]\nfile = "a/site.toml"\n', "unknown key"),
    ("[fleet\n", "not valid TOML"),
])
def test_a_bad_fleet_file_names_file_and_key(tmp_path: Path, text: str, message: str) -> None:
    _site_file(tmp_path / "a", "Plant A")
    _site_file(tmp_path / "b", "Plant A")  # the same name: the same default key
    path = tmp_path / "fleet.toml"
    path.write_text(text)
    with pytest.raises(ConfigError, match=message) as info:
        load_fleet(path)
    assert str(info.value).startswith(("fleet.toml", str(path)))
    assert "\n" not in str(info.value)


def test_a_shared_store_gives_every_site_a_key(tmp_path: Path) -> None:
    _site_file(tmp_path / "a", "Fenwick Marsh — Loop A")
    _site_file(tmp_path / "b", "Plant B")
    path = tmp_path / "fleet.toml"
    path.write_text('[store]\nurl = "postgresql://db.example/fleet"\n'
                    '[[site]]\nfile = "a/site.toml"\n'
                    '[[site]]\nfile = "b/site.toml"\nkey = "holloway_b"\n')
    fleet = load_fleet(path)
    assert fleet.store_url == "postgresql://db.example/fleet"
    assert fleet.keys == ("bw_fenwick_marsh_loop_a", "holloway_b")
    assert site_key("x" * 60) == "bw_" + "x" * 37 and site_key("—") == ""


def test_cli_fleet_refuses_sqlite_for_dask(fleet_file: Path,
                                           capsys: pytest.CaptureFixture[str]) -> None:
    code = main(["fleet", str(fleet_file), "--from", "2026-06-01", "--to", "2026-06-02",
                 "--executor", "dask", "--quiet"])
    assert code == 2
    assert "cannot share; use a PostgreSQL store" in capsys.readouterr().err
    shutil.rmtree(fleet_file.parent / "out", ignore_errors=True)


def _with_schema(site_file: Path, schema: str) -> None:
    text = site_file.read_text().replace(
        'url = "sqlite:///var/branchwatch.db"',
        f'url = "postgresql://db.example/fleet"\nschema = "{schema}"')
    site_file.write_text(text)


def test_a_site_files_schema_is_its_key_in_the_shared_store(tmp_path: Path) -> None:
    _with_schema(_site_file(tmp_path / "a", "Plant A"), "fenwick_a")
    _with_schema(_site_file(tmp_path / "b", "Plant B"), "holloway_b")
    path = tmp_path / "fleet.toml"
    path.write_text('[store]\nurl = "postgresql://db.example/fleet"\n'
                    '[[site]]\nfile = "a/site.toml"\n'
                    '[[site]]\nfile = "b/site.toml"\nkey = "holloway_b"\n')
    assert load_fleet(path).keys == ("fenwick_a", "holloway_b")


def test_a_key_other_than_the_site_files_schema_is_refused(tmp_path: Path) -> None:
    _with_schema(_site_file(tmp_path / "a", "Plant A"), "fenwick_a")
    _with_schema(_site_file(tmp_path / "b", "Plant B"), "fenwick_a")
    path = tmp_path / "fleet.toml"
    head = '[store]\nurl = "postgresql://db.example/fleet"\n[[site]]\nfile = "a/site.toml"\n'
    path.write_text(head + 'key = "bw_other"\n')
    with pytest.raises(ConfigError, match=r"^fleet.toml: site\[0\].key: 'bw_other' is not the "
                       r"schema 'fenwick_a' its site file a/site.toml names \(\[store\] "
                       "schema\\), which the site's own commands and daemon use"):
        load_fleet(path)
    # two site files naming one schema: the second one's key is a duplicate
    path.write_text(head + '[[site]]\nfile = "b/site.toml"\n')
    with pytest.raises(ConfigError, match=r"site\[1\]: the schema its site file names "
                       r"\(\[store\] schema\): 'fenwick_a' is already the key of site\[0\]"):
        load_fleet(path)


def test_the_shared_store_takes_no_schema(tmp_path: Path) -> None:
    _site_file(tmp_path / "a", "Plant A")
    path = tmp_path / "fleet.toml"
    path.write_text('[store]\nurl = "postgresql://db.example/fleet"\nschema = "all"\n'
                    '[[site]]\nfile = "a/site.toml"\n')
    with pytest.raises(ConfigError, match=r"^fleet.toml: store.schema: a fleet's shared "
                       "store keeps every site in a schema of its own"):
        load_fleet(path)
