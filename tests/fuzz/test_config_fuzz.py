"""Fuzzing the site-file loader: generated mutations of config/example-site.toml.

Each case applies one to three mutations to the parsed example (a key removed, a value
of the wrong type, a unit that is no unit or of the wrong kind, a negative or zero
number, an unknown key) and hands the result to `monitor.site.config.parse_site`. The checks:
it returns a site or raises `ConfigError` and nothing else; every line of the error
starts with the file name and names a key path of the file (the path of a mutated key,
or a parent of it) — one line per problem.
"""

from __future__ import annotations

import copy
import random
import re
import tomllib
from pathlib import Path
from typing import Any

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from monitor.site.config import ConfigError, parse_site

EXAMPLE = tomllib.loads(
    (Path(__file__).parents[2] / "config" / "example-site.toml").read_text(encoding="utf-8"))
SITE = Path(__file__).parents[2] / "config" / "fuzzed-site.toml"
_SECTIONS = {"site", "store", "source", "header", "pump", "analysis", "schedule", "report",
             "notify", "branch"}
_BAD_VALUES: list[Any] = [
    "12 furlongs", "-3 bar", "bar", "", "0 m3/h", "-110 m", "1e400 bar", "NaN bar",
    "5 degC", "100 m3/h", -1, 0, -1e9, 1e308, float("nan"), True, [], {}, [1, "x"],
    {"tag": 1}, "x' OR '1'='1", "<script>alert(1)</script>", "../../etc/passwd",
]


def _paths(node: Any, here: tuple[Any, ...] = ()) -> list[tuple[Any, ...]]:
    """Every key path of the parsed TOML (dict keys and list indexes)."""
    out = [here] if here else []
    if isinstance(node, dict):
        for key, value in node.items():
            out += _paths(value, (*here, key))
    elif isinstance(node, list):
        for i, value in enumerate(node):
            out += _paths(value, (*here, i))
    return out


def _parent(doc: Any, path: tuple[Any, ...]) -> Any:
    for part in path[:-1]:
        doc = doc[part]
    return doc


def mutate(rng: random.Random) -> tuple[dict[str, Any], list[tuple[Any, ...]]]:
    doc = copy.deepcopy(EXAMPLE)
    touched = []
    for _ in range(rng.randint(1, 3)):
        path = rng.choice(_paths(doc))
        parent, key = _parent(doc, path), path[-1]
        how = rng.choice(["drop", "value", "value", "unknown", "negate"])
        if how == "drop":
            if isinstance(parent, list):
                parent.pop(key)
            else:
                del parent[key]
        elif how == "unknown" and isinstance(parent[key], dict):
            parent[key]["colour_code"] = "red"
            path = (*path, "colour_code")
        elif how == "negate" and isinstance(parent[key], str) and parent[key][:1].isdigit():
            parent[key] = "-" + parent[key]
        elif how == "negate" and isinstance(parent[key], int | float):
            parent[key] = -parent[key]
        else:
            parent[key] = copy.deepcopy(rng.choice(_BAD_VALUES))
        touched.append(path)
        if not _paths(doc):
            break
    return doc, touched


def _loc(path: tuple[Any, ...]) -> str:
    out = ""
    for part in path:
        out += f"[{part}]" if isinstance(part, int) else ("." if out else "") + str(part)
    return out


def _one_case(rng: random.Random) -> None:
    doc, touched = mutate(rng)
    try:
        parse_site(doc, path=SITE)
    except ConfigError as exc:
        lines = str(exc).splitlines()
        assert lines, "an empty error"
        for line in lines:
            assert line.startswith(f"{SITE}: "), line
            rest = line.removeprefix(f"{SITE}: ")
            # the line names a key path: a section of the file, or a path that was touched
            first = re.split(r"[.\[: ]", rest, maxsplit=1)[0]
            named = first in _SECTIONS or any(_loc(p[:1]) in rest for p in touched) \
                or any(str(p[-1]) in rest for p in touched)
            assert named, f"no key path in {line!r} (touched {[_loc(p) for p in touched]})"


@pytest.mark.slow
def test_site_loader_10000_mutations() -> None:
    rng = random.Random(20260502)
    for number in range(10_000):
        state = rng.getstate()
        try:
            _one_case(rng)
        except AssertionError as exc:
            rng.setstate(state)
            raise AssertionError(f"mutation {number}: {mutate(rng)}") from exc


@settings(max_examples=200, deadline=None, derandomize=True,
          suppress_health_check=list(HealthCheck))
@given(seed=st.integers(0, 2**32 - 1))
def test_site_loader_mutations(seed: int) -> None:
    _one_case(random.Random(seed))
