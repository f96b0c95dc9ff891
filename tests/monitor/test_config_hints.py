"""Hints in config errors name settings that exist, and following them works (issue 12)."""

from __future__ import annotations

import tomllib
from pathlib import Path
from typing import Any

import pytest

from monitor.site.config import ConfigError, parse_site

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


def test_the_sites_cleaning_limit_is_every_branchs_default() -> None:
    # issue 11: [analysis] cleaning_limit was documented but never read (1.5 always won)
    doc = tomllib.loads(EXAMPLE.read_text())
    doc["analysis"]["cleaning_limit"] = 1.8
    doc["branch"][0]["cleaning_limit"] = 1.3
    site = parse_site(doc, path="site.toml")
    assert site.branches[0].cleaning_limit == 1.3  # the branch's own wins
    assert {b.cleaning_limit for b in site.branches[1:]} == {1.8}
