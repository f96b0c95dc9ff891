"""`branchwatch curve`: table, JSON, plot, and one-line errors with exit status 2."""

from __future__ import annotations

import json
import tomllib
from pathlib import Path

import pytest
import tomli_w

from monitor.app.cli import main

EXAMPLE = Path(__file__).resolve().parents[2] / "config" / "example-site.toml"


def test_curve_json_operating_point_is_mass_balanced(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["curve", str(EXAMPLE), "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    op = out["operating_point"]
    flows = [b["flow_m3s"] for b in out["branches"]]
    assert op["total_flow_m3s"] == pytest.approx(sum(flows), rel=1e-9)
    assert 1e5 < op["header_pressure_pa"] < 6e5
    for b in out["branches"]:
        assert set(b) >= {"name", "flow_m3s", "threshold_pa", "velocity_ms"}
        # a branch with flow sits above its threshold (common practice: no flow below it)
        assert (b["flow_m3s"] > 0) == (op["header_pressure_pa"] > b["threshold_pa"])


def test_curve_table_and_plot(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    png = tmp_path / "curve.png"
    assert main(["curve", str(EXAMPLE), "--plot", str(png), "--speed", "90"]) == 0
    out = capsys.readouterr().out
    assert "operating point: header" in out and "B3-quench" in out
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_lower_speed_lowers_header_pressure(capsys: pytest.CaptureFixture[str]) -> None:
    main(["curve", str(EXAMPLE), "--json"])
    full = json.loads(capsys.readouterr().out)["operating_point"]["header_pressure_pa"]
    main(["curve", str(EXAMPLE), "--json", "--speed", "80"])
    slow = json.loads(capsys.readouterr().out)["operating_point"]["header_pressure_pa"]
    assert slow < full


def test_low_speed_flags_backflow_from_the_tank(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["curve", str(EXAMPLE), "--speed", "55"]) == 0
    out = capsys.readouterr().out
    assert "BACK-FLOW HAZARD" in out and "B3-quench" in out


def test_fixed_header_pressure(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["curve", str(EXAMPLE), "--header-pressure", "0.5 bar", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    # 0.5 bar is below every branch's static back-pressure: no branch flows
    assert all(b["flow_m3s"] == 0 for b in out["branches"])


def test_pump_that_cannot_reach_any_threshold_is_a_one_line_error(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    data = tomllib.loads(EXAMPLE.read_text())
    for point in data["pump"]["curve"]:
        point["head"] = "4 m"  # 0.4 bar: below every branch's threshold
    site = tmp_path / "weak.toml"
    site.write_text(tomli_w.dumps(data))
    assert main(["curve", str(site)]) == 2
    err = capsys.readouterr().err
    assert err.startswith("branchwatch curve: error:") and err.count("\n") == 1


def test_bad_config_is_a_one_line_error(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    bad = tmp_path / "bad.toml"
    bad.write_text(EXAMPLE.read_text().replace('length = "85 m"', 'length = "85 kg"'))
    assert main(["curve", str(bad)]) == 2
    err = capsys.readouterr().err
    assert "branch[0].elements[0].pipe.length" in err
    assert "Traceback" not in err
