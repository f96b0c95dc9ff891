"""A fleet: the sites one team looks after, and the summary page that ranks their branches.

A fleet file (TOML) lists site files; each site keeps its own store, named in its own
site file. `load_fleet` validates it with errors that name the file and the key.
`fleet_ranking` reads every site's open findings and ranks every branch of the fleet by
what its open findings cost (extra pump energy, then lost flow); `build_fleet_report`
turns the ranking into one self-contained HTML page, every text escaped.

A fleet file may instead give one shared store, ``[store]`` (``url``, ``url_env`` or
``secrets_file``, read as a site file's [store] is): a PostgreSQL database in which every
site keeps its results in its own schema, named by the site's *key* — ``key = "..."`` in
its ``[[site]]`` entry, or ``bw_`` and a slug of the site's name. The schema keeps the
sites apart without a site column in any table, so the store's tables, queries and
migrations are those of a one-site store (each schema is migrated on its own) and an
existing store needs no migration; a site is given its own permissions or dropped with
its schema. For a fleet run the shared store overrides each site file's own [store] URL.
A site file may name its schema itself (``[store] schema``, so that its own commands and
daemon reach it): a fleet entry without a key then takes that schema as the key, and an
entry whose key differs from it is refused — one site's results in two schemas would
leave the fleet summary reading one the site's daemon does not write.
SQLite is refused as a shared store: workers on other machines cannot share a file.

Sketch of the file::

    [fleet]
    name = "Northern plants"
    report = "reports/fleet.html"      # relative to this file
    [store]                            # optional: one PostgreSQL store for every site
    url_env = "BRANCHWATCH_FLEET_DB"
    [[site]]
    file = "sites/plant-a.toml"        # relative to this file
    key = "bw_plant_a"                 # optional: the site's schema in the shared store
"""

from __future__ import annotations

import html
import math
import re
import tomllib
import unicodedata
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import Any

import pandas as pd

from adapters.base import ResultsStore
from adapters.credentials import parse_url
from monitor.app.report import CAUTION, page_head
from monitor.site.config import ConfigError, Site, read_store_url, site_key_problem

__all__ = ["BranchCost", "Fleet", "build_fleet_report", "fleet_ranking", "load_fleet",
           "site_costs", "site_key"]

_FLEET_KEYS = {"name", "report"}
_SITE_KEYS = {"file", "key"}


@dataclass(frozen=True)
class Fleet:
    """A validated fleet file: its *name*, the site files (absolute) and where the summary
    page goes."""

    path: Path
    name: str
    sites: tuple[Path, ...]
    report: Path
    #: the shared store's URL (None: every site keeps its own store)
    store_url: str | None = None
    #: with a shared store: each site's key, its schema there, in the order of *sites*
    keys: tuple[str, ...] = ()


def site_key(name: str) -> str:
    """The default key of a site named *name*: ``bw_`` and its name in lowercase ASCII
    letters and digits, other characters as one underscore, cut to 40 characters.

    >>> site_key("Fenwick Marsh — Loop A")
    'bw_fenwick_marsh_loop_a'
    """
    ascii_name = unicodedata.normalize("NFKD", name).encode("ascii", "ignore").decode()
    slug = re.sub(r"[^a-z0-9]+", "_", ascii_name.lower()).strip("_")
    return ("bw_" + slug)[:40].rstrip("_") if slug else ""


def _site_facts(file: Path) -> tuple[str | None, str | None]:
    """The ``[site] name`` and ``[store] schema`` of a site file, None for each it does
    not have (`load_site` will say what is wrong with it)."""
    try:
        doc = tomllib.loads(file.read_text(encoding="utf-8"))
    except (OSError, tomllib.TOMLDecodeError):
        return None, None
    found = []
    for table, key in (("site", "name"), ("store", "schema")):
        value = doc.get(table, {}).get(key) if isinstance(doc.get(table), dict) else None
        found.append(value if isinstance(value, str) else None)
    return found[0], found[1]


def _shared_store(table: Any, path: Path) -> str:
    """The fleet's shared store URL, refused unless it is PostgreSQL."""
    if isinstance(table, dict) and "schema" in table:
        raise ConfigError(
            f"{path.name}: store.schema: a fleet's shared store keeps every site in a schema "
            "of its own, named by its key; leave schema out here and give key = \"...\" in "
            "a [[site]] entry where the default key will not do")
    url = read_store_url(table, path)
    backend = parse_url(url, "store").get_backend_name()
    if backend == "sqlite":
        raise ConfigError(
            f"{path.name}: store: a SQLite file cannot be a fleet's shared store (workers on "
            "other machines cannot share a file; a fleet needs a database server); give a "
            "PostgreSQL URL, or leave [store] out and let each site keep its own store")
    if backend != "postgresql":
        raise ConfigError(
            f"{path.name}: store: a fleet's shared store must be PostgreSQL (each site gets "
            f"a schema of its own), got {backend}")
    return url


def load_fleet(path: Path) -> Fleet:
    """The fleet file at *path*, validated; `ConfigError` names the file and the key."""
    name = path.name
    try:
        doc = tomllib.loads(path.read_text(encoding="utf-8"))
    except OSError as exc:
        raise ConfigError(f"{path}: cannot read the fleet file ({exc.strerror or exc})") \
            from None
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{name}: not valid TOML: {exc}") from None
    unknown = set(doc) - {"fleet", "site", "store"}
    if unknown:
        raise ConfigError(f"{name}: unknown section(s) {sorted(unknown)}; "
                          "allowed: fleet, store, site")
    head = doc.get("fleet", {})
    if not isinstance(head, dict):
        raise ConfigError(f"{name}: fleet must be a table ([fleet])")
    if set(head) - _FLEET_KEYS:
        raise ConfigError(f"{name}: fleet: unknown key(s) {sorted(set(head) - _FLEET_KEYS)}; "
                          f"allowed: {', '.join(sorted(_FLEET_KEYS))}")
    title = head.get("name", path.stem)
    report = head.get("report", "fleet-report.html")
    for key, value in (("name", title), ("report", report)):
        if not isinstance(value, str) or not value.strip():
            raise ConfigError(f"{name}: fleet.{key} must be a non-empty string")
    entries = doc.get("site", [])
    if not isinstance(entries, list) or not entries:
        raise ConfigError(f"{name}: site: list at least one site file ([[site]] file = ...)")
    shared = _shared_store(doc["store"], path) if "store" in doc else None
    base = path.parent
    files: list[Path] = []
    keys: dict[str, str] = {}  # key -> where it was given
    for i, entry in enumerate(entries):
        where = f"{name}: site[{i}]"
        if not isinstance(entry, dict) or set(entry) - _SITE_KEYS or "file" not in entry:
            raise ConfigError(f"{where}: give file = \"path/to/site.toml\" and, with a "
                              "shared [store], optionally key = \"schema_name\"")
        if not isinstance(entry["file"], str) or not entry["file"].strip():
            raise ConfigError(f"{where}.file must be a non-empty string")
        file = (base / entry["file"]).resolve()
        if not file.is_file():
            raise ConfigError(f"{where}.file: {entry['file']!r} is not a file "
                              f"(looked for {file})")
        if file in files:
            raise ConfigError(f"{where}.file: {entry['file']!r} is listed twice")
        files.append(file)
        if shared is None:
            if "key" in entry:
                raise ConfigError(f"{where}.key: a key names the site's schema in the "
                                  "fleet's shared store; give [store] or leave key out")
            continue
        site_name, schema = _site_facts(file)
        if "key" in entry:
            key, what = entry["key"], f"{where}.key"
            if schema is not None and key != schema:
                raise ConfigError(
                    f"{what}: {key!r} is not the schema {schema!r} its site file "
                    f"{entry['file']} names ([store] schema), which the site's own commands "
                    "and daemon use; give the same name in both, or leave key out here")
        elif schema is not None:
            key, what = schema, f"{where}: the schema its site file names ([store] schema)"
        else:
            key = site_key(site_name) if site_name is not None else ""
            what = f"{where}: the key made from its site name {site_name!r}"
        problem = site_key_problem(key)
        if problem:
            raise ConfigError(f"{what}: {problem}; give key = \"...\" in this [[site]] entry")
        if key in keys:
            raise ConfigError(f"{what}: {key!r} is already the key of {keys[key]}; every "
                              "site needs a key of its own (give key = \"...\")")
        keys[key] = f"site[{i}]"
    return Fleet(path=path, name=title, sites=tuple(files), report=(base / report).resolve(),
                 store_url=shared, keys=tuple(keys))


@dataclass(frozen=True)
class BranchCost:
    """One branch of the fleet with what its open findings cost, summed."""

    site: str
    branch: str
    findings: tuple[str, ...]  # kinds of the open findings
    extra_energy_kwh_per_day: float
    lost_flow_m3h: float
    confidence: float  # the highest of its open findings [-]
    message: str  # the costliest open finding's


def _num(ev: Any, key: str) -> float:
    v = (ev or {}).get(key) if isinstance(ev, dict) else None
    return float(v) if isinstance(v, int | float) and math.isfinite(float(v)) else 0.0


def site_costs(site: Site, findings: pd.DataFrame) -> list[BranchCost]:
    """Every branch of *site* with the summed cost of its open *findings* (a frame as
    `ResultsStore.read_findings` gives it); a branch without one costs nothing. Findings
    of the header (an imbalance) or of the source count under their own name."""
    open_f = findings[findings["end"].isna()] if not findings.empty else findings
    names = [b.name for b in site.branches]
    if not open_f.empty:
        names += sorted({str(b) for b in open_f["branch"]} - set(names))
    out = []
    for name in names:
        rows = (open_f[open_f["branch"] == name].to_dict(orient="records")
                if not open_f.empty else [])
        kwh = [_num(r.get("evidence"), "extra_energy_kwh_per_day") for r in rows]
        lost = [_num(r.get("evidence"), "lost_flow_m3h") for r in rows]
        worst = max(range(len(rows)), key=lambda i: (kwh[i], lost[i]), default=None)
        out.append(BranchCost(
            site=site.name, branch=name, findings=tuple(sorted(str(r["kind"]) for r in rows)),
            extra_energy_kwh_per_day=sum(kwh), lost_flow_m3h=sum(lost),
            confidence=max((float(r["confidence"]) for r in rows), default=0.0),
            message="" if worst is None else str(rows[worst]["message"]),
        ))
    return out


def fleet_ranking(sites: Sequence[tuple[Site, ResultsStore]]) -> list[BranchCost]:
    """Every branch of every site, costliest open findings first: extra pump energy,
    then lost flow, then any open finding before none, then the most certain; ties by
    site and branch name."""
    rows = [c for site, store in sites for c in site_costs(site, store.read_findings())]
    return sorted(rows, key=lambda c: (-c.extra_energy_kwh_per_day, -c.lost_flow_m3h,
                                       not c.findings, -c.confidence, c.site, c.branch))


def _e(text: Any) -> str:
    return html.escape(str(text))


def build_fleet_report(name: str, ranking: Sequence[BranchCost], *, generated: datetime,
                       sites: int) -> str:
    """The fleet summary page: one table of every branch, costliest first. Pure."""
    costed = [c for c in ranking if c.findings]
    kwh = sum(c.extra_energy_kwh_per_day for c in ranking)
    lost = sum(c.lost_flow_m3h for c in ranking)
    rows = []
    for i, c in enumerate(ranking, 1):
        kinds = ", ".join(k.replace("_", " ") for k in c.findings) or "none open"
        rows.append(
            f"<tr><td class=num>{i}</td><td>{_e(c.site)}</td><td>{_e(c.branch)}</td>"
            f"<td>{_e(kinds)}</td><td class=num>{c.extra_energy_kwh_per_day:.0f}</td>"
            f"<td class=num>{c.lost_flow_m3h:.1f}</td>"
            f"<td class=num>{f'{c.confidence:.0%}' if c.findings else '—'}</td>"
            f"<td>{_e(c.message)}</td></tr>"
        )
    return "\n".join([
        page_head(f"{name} — fleet summary"),
        f"<h1>{_e(name)} — fleet summary</h1>",
        f"<p class=sub>{sites} sites, {len(ranking)} branches; {len(costed)} with open "
        f"findings costing {kwh:.0f} kWh/day of extra pumping and {lost:.1f} m3/h of lost "
        f"flow in all. Generated {generated:%Y-%m-%d %H:%M} UTC.</p>",
        "<h2>Branches by the cost of their open findings</h2>",
        "<table><tr><th class=num>#</th><th>site</th><th>branch</th><th>open findings</th>"
        "<th class=num>extra pumping kWh/day</th><th class=num>lost flow m3/h</th>"
        "<th class=num>confidence</th><th>costliest finding</th></tr>",
        *rows,
        "</table>",
        "<p class=sub>Costs are each finding's own estimate at the branch's latest fit "
        "(see each site's morning report for the evidence); a branch's findings are summed, "
        "so one condition seen two ways counts twice.</p>",
        f"<p class=caution>{_e(CAUTION)}</p>",
        "</body></html>",
    ])
