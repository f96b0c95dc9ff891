"""Site configuration: the example loads, mistakes are reported with file and key path."""

from __future__ import annotations

import tomllib
from pathlib import Path
from typing import Any

import pytest

from monitor.site.config import ConfigError, load_site, parse_site

EXAMPLE = Path(__file__).resolve().parents[2] / "config" / "example-site.toml"


def _example() -> dict[str, Any]:
    return tomllib.loads(EXAMPLE.read_text())


def test_example_site_loads_with_all_termination_kinds() -> None:
    site = load_site(EXAMPLE)
    kinds = {type(b.model.termination).__name__ for b in site.branches}
    assert kinds == {"OpenDischarge", "Tank", "HeldHeader", "ReturnHeader"}
    assert len(site.branches) >= 5
    assert site.pump is not None and site.pump_count == 2
    assert site.pump_speed_tag == "ST-100"


def test_units_are_converted_to_si_once() -> None:
    site = load_site(EXAMPLE)
    b1 = site.branch("B1-reactor")
    assert b1.min_flow_m3s == pytest.approx(70 / 3600)
    # nominal return-header pressure 0.6 bar -> Pa
    assert b1.nominal["end_pressure_pa"] == pytest.approx(60_000.0)
    b4 = site.branch("B4-process")
    assert b4.nominal["valve_position"] == pytest.approx(0.60)
    assert b4.valve_position_tag == "ZT-410"
    assert site.tags["FT-110"].unit == "m3/h" and site.tags["FT-110"].kind == "flow"


def test_relative_sqlite_url_is_resolved_beside_the_file() -> None:
    site = load_site(EXAMPLE)
    assert site.store_url.startswith("sqlite:////")
    assert site.store_url.endswith("config/var/branchwatch.db")


def test_bad_quantity_names_file_and_key_path() -> None:
    data = _example()
    data["branch"][2]["elements"][0]["pipe"]["length"] = "110 x"
    with pytest.raises(ConfigError) as err:
        parse_site(data, path="site.toml")
    text = str(err.value)
    assert text.startswith("site.toml: branch[2].elements[0].pipe.length:")
    assert "110 x" in text


def test_wrong_dimension_is_refused() -> None:
    data = _example()
    data["branch"][0]["min_flow"] = "3 bar"
    with pytest.raises(ConfigError, match=r"branch\[0\]\.min_flow: '3 bar' does not convert"):
        parse_site(data, path="site.toml")


def test_unknown_key_is_named() -> None:
    data = _example()
    data["branch"][1]["lenght"] = "3 m"
    with pytest.raises(ConfigError, match=r"branch\[1\]\.lenght: unknown key"):
        parse_site(data, path="site.toml")


def test_tag_unit_of_wrong_kind_is_refused() -> None:
    data = _example()
    data["branch"][0]["flow"]["unit"] = "bar"
    with pytest.raises(ConfigError, match=r"'FT-110'.*not a unit of flow"):
        parse_site(data, path="site.toml")


def test_duplicate_branch_names_are_refused() -> None:
    data = _example()
    data["branch"][1]["name"] = data["branch"][0]["name"]
    with pytest.raises(ConfigError, match="repeated: B1-reactor"):
        parse_site(data, path="site.toml")


def test_schedule_refuses_the_dst_band() -> None:
    data = _example()
    data["schedule"] = {"analyze_at": "02:30"}
    with pytest.raises(ConfigError, match=r"schedule\.analyze_at: .*daylight-saving"):
        parse_site(data, path="site.toml")


def test_missing_file_and_bad_toml(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match="no such file"):
        load_site(tmp_path / "nope.toml")
    bad = tmp_path / "bad.toml"
    bad.write_text("[site\nname = 1")
    with pytest.raises(ConfigError, match="not valid TOML"):
        load_site(bad)


def test_sql_source_refuses_credentials_in_file() -> None:
    data = _example()
    data["source"] = {"kind": "sql", "table": "readings"}
    with pytest.raises(ConfigError, match="url_env"):
        parse_site(data, path="site.toml")


def test_corrections_policy_defaults_to_refuse_and_is_validated() -> None:
    site = load_site(EXAMPLE)
    assert site.source is not None and site.source.corrections == "refuse"
    data = _example()
    data["source"]["corrections"] = "apply"
    applied = parse_site(data, path="site.toml").source
    assert applied is not None and applied.corrections == "apply"
    data["source"].pop("corrections")
    bare = parse_site(data, path="site.toml").source
    assert bare is not None and bare.corrections == "refuse"
    data["source"]["corrections"] = "latest"
    with pytest.raises(ConfigError) as err:
        parse_site(data, path="site.toml")
    text = str(err.value)
    assert text.startswith("site.toml: source.corrections:") and "\n" not in text
    assert "'refuse'" in text and "'apply'" in text


def test_store_schema_is_read_for_postgresql() -> None:
    data = _example()
    data["store"] = {"url": "postgresql://db.example/fleet", "schema": "bw_fenwick_b"}
    assert parse_site(data, path="site.toml").store_schema == "bw_fenwick_b"
    assert load_site(EXAMPLE).store_schema is None


@pytest.mark.parametrize(("store", "message"), [
    ({"url": "sqlite:///var/b.db", "schema": "bw_b"},
     "site.toml: store.schema: a schema is kept in a PostgreSQL store only, this store is "
     "sqlite; leave store.schema out or give a PostgreSQL URL"),
    ({"url": "mysql+pymysql://db.example/plant", "schema": "bw_b"},
     "site.toml: store.schema: a schema is kept in a PostgreSQL store only, this store is "
     "mysql; leave store.schema out or give a PostgreSQL URL"),
    ({"url": "postgresql://db.example/fleet", "schema": "Plant-B"},
     "site.toml: store.schema: 'Plant-B' is not a site key (lowercase letters"),
    ({"url": "postgresql://db.example/fleet", "schema": "pg_b"},
     "site.toml: store.schema: 'pg_b' is not a site key"),
])
def test_store_schema_is_refused_in_one_line(store: dict[str, str], message: str) -> None:
    data = _example()
    data["store"] = store
    with pytest.raises(ConfigError) as info:
        parse_site(data, path="site.toml")
    assert str(info.value).startswith(message) and "\n" not in str(info.value)
