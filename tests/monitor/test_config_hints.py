"""Hints in config errors name settings that exist, and following them works (issue 12)."""

from __future__ import annotations

import tomllib
from pathlib import Path
from typing import Any

import pytest

from monitor.config import ConfigError, parse_site

EXAMPLE = Path(__file__).resolve().parents[2] / "config" / "example-site.toml"


def _open_branch(doc: dict[str, Any]) -> dict[str, Any]:
    return next(b for b in doc["branch"] if b["termination"]["kind"] == "open")


def test_exit_listed_on_an_open_discharge_gives_a_hint_that_works() -> None:
    doc = tomllib.loads(EXAMPLE.read_text())
    branch = _open_branch(doc)
    branch["elements"].append({"fittings": {"exit": 1}})
    with pytest.raises(ConfigError) as err:
        parse_site(doc, path="site.toml")
    text = str(err.value)
    assert "remove 'exit' from the fittings" in text
    assert "exit_loss_k" not in text  # a key the site file does not have
    branch["elements"].pop()  # the hint followed
    parse_site(doc, path="site.toml")
