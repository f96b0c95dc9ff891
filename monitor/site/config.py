"""Site configuration: a TOML file in, validated, turned into model objects.

The file describes one site: where the readings come from, where results go, the supply
header's tags, the pump, and each branch's pipe, fittings, valves, equipment and
termination. Quantities carry their units (``"110 m"``, ``"0.5 bar"``, ``"140 m3/h"``);
they are converted to SI here, once, so that `model` only sees SI floats.

The sections are declared in `monitor.site.site_sections` (quantities, keys, the site's
hydraulics and [flow_drop]) and `monitor.site.analysis_sections` ([analysis] … [cost]); each
branch is built in `monitor.site.site_branches`. This module reads the file, checks it as a
whole and builds the `Site`.

Validation uses pydantic; every problem is reported as a `ConfigError` whose message names
the file, the key path and what is wrong, e.g.::

    config/site.toml: branch[2].elements[0].pipe.length: '110 x' is not a quantity …

Exceptions::

    ConfigError (ValueError)   the file is missing, not TOML, or does not validate
"""

from __future__ import annotations

import tomllib
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from datetime import timedelta
from pathlib import Path
from typing import Any

import numpy as np
from pydantic import (
    Field,
    ValidationError,
    model_validator,
)

from adapters.credentials import parse_url, read_url, url_secrets
from adapters.records import TagSpec
from model.network import ParallelHeader, PumpCurve
from monitor.site.analysis_sections import (
    AnalysisSection,
    CostSection,
    DiagnosisSection,
    EnergyPrice,
    NotifySection,
    ReportSection,
    ScheduleSection,
)
from monitor.site.site_branches import BranchConfig, build_branch, checked_tag, flow_drop_alarm
from monitor.site.site_sections import (
    BranchSection,
    ConfigError,
    FlowDropSection,
    HeaderSection,
    PumpSection,
    SiteSection,
    SourceSection,
    StoreSection,
    StrictSection,
    site_key_problem,
)

__all__ = [
    "BranchConfig",
    "ConfigError",
    "Site",
    "load_site",
    "parse_site",
    "read_store_url",
    "site_key_problem",
]


class SiteFile(StrictSection):
    site: SiteSection
    store: StoreSection = StoreSection()
    source: SourceSection | None = None
    header: HeaderSection
    pump: PumpSection | None = None
    analysis: AnalysisSection = AnalysisSection()
    diagnosis: DiagnosisSection = DiagnosisSection()
    schedule: ScheduleSection = ScheduleSection()
    report: ReportSection = ReportSection()
    notify: NotifySection | None = None
    cost: CostSection | None = None
    flow_drop: FlowDropSection = FlowDropSection()
    branch: list[BranchSection] = Field(min_length=1)

    @model_validator(mode="after")
    def _unique(self) -> SiteFile:
        names = [b.name for b in self.branch]
        dupes = sorted({n for n in names if names.count(n) > 1})
        if dupes:
            raise ValueError(f"branch names must be unique; repeated: {', '.join(dupes)}")
        owner: dict[str, int] = {}
        for i, b in enumerate(self.branch):
            if b.flow is None:
                continue
            if b.flow.tag in owner:
                j = owner[b.flow.tag]
                raise ValueError(
                    f"branch[{i}].flow.tag: {b.flow.tag!r} is already the flow meter of "
                    f"branch[{j}] ({self.branch[j].name}); each branch needs its own meter "
                    "(leave 'flow' out of a branch that has none)"
                )
            owner[b.flow.tag] = i
        return self


# ---------------------------------------------------------------------------------------
# What the rest of branchwatch uses


@dataclass(frozen=True)
class Site:
    """A validated site: model objects in SI plus what the daemon needs to run."""

    path: Path
    name: str
    timezone: str
    store_url: str
    source: SourceSection | None
    header_pressure_tag: str
    header_temperature_tag: str | None
    total_flow_tag: str | None
    design_temperature_c: float
    pump: PumpCurve | None
    pump_count: int
    pump_speed_tag: str | None
    design_speed: float
    pump_efficiency: float
    running_pressure_pa: float
    analysis: AnalysisSection
    schedule: ScheduleSection
    report_folder: Path
    branches: tuple[BranchConfig, ...]
    tags: Mapping[str, TagSpec] = field(default_factory=dict)
    #: [notify], with secrets-file paths made absolute (None: nobody is told)
    notify: NotifySection | None = None
    #: the ``[cost]`` section's price (None: not configured; costs are shown in kWh only)
    energy_price: EnergyPrice | None = None
    #: the spans of the diagnosis (``[diagnosis]``), as durations
    diagnosis: DiagnosisSection = field(default_factory=DiagnosisSection)
    #: ``[store] schema``: the PostgreSQL schema of the site's tables (None: the default)
    store_schema: str | None = None

    @property
    def header(self) -> ParallelHeader:
        return ParallelHeader([b.model for b in self.branches])

    def branch(self, name: str) -> BranchConfig:
        for b in self.branches:
            if b.name == name:
                return b
        known = ", ".join(b.name for b in self.branches)
        raise KeyError(f"no branch {name!r} at site {self.name!r}; branches: {known}")

    def tag_unit(self, tag: str | None, default: str) -> str:
        """The plant unit of *tag*; *default* when it is None or not a tag of the site."""
        return self.tags[tag].unit if tag is not None and tag in self.tags else default

    def pressure_unit(self, branch: str) -> str:
        """The unit the texts state branch *branch*'s pressures in: its end-pressure tag's,
        else the header pressure tag's (bar when neither is a tag of the site)."""
        end_tag = next((b.end_pressure_tag for b in self.branches if b.name == branch), None)
        return self.tag_unit(end_tag if end_tag in self.tags else self.header_pressure_tag,
                             "bar")

    @property
    def window(self) -> timedelta:
        return timedelta(seconds=self.analysis.window)


def load_site(path: str | Path) -> Site:
    """Read, validate and build the site in the TOML file at *path*."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise ConfigError(f"{p}: no such file; pass the path of a site TOML file") from None
    except OSError as exc:
        raise ConfigError(f"{p}: cannot read ({exc.strerror})") from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{p}: not valid TOML: {exc}") from None
    return parse_site(data, path=p)


def parse_site(data: Mapping[str, Any], *, path: Path | str = "<config>") -> Site:
    """Validate a parsed TOML mapping and build the site (see `load_site`)."""
    p = Path(path)
    try:
        doc = SiteFile.model_validate(data)
    except ValidationError as exc:
        raise ConfigError(_format_errors(p, exc)) from None
    try:
        return _build(doc, p)
    except (ValueError, KeyError) as exc:
        raise ConfigError(f"{p}: {exc}") from None


def _format_errors(path: Path, exc: ValidationError) -> str:
    lines = []
    for err in exc.errors():
        loc = _loc_text(err["loc"])
        msg = err["msg"].removeprefix("Value error, ")
        if err["type"] == "extra_forbidden":
            msg = "unknown key (check the spelling against config/example-site.toml)"
        elif err["type"] == "missing":
            msg = "required key is missing"
        lines.append(f"{path}: {loc}: {msg}" if loc else f"{path}: {msg}")
    return "\n".join(lines)


def _loc_text(loc: Sequence[int | str]) -> str:
    out = ""
    for part in loc:
        if isinstance(part, int):
            out += f"[{part}]"
        elif part in {"TagRef", "float", "function-before[parse(), float]"}:
            continue  # pydantic's union member names: not part of the user's key path
        else:
            out += ("." if out else "") + str(part)
    return out


def _build(doc: SiteFile, path: Path) -> Site:
    tags: dict[str, TagSpec] = {}
    header_p = checked_tag(doc.header.pressure, "pressure", tags)
    header_t = (checked_tag(doc.header.temperature, "temperature", tags)
                if doc.header.temperature else None)
    total_q = checked_tag(doc.header.total_flow, "flow", tags) if doc.header.total_flow else None

    pump = None
    speed_tag = None
    if doc.pump is not None:
        try:
            with np.errstate(over="raise", invalid="raise"):  # 1e308 m heads: an error
                pump = PumpCurve(
                    [pt.flow for pt in doc.pump.curve],
                    [pt.head for pt in doc.pump.curve],
                    speed_ratio=doc.pump.design_speed,
                    count=doc.pump.count,
                )
        except (ValueError, ArithmeticError) as exc:
            raise ValueError(f"pump (curve, design_speed, count): {exc}") from None
        if doc.pump.speed is not None:
            speed_tag = checked_tag(doc.pump.speed, "speed", tags)

    branches = []
    for i, sec in enumerate(doc.branch):
        where = f"branch[{i}] ({sec.name})"
        try:
            branch = build_branch(sec, tags, doc.analysis.cleaning_limit)
            branches.append(replace(branch, flow_drop=flow_drop_alarm(
                doc.flow_drop, sec.flow_drop, branch.flow_tag is not None,
                branch.valve_position_tag is not None)))
        except (ValueError, KeyError) as exc:
            raise ValueError(f"{where}: {exc}") from None
        except ArithmeticError:  # e.g. 1e308 m3/h raised to the equipment's exponent
            raise ValueError(
                f"{where}: a quantity is too large to compute with; check the values and "
                "units of its elements") from None

    base = path.parent
    # a secrets file is read as root or as the service user: it must not name another
    # file of the machine (/etc/shadow) unless the site says it keeps files elsewhere
    for key, given in _secrets_files(doc):
        if not doc.site.allow_paths_outside:
            _inside(base, base / given, key, given)
    store_url = _store_url(doc.store, base, allow_outside=doc.site.allow_paths_outside)
    _schema_needs_postgresql(doc.store, store_url)
    report_folder = (base / doc.report.folder).resolve()
    if not doc.site.allow_paths_outside:
        _inside(base, report_folder, "report.folder", doc.report.folder)
    source = doc.source
    if source is not None and source.secrets_file:
        source = source.model_copy(update={"secrets_file": str(base / source.secrets_file)})
    return Site(
        path=path,
        name=doc.site.name,
        timezone=doc.site.timezone,
        store_url=store_url,
        source=source,
        header_pressure_tag=header_p,
        header_temperature_tag=header_t,
        total_flow_tag=total_q,
        design_temperature_c=doc.header.design_temperature,
        pump=pump,
        pump_count=doc.pump.count if doc.pump else 0,
        pump_speed_tag=speed_tag,
        design_speed=doc.pump.design_speed if doc.pump else 1.0,
        pump_efficiency=doc.pump.efficiency if doc.pump else 0.70,
        running_pressure_pa=_running_pressure(doc, path),
        analysis=doc.analysis,
        schedule=doc.schedule,
        report_folder=report_folder,
        branches=tuple(branches),
        tags=tags,
        notify=_notify(doc.notify, base),
        energy_price=doc.cost.energy_price if doc.cost is not None else None,
        diagnosis=doc.diagnosis,
        store_schema=doc.store.schema_name,
    )


def _schema_needs_postgresql(sec: StoreSection, url: str) -> None:
    """Refuse ``[store] schema`` on a store that is not PostgreSQL."""
    backend = parse_url(url, "store").get_backend_name()
    if sec.schema_name is not None and backend != "postgresql":
        raise ValueError(
            f"store.schema: a schema is kept in a PostgreSQL store only, this store is "
            f"{backend}; leave store.schema out or give a PostgreSQL URL")


def _secrets_files(doc: SiteFile) -> list[tuple[str, str]]:
    """(key path, value) of every secrets_file the site file names."""
    found = [("store.secrets_file", doc.store.secrets_file)]
    if doc.source is not None:
        found.append(("source.secrets_file", doc.source.secrets_file))
    if doc.notify is not None:
        for name in ("email", "webhook"):
            part = getattr(doc.notify, name)
            if part is not None:
                found.append((f"notify.{name}.secrets_file", part.secrets_file))
    return [(key, str(value)) for key, value in found if value]


def _notify(sec: NotifySection | None, base: Path) -> NotifySection | None:
    """[notify] with its secrets files relative to the site file's folder."""
    if sec is None:
        return None
    update: dict[str, Any] = {}
    for name in ("email", "webhook"):
        part = getattr(sec, name)
        if part is not None and part.secrets_file:
            update[name] = part.model_copy(
                update={"secrets_file": str(base / part.secrets_file)})
    return sec.model_copy(update=update) if update else sec


def _running_pressure(doc: SiteFile, path: Path) -> float:
    """[header] running_pressure, or the [pump] section's, or 0.5 bar [Pa gauge]."""
    header = doc.header.running_pressure
    pump = doc.pump.running_pressure if doc.pump else None
    if header is not None and pump is not None and header != pump:
        raise ConfigError(
            f"{path.name}: header.running_pressure and pump.running_pressure disagree "
            f"({header / 1e5:g} bar against {pump / 1e5:g} bar); keep the one in [header]"
        )
    found = header if header is not None else pump
    return 50_000.0 if found is None else found


def read_store_url(table: Any, path: Path) -> str:
    """The store URL a ``[store]`` *table* of the file at *path* gives (``url``, or
    ``url_env`` / ``secrets_file`` relative to the file's folder and inside it), with the
    site file's checks; `ConfigError` names the file and the key. The fleet file's
    shared store is read with this too."""
    if not isinstance(table, dict):
        raise ConfigError(f"{path}: store must be a table ([store])")
    try:
        sec = StoreSection.model_validate(table)
    except ValidationError as exc:
        err = exc.errors()[0]
        loc = _loc_text(("store", *err["loc"]))
        msg = ("unknown key; allowed: url, url_env, secrets_file"
               if err["type"] == "extra_forbidden" else err["msg"].removeprefix("Value error, "))
        raise ConfigError(f"{path}: {loc}: {msg}") from None
    base = path.parent
    try:
        if sec.secrets_file:
            _inside(base, base / sec.secrets_file, "store.secrets_file", sec.secrets_file)
        return _store_url(sec, base, allow_outside=False, file_kind=path.name)
    except ValueError as exc:
        raise ConfigError(f"{path}: {exc}") from None


def _store_url(sec: StoreSection, base: Path, *, allow_outside: bool,
               file_kind: str = "the site file") -> str:
    """The store URL: from the file, or read from ``url_env`` / ``secrets_file``;
    checked for a known database kind, no password in *file_kind*, and (SQLite) a
    file inside the site folder unless *allow_outside*."""
    secrets: Path | None = None
    if sec.url_env or sec.secrets_file:
        key = "store.url_env" if sec.url_env else "store.secrets_file"
        secrets = base / sec.secrets_file if sec.secrets_file else None
        try:
            text = read_url(url_env=sec.url_env, secrets_file=secrets)
        except ValueError as exc:
            raise ValueError(f"store.{exc}") from None
    else:
        key, text = "store.url", sec.url
    url = parse_url(text, f"{key}: {secrets}" if secrets else key)
    if key == "store.url" and url_secrets(url):
        raise ValueError(
            f"store.url: a password in {file_kind} is not allowed; put the URL in an "
            "environment variable ([store] url_env) or a secrets file ([store] secrets_file)"
        )
    resolved = _resolve_sqlite(text, base)
    database = url.database or ""
    if url.get_backend_name() == "sqlite" and database not in ("", ":memory:") \
            and not allow_outside:
        _inside(base, base / database, key, database)  # base / an absolute path: that path
    return resolved


def _inside(base: Path, target: Path, key: str, given: str) -> None:
    folder = base.resolve()
    if not target.resolve().is_relative_to(folder):
        raise ValueError(
            f"{key}: {given!r} leads outside the site folder {folder}; keep it inside, or "
            "set allow_paths_outside = true in [site] where the plant keeps its data "
            "elsewhere on purpose"
        )


def _resolve_sqlite(url: str, base: Path) -> str:
    """Make a relative SQLite path relative to the config file's folder."""
    prefix = "sqlite:///"
    if url.startswith(prefix) and not url.startswith(prefix + "/") and url != "sqlite://":
        rel = url[len(prefix):]
        if rel and rel != ":memory:":
            return prefix + str((base / rel).resolve())
    return url
