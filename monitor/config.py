"""Site configuration: a TOML file in, validated, turned into model objects.

The file describes one site: where the readings come from, where results go, the supply
header's tags, the pump, and each branch's pipe, fittings, valves, equipment and
termination. Quantities carry their units (``"110 m"``, ``"0.5 bar"``, ``"140 m3/h"``);
they are converted to SI here, once, so that `model` only sees SI floats.

Validation uses pydantic; every problem is reported as a `ConfigError` whose message names
the file, the key path and what is wrong, e.g.::

    config/site.toml: branch[2].elements[0].pipe.length: '110 x' is not a quantity …

Exceptions::

    ConfigError (ValueError)   the file is missing, not TOML, or does not validate
"""

from __future__ import annotations

import math
import re
import tomllib
import zoneinfo
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from datetime import timedelta
from pathlib import Path
from typing import Annotated, Any, Literal

import numpy as np
from pydantic import (
    BaseModel,
    BeforeValidator,
    ConfigDict,
    Field,
    ValidationError,
    field_validator,
    model_validator,
)

from adapters.base import TagSpec
from adapters.credentials import parse_url, read_url, url_secrets
from adapters.source_tools import pattern_problem
from adapters.units import UnitError, converter, parse_quantity
from model.branch import Branch, HeldHeader, OpenDischarge, ReturnHeader, Tank
from model.elements import ControlValve, Elevation, Equipment, Fittings, Pipe
from model.network import ParallelHeader, PumpCurve

__all__ = [
    "SITE_KEY_RULE",
    "BranchConfig",
    "ConfigError",
    "EnergyPrice",
    "Site",
    "load_site",
    "parse_site",
    "read_store_url",
    "site_key_problem",
]


class ConfigError(ValueError):
    """The site configuration is missing, malformed or inconsistent."""


def _quantity(si_unit: str, *, lowest: Literal["any", "zero", "positive"] = "any") -> Any:
    def parse(value: Any) -> float:
        try:
            si = parse_quantity(value, si_unit)
        except UnitError as exc:
            raise ValueError(str(exc)) from None
        if lowest == "positive" and not si > 0:
            raise ValueError(f"{value!r} must be more than zero")
        if lowest == "zero" and not si >= 0:
            raise ValueError(f"{value!r} must not be negative")
        return si

    return BeforeValidator(parse)


Length = Annotated[float, _quantity("m")]
Pressure = Annotated[float, _quantity("Pa")]
Flow = Annotated[float, _quantity("m3/s")]
Duration = Annotated[float, _quantity("s")]
Fraction = Annotated[float, _quantity("dimensionless")]
#: a period that must be longer than zero (a window, a sampling period)
Period = Annotated[float, _quantity("s", lowest="positive")]
#: a delay that may be zero but not negative
Delay = Annotated[float, _quantity("s", lowest="zero")]
FlowFloor = Annotated[float, _quantity("m3/s", lowest="zero")]


#: Window sizes shorter than a day must divide 24 h into whole seconds
#: (see `monitor.windows.windows`).
DAY_S = 86_400


def window_problem(seconds: float) -> str | None:
    """Why a window of *seconds* cannot be used, or None when it can: a whole number of
    days, or a whole number of seconds that divides 24 h (1, 5, 10, 15, 30 min, 1, 2, 3,
    4, 6, 8, 12 h …)."""
    if not seconds > 0:
        return f"must be positive, got {seconds:g} s"
    if seconds >= DAY_S:
        if seconds % DAY_S:
            return (f"{seconds / 3600:g} h is not a whole number of days; use whole days "
                    "(\"1 day\", \"7 days\") or a duration that divides 24 h")
        return None
    if seconds != int(seconds) or DAY_S % int(seconds):
        shown = f"{seconds / 60:g} min" if seconds >= 60 else f"{seconds:g} s"
        return (f"{shown} does not divide 24 h, so the windows of each day could not "
                "start at the same local times; use a duration that divides 24 h (1, 2, 5, "
                "10, 15, 20, 30 min, 1, 2, 3, 4, 6, 8 or 12 h) or whole days")
    return None


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class TagRef(_Strict):
    """A historian tag and the unit it is logged in."""

    tag: str = Field(min_length=1)
    unit: str
    low: float | None = None
    high: float | None = None
    #: typical value in the tag's unit: what `curve` uses, and the fallback baseline
    nominal: float | None = None


class SiteSection(_Strict):
    name: str
    timezone: str = "UTC"
    #: let ``[report] folder`` and the SQLite store file lie outside the site file's
    #: folder (e.g. site file in /etc/branchwatch, data in /var/lib/branchwatch)
    allow_paths_outside: bool = False

    @field_validator("timezone")
    @classmethod
    def _known_zone(cls, value: str) -> str:
        try:
            zoneinfo.ZoneInfo(value)
        except (zoneinfo.ZoneInfoNotFoundError, ValueError):
            raise ValueError(
                f"unknown time zone {value!r}; use an IANA name such as 'Europe/Berlin'"
            ) from None
        return value


#: a site key: the name of a site's schema in a PostgreSQL store (``[store] schema`` of
#: a site file, ``key`` of a fleet file's [[site]] entry); PostgreSQL cuts names at 63
#: bytes and keeps ``pg_`` for itself
_SITE_KEY = re.compile(r"[a-z][a-z0-9_]{0,39}")
SITE_KEY_RULE = ("lowercase letters, digits and underscores, starting with a letter, at "
                 "most 40 characters, not starting with pg_")


def site_key_problem(key: object) -> str | None:
    """Why *key* cannot name a site's schema, or None where it can.

    >>> site_key_problem("bw_fenwick_b") is None
    True
    >>> site_key_problem("pg_a").startswith("'pg_a' is not a site key (lowercase")
    True
    """
    if isinstance(key, str) and _SITE_KEY.fullmatch(key) and not key.startswith("pg_"):
        return None
    return f"{key!r} is not a site key ({SITE_KEY_RULE})"


class StoreSection(_Strict):
    """Where results go: ``url`` (no password), or ``url_env`` / ``secrets_file`` for a
    URL with credentials, read at load (see `adapters.credentials`); ``schema``: the
    PostgreSQL schema the site's tables are kept in (a fleet's shared store)."""

    url: str = "sqlite:///branchwatch.db"
    url_env: str | None = Field(default=None, min_length=1)
    secrets_file: str | None = Field(default=None, min_length=1)
    schema_name: str | None = Field(default=None, alias="schema")

    model_config = ConfigDict(extra="forbid", frozen=True, populate_by_name=True)

    @field_validator("schema_name")
    @classmethod
    def _a_site_key(cls, value: str | None) -> str | None:
        problem = site_key_problem(value) if value is not None else None
        if problem:
            raise ValueError(problem)
        return value

    @model_validator(mode="after")
    def _one_place(self) -> StoreSection:
        given = [k for k in ("url", "url_env", "secrets_file") if k in self.model_fields_set]
        if len(given) > 1:
            raise ValueError(f"give one of url, url_env, secrets_file (got {', '.join(given)})")
        return self


class SourceSection(_Strict):
    kind: Literal["csv", "sql"] = "csv"
    # csv
    path: str | None = None
    layout: Literal["auto", "wide", "long"] = "auto"
    delimiter: str = ","
    decimal: str = "."
    pattern: str = "*.csv"
    #: a file modified more recently than this is still being written: left for later
    settle_seconds: Duration = 5.0
    # sql
    url_env: str | None = None
    secrets_file: str | None = None
    table: str | None = None
    schema_name: str | None = Field(default=None, alias="schema")
    time_column: str = "time"
    tag_column: str = "tag"
    value_column: str = "value"
    quality_column: str | None = None
    #: each incremental read starts this long before the watermark, so rows a historian
    #: back-fills late (store-and-forward) are picked up; the store drops the doubles
    overlap: Duration = 7200.0
    # both
    good_quality: list[str] = Field(default_factory=lambda: ["", "good", "GOOD", "192", "G"])
    #: a reading already stored that a later export brings with another value: "refuse"
    #: keeps the first stored value, "apply" takes the new one; both journal it, and an
    #: applied one has its analysed windows fitted again
    corrections: Literal["refuse", "apply"] = "refuse"

    model_config = ConfigDict(extra="forbid", frozen=True, populate_by_name=True)

    @field_validator("pattern")
    @classmethod
    def _inside_folder(cls, value: str) -> str:
        problem = pattern_problem(value)
        if problem:
            raise ValueError(problem)
        return value

    @field_validator("overlap")
    @classmethod
    def _not_negative(cls, value: float) -> float:
        if value < 0:
            raise ValueError(f"must be zero or a positive duration such as \"2 h\", got {value} s")
        return value

    @model_validator(mode="after")
    def _kind_needs(self) -> SourceSection:
        if self.kind == "csv" and not self.path:
            raise ValueError("a csv source needs 'path', the folder the exports land in")
        if self.kind == "sql" and not self.table:
            raise ValueError("a sql source needs 'table'")
        if self.kind == "sql" and not (self.url_env or self.secrets_file):
            raise ValueError(
                "a sql source needs 'url_env' (the environment variable holding the "
                "database URL) or 'secrets_file'; credentials never go in this file"
            )
        return self


class HeaderSection(_Strict):
    pressure: TagRef
    temperature: TagRef | None = None
    total_flow: TagRef | None = None
    design_temperature: Annotated[float, _quantity("degC")] = 20.0
    #: below this header pressure the pumps count as stopped (no [pump] section needed)
    running_pressure: Pressure | None = None


class PumpPoint(_Strict):
    flow: Flow
    head: Length


class PumpSection(_Strict):
    curve: list[PumpPoint] = Field(min_length=3)
    count: int = Field(default=1, ge=1, le=8)
    speed: TagRef | None = None
    design_speed: Fraction = 1.0
    efficiency: Fraction = 0.70
    #: the older place of [header] running_pressure, still read
    running_pressure: Pressure | None = None

    @field_validator("efficiency")
    @classmethod
    def _efficiency_range(cls, value: float) -> float:
        if not 0 < value <= 1:
            raise ValueError(
                f"{value:g} is not an efficiency: give a fraction above 0 and at most 1 "
                "(e.g. 0.72 or '72 %')"
            )
        return value


class PipeSpec(_Strict):
    length: Length
    inner_diameter: Length | None = None
    nps: float | None = None
    schedule: str = "40"
    material: str | None = None
    roughness: Length | None = None

    @model_validator(mode="after")
    def _size_given(self) -> PipeSpec:
        if (self.inner_diameter is None) == (self.nps is None):
            raise ValueError("give exactly one of 'inner_diameter' or 'nps' (with 'schedule')")
        return self


class ValveSpec(_Strict):
    kvs: float | None = Field(default=None, gt=0, description="Kvs in m3/h at 1 bar")
    cv: float | None = Field(default=None, gt=0, description="Cv in US gpm at 1 psi")
    characteristic: Literal["linear", "equal_percentage", "quick_opening"] = "equal_percentage"
    rangeability: float = Field(default=50.0, gt=1)
    position: Fraction = 1.0
    position_tag: TagRef | None = None

    @model_validator(mode="after")
    def _one_size(self) -> ValveSpec:
        if (self.kvs is None) == (self.cv is None):
            raise ValueError("give exactly one of 'kvs' [m3/h] or 'cv' [US gpm]")
        return self


class EquipmentSpec(_Strict):
    rated_dp: Pressure
    rated_flow: Flow
    exponent: float = Field(default=1.9, ge=1.0, le=2.2)
    name: str = ""


class ElementSpec(_Strict):
    """One entry of a branch's ``elements`` list: exactly one key."""

    pipe: PipeSpec | None = None
    fittings: dict[str, int] | None = None
    loss_coefficient: float | None = Field(default=None, ge=0)
    valve: ValveSpec | None = None
    equipment: EquipmentSpec | None = None
    elevation: Length | None = None

    @model_validator(mode="after")
    def _exactly_one(self) -> ElementSpec:
        given = [k for k, v in self.__dict__.items() if v is not None]
        if len(given) != 1:
            raise ValueError(
                "each element is a table with exactly one of pipe, fittings, "
                f"loss_coefficient, valve, equipment, elevation (got {given or 'none'})"
            )
        return self


class TerminationSpec(_Strict):
    kind: Literal["open", "tank", "held_header", "return_header"]
    elevation: Length = 0.0
    base_elevation: Length | None = None
    level: TagRef | Length | None = None
    gas_pressure: Pressure = 0.0
    pressure: TagRef | Pressure | None = None

    @model_validator(mode="after")
    def _kind_needs(self) -> TerminationSpec:
        if self.kind == "tank" and self.level is None:
            raise ValueError("a tank termination needs 'level' (a tag or a fixed level)")
        if self.kind in ("held_header", "return_header") and self.pressure is None:
            raise ValueError(f"a {self.kind} termination needs 'pressure' (a tag or a value)")
        return self


class FlowDropSection(_Strict):
    """[flow_drop] (site-wide) or a branch's ``flow_drop = {…}``: the relative flow-drop
    alarm, off unless ``enabled``. A branch's keys override the site's; a branch that
    says ``enabled = false`` is left out of a site-wide alarm. Flow only (no pump curve,
    no fit), so it serves a test rig or a branch without a model.

    fraction : alarm at a flow this share below the branch's recent level ("5 %" or 0.05)
    reference : the recent level is the flow's median over this long before the drop
    hold : the drop must last this long before it is annunciated
    deadband : the condition clears within ``fraction - deadband`` of the level
    off_delay : and after this long there
    follow_header : scale the level with the header pressure, so a flow change the
        header explains (a pump turned down) is not a drop; used only where the header
        gauge resolves the branch's driving pressure finely (default true)
    """

    enabled: bool | None = None
    follow_header: bool | None = None
    fraction: Fraction | None = None
    reference: Period | None = None
    hold: Delay | None = None
    deadband: Fraction | None = None
    off_delay: Delay | None = None

    @field_validator("fraction")
    @classmethod
    def _share(cls, value: float | None) -> float | None:
        if value is not None and not 0 < value < 1:
            raise ValueError(f"must be a share between 0 and 1 like '5 %' or 0.05, got {value}")
        return value

    @field_validator("deadband")
    @classmethod
    def _small_share(cls, value: float | None) -> float | None:
        if value is not None and not 0 <= value < 1:
            raise ValueError(f"must be a share from 0 to 1 like '2 %' or 0.02, got {value}")
        return value


class BranchSection(_Strict):
    name: str = Field(min_length=1)
    description: str = ""
    flow: TagRef | None = None
    min_flow: FlowFloor = 0.0
    #: None: the site's [analysis] cleaning_limit
    cleaning_limit: float | None = Field(default=None, gt=1.0)
    termination: TerminationSpec
    elements: list[ElementSpec] = Field(min_length=1)
    check_valve: bool | None = None
    #: this branch's relative flow-drop alarm (keys override the site's [flow_drop])
    flow_drop: FlowDropSection | None = None


class AnalysisSection(_Strict):
    window: Period = 86_400.0
    #: samples are averaged onto a grid of this period before fitting
    sample_period: Period = 60.0
    #: relative expanded (95 %) uncertainty of the flow meters, for the header balance
    meter_uncertainty: float = Field(default=0.02, gt=0, lt=0.5)
    cleaning_limit: float = Field(default=1.5, gt=1.0)
    min_samples: int = Field(default=30, ge=3)
    low_flow_on_delay: Delay = 600.0
    low_flow_off_delay: Delay = 300.0
    #: a latching low-flow alarm stays in after the flow has come back, until it is
    #: acknowledged and reset ('branchwatch alarms --reset')
    low_flow_latching: bool = False
    #: a flow or pressure reading that does not move at all for this long is frozen
    frozen_hold: Period = 3600.0
    #: the steady-state test: over this window (default: a quarter of the analysis
    #: window, at most 15 min, at least 6 grid steps) the header pressure and a branch's
    #: flow may vary (std / mean) by at most these shares
    steady_window: Duration | None = None
    steady_pressure_band: float = Field(default=0.03, gt=0, lt=1)
    steady_flow_band: float = Field(default=0.05, gt=0, lt=1)
    #: a tag whose newest reading is older than this raises a stale-data alarm; default
    #: (none given) max(1 h, 4 x [schedule] ingest_every, 3 x sample_period)
    stale_after: Duration | None = None
    #: a condition that comes and goes (low flow, a sick meter, a header imbalance) is
    #: one finding until it has stayed away this long (a week: the plant's load cycle)
    clear_after: Duration = 7 * 86_400.0

    @field_validator("window")
    @classmethod
    def _day_aligned(cls, value: float) -> float:
        problem = window_problem(value)
        if problem is not None:
            raise ValueError(problem)
        return value

    @field_validator("stale_after", "steady_window")
    @classmethod
    def _positive_age(cls, value: float | None) -> float | None:
        if value is not None and not value > 0:
            raise ValueError(f"must be a positive duration like '2 h', got {value} s")
        return value

    @field_validator("clear_after")
    @classmethod
    def _not_negative(cls, value: float) -> float:
        if not value >= 0:
            raise ValueError(f"must be a duration of 0 or more like '7 days', got {value} s")
        return value


class DiagnosisSection(_Strict):
    """[diagnosis]: the spans of the diagnosis as times of the plant, converted to
    windows of ``[analysis] window`` (`monitor.findings.DiagnosisSettings.for_window`).
    The defaults are those of daily windows: a baseline of 14 days, the level over 14
    days, a trend judged over 20 to 180 days. A rig or a commissioning run with minute
    windows sets them in minutes or hours (README, "test rig and commissioning runs").
    """

    #: the good windows after the start (or a cleaning) that set the reference level
    baseline: Period | None = None
    #: the trailing windows whose level predicts the next one (steps, restrictions)
    level: Period | None = None
    #: the shortest and the longest stretch a fouling trend is judged over
    trend_shortest: Period | None = None
    trend_longest: Period | None = None

    @model_validator(mode="after")
    def _ordered(self) -> DiagnosisSection:
        if (self.trend_shortest is not None and self.trend_longest is not None
                and self.trend_longest < self.trend_shortest):
            raise ValueError("trend_longest must not be shorter than trend_shortest")
        return self


class ScheduleSection(_Strict):
    """When the daemon works, in the site's local time.

    The daily jobs default to early morning but outside 01:00–04:00, where daylight-saving
    changes make local times repeat or vanish.
    """

    ingest_every: Duration = 900.0
    analyze_at: str = "05:30"
    report_at: str = "06:15"

    @field_validator("analyze_at", "report_at")
    @classmethod
    def _clock(cls, value: str) -> str:
        try:
            hour, minute = (int(x) for x in value.split(":"))
        except ValueError:
            raise ValueError(f"{value!r} is not a time of day like '05:30'") from None
        if not (0 <= hour < 24 and 0 <= minute < 60):
            raise ValueError(f"{value!r} is not a time of day like '05:30'")
        if 1 <= hour < 4:
            raise ValueError(
                f"{value!r} falls in 01:00-04:00, where daylight-saving changes repeat or "
                "skip local times; pick a time outside that band"
            )
        return value


class ReportSection(_Strict):
    folder: str = "reports"


class EmailSection(_Strict):
    """[notify.email]: alarms and the morning digest by e-mail (SMTP)."""

    host: str = Field(min_length=1)
    port: int | None = Field(default=None, ge=1, le=65535)
    security: Literal["starttls", "tls", "none"] = "starttls"
    sender: str
    to: list[str] = Field(min_length=1)
    username: str | None = None
    #: where the login's password is: an environment variable or a secrets file (never
    #: this file)
    password_env: str | None = None
    secrets_file: str | None = None
    timeout: Duration = 10.0
    digest: bool = True

    @model_validator(mode="after")
    def _login(self) -> EmailSection:
        from adapters.notify import check_address

        check_address(self.sender, what="sender")
        for addr in self.to:
            check_address(addr, what="recipient")
        given = [k for k in ("password_env", "secrets_file") if getattr(self, k)]
        if self.username and len(given) != 1:
            raise ValueError(
                "a login ('username') needs exactly one of 'password_env' (an environment "
                "variable) or 'secrets_file' holding the password; never the password itself")
        if given and not self.username:
            raise ValueError(f"'{given[0]}' is given but no 'username' to log in with")
        return self


class WebhookSection(_Strict):
    """[notify.webhook]: alarms and the digest as JSON posted to a URL."""

    #: the URL, when it carries no token; else ``url_env`` or ``secrets_file``
    url: str | None = None
    url_env: str | None = None
    secrets_file: str | None = None
    timeout: Duration = 10.0
    digest: bool = True

    @model_validator(mode="after")
    def _one_url(self) -> WebhookSection:
        given = [k for k in ("url", "url_env", "secrets_file") if getattr(self, k)]
        if len(given) != 1:
            raise ValueError("give exactly one of 'url', 'url_env' or 'secrets_file'")
        return self


class NotifySection(_Strict):
    """[notify]: who is told what, and how hard branchwatch tries."""

    #: alarms of this priority or higher are sent as soon as they activate
    send_at_once: Literal["high", "medium", "low"] = "medium"
    #: an alarm older than this when first seen (a backfill's replay) is not sent
    fresh_for: Duration = 6 * 3600.0
    #: a message that could not go for this long is given up (shown in status and report)
    retry_for: Duration = 24 * 3600.0
    email: EmailSection | None = None
    webhook: WebhookSection | None = None
@dataclass(frozen=True)
class EnergyPrice:
    """What a kWh of pump energy costs the site, in the site's currency."""

    per_kwh: float  # [currency/kWh]
    currency: str

    def __str__(self) -> str:
        return f"{self.per_kwh:g} {self.currency}/kWh"


_PRICE = re.compile(r"\s*(\d+(?:\.\d*)?|\.\d+)\s*([A-Za-z]{1,5}|[€$£¥])\s*/\s*(kWh|MWh)\s*")


def parse_energy_price(value: Any) -> EnergyPrice:
    """``"0.14 EUR/kWh"`` or ``"140 USD/MWh"`` → price per kWh and currency.

    >>> parse_energy_price("140 USD/MWh")
    EnergyPrice(per_kwh=0.14, currency='USD')
    """
    match = _PRICE.fullmatch(value) if isinstance(value, str) else None
    if match is None:
        raise ValueError(f"{value!r} is not an energy price like '0.14 EUR/kWh' or "
                         "'140 USD/MWh' (a number, a currency, per kWh or MWh)")
    number, currency, unit = match.groups()
    per_kwh = float(number) / (1000.0 if unit == "MWh" else 1.0)
    return EnergyPrice(per_kwh=round(per_kwh, 12), currency=currency)


class CostSection(_Strict):
    """What the extra pump energy costs: ``energy_price = "0.14 EUR/kWh"``."""

    energy_price: Annotated[EnergyPrice, BeforeValidator(parse_energy_price)]


class SiteFile(_Strict):
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
class FlowDrop:
    """A branch's relative flow-drop alarm, resolved (see `FlowDropSection`)."""

    fraction: float = 0.05  # [-]
    reference_s: float = 1800.0  # [s]
    hold_s: float = 60.0  # [s]
    deadband: float = 0.02  # [-]
    off_delay_s: float = 30.0  # [s]
    follow_header: bool = True


def _flow_drop(site: FlowDropSection, branch: FlowDropSection | None, has_meter: bool,
               modulated: bool) -> FlowDrop | None:
    """The branch's flow-drop alarm from the site's and the branch's keys (None: off).

    A site-wide ``[flow_drop]`` leaves out the branches without a meter and those whose
    control valve logs its position (*modulated*): that valve moves the flow on purpose,
    and each move would read as a drop. Such a branch can still enable it itself."""
    def pick(key: str) -> Any:
        own = getattr(branch, key) if branch is not None else None
        return own if own is not None else getattr(site, key)

    if not pick("enabled"):
        return None
    if not has_meter:
        if branch is not None and branch.enabled:
            raise ValueError("flow_drop is enabled but the branch has no flow meter "
                             "('flow'); enable it on metered branches only")
        return None  # a site-wide alarm skips the branches without a meter
    if modulated and not (branch is not None and branch.enabled):
        return None
    default = FlowDrop()
    got = FlowDrop(
        fraction=pick("fraction") if pick("fraction") is not None else default.fraction,
        reference_s=pick("reference") or default.reference_s,
        hold_s=pick("hold") if pick("hold") is not None else default.hold_s,
        deadband=pick("deadband") if pick("deadband") is not None else default.deadband,
        off_delay_s=pick("off_delay") if pick("off_delay") is not None else default.off_delay_s,
        follow_header=pick("follow_header") if pick("follow_header") is not None
        else default.follow_header,
    )
    if not got.deadband < got.fraction:
        raise ValueError(f"flow_drop.deadband ({got.deadband:g}) must be smaller than "
                         f"flow_drop.fraction ({got.fraction:g})")
    return got


@dataclass(frozen=True)
class BranchConfig:
    """One branch: its model, its tags and its limits (SI)."""

    name: str
    description: str
    model: Branch
    flow_tag: str | None
    level_tag: str | None
    end_pressure_tag: str | None
    valve_position_tag: str | None
    min_flow_m3s: float
    cleaning_limit: float
    #: typical values of the logged conditions (level_m, end_pressure_pa, valve_position)
    #: from the tags' ``nominal``: used by `curve` and when a tag has no data
    nominal: Mapping[str, float] = field(default_factory=dict)
    #: the relative flow-drop alarm, when enabled for this branch
    flow_drop: FlowDrop | None = None

    @property
    def logged_conditions(self) -> dict[str, str]:
        """Condition keyword → tag, for the conditions this branch logs."""
        pairs = {
            "level_m": self.level_tag,
            "end_pressure_pa": self.end_pressure_tag,
            "valve_position": self.valve_position_tag,
        }
        return {k: v for k, v in pairs.items() if v is not None}


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


def _tag(ref: TagRef, kind: str, tags: dict[str, TagSpec]) -> str:
    try:
        convert = converter(ref.unit, kind)
    except UnitError:
        raise ValueError(
            f"tag {ref.tag!r}: unit {ref.unit!r} is not a unit of {kind} "
            f"(e.g. {_EXAMPLE_UNITS[kind]})"
        ) from None
    low = _finite(convert, ref.low, ref, "low")
    high = _finite(convert, ref.high, ref, "high")
    spec = TagSpec(tag=ref.tag, unit=ref.unit, kind=kind, low=low, high=high)
    old = tags.get(ref.tag)
    if old is not None and old != spec:
        raise ValueError(f"tag {ref.tag!r} is configured twice with different units or kinds")
    tags[ref.tag] = spec
    return ref.tag


_EXAMPLE_UNITS = {
    "pressure": "bar, kPa, psi",
    "flow": "m3/h, l/s, gpm",
    "temperature": "degC, degF",
    "level": "m, ft",
    "position": "percent",
    "speed": "percent",
}


def _nominal(ref: TagRef | None, kind: str) -> float | None:
    if ref is None or ref.nominal is None:
        return None
    return _finite(converter(ref.unit, kind), ref.nominal, ref, "nominal")


def _finite(convert: Any, value: float | None, ref: TagRef, key: str) -> float | None:
    """*value* of *ref* converted to SI, refused when it does not fit in a float."""
    if value is None:
        return None
    with np.errstate(over="ignore", invalid="ignore"):
        si = float(convert(value))
    if not math.isfinite(si):
        raise ValueError(f"tag {ref.tag!r}: {key} = {value!r} {ref.unit} is too large")
    return si


def _build(doc: SiteFile, path: Path) -> Site:
    tags: dict[str, TagSpec] = {}
    header_p = _tag(doc.header.pressure, "pressure", tags)
    header_t = _tag(doc.header.temperature, "temperature", tags) if doc.header.temperature else None
    total_q = _tag(doc.header.total_flow, "flow", tags) if doc.header.total_flow else None

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
            speed_tag = _tag(doc.pump.speed, "speed", tags)

    branches = []
    for i, sec in enumerate(doc.branch):
        where = f"branch[{i}] ({sec.name})"
        try:
            branch = _build_branch(sec, tags, doc.analysis.cleaning_limit)
            branches.append(replace(branch, flow_drop=_flow_drop(
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


def _build_branch(
    sec: BranchSection, tags: dict[str, TagSpec], site_cleaning_limit: float
) -> BranchConfig:
    elements: list[Any] = []
    pipe_d: float | None = None
    valve_tag = None
    nominal: dict[str, float] = {}
    for j, el in enumerate(sec.elements):
        try:
            built, diameter, tag = _build_element(el, pipe_d, tags)
        except (ValueError, KeyError) as exc:
            raise ValueError(f"elements[{j}]: {exc}") from None
        elements.append(built)
        if diameter is not None:
            pipe_d = diameter
        valve_tag = tag or valve_tag
        if el.valve is not None and el.valve.position_tag is not None:
            value = _nominal(el.valve.position_tag, "position")
            nominal["valve_position"] = value if value is not None else el.valve.position

    t = sec.termination
    level_tag = end_tag = None
    termination: Any
    if t.kind == "open":
        termination = OpenDischarge(elevation_m=t.elevation)
    elif t.kind == "tank":
        base = t.base_elevation if t.base_elevation is not None else t.elevation
        if isinstance(t.level, TagRef):
            level_tag = _tag(t.level, "level", tags)
            nominal["level_m"] = _required_nominal(t.level, "level")
            termination = Tank(base_elevation_m=base, level_m=None, gas_pressure_pa=t.gas_pressure)
        else:
            termination = Tank(
                base_elevation_m=base, level_m=float(t.level or 0.0), gas_pressure_pa=t.gas_pressure
            )
    else:
        cls = HeldHeader if t.kind == "held_header" else ReturnHeader
        if isinstance(t.pressure, TagRef):
            end_tag = _tag(t.pressure, "pressure", tags)
            nominal["end_pressure_pa"] = _required_nominal(t.pressure, "pressure")
            value = None
        else:
            value = t.pressure
        termination = (
            HeldHeader(set_pressure_pa=value, elevation_m=t.elevation)
            if cls is HeldHeader
            else ReturnHeader(pressure_pa=value, elevation_m=t.elevation)
        )
    flow_tag = _tag(sec.flow, "flow", tags) if sec.flow else None
    model = Branch(sec.name, elements, termination, check_valve=sec.check_valve)
    return BranchConfig(
        name=sec.name,
        description=sec.description,
        model=model,
        flow_tag=flow_tag,
        level_tag=level_tag,
        end_pressure_tag=end_tag,
        valve_position_tag=valve_tag,
        min_flow_m3s=sec.min_flow,
        cleaning_limit=(sec.cleaning_limit if sec.cleaning_limit is not None
                        else site_cleaning_limit),
        nominal=nominal,
    )


def _required_nominal(ref: TagRef, kind: str) -> float:
    value = _nominal(ref, kind)
    if value is None:
        raise ValueError(
            f"tag {ref.tag!r} needs 'nominal' (its typical value in {ref.unit}), used for "
            "the design curve and when the tag has no data"
        )
    return value


def _build_element(
    el: ElementSpec, pipe_d: float | None, tags: dict[str, TagSpec]
) -> tuple[Any, float | None, str | None]:
    """Model element for one config entry, the pipe diameter it sets, its position tag."""
    if el.pipe is not None:
        ps = el.pipe
        if ps.nps is not None:
            pipe = Pipe.from_nominal(
                ps.length, ps.nps, schedule=ps.schedule, material=ps.material or "carbon steel"
            )
            if ps.roughness is not None:
                pipe = Pipe(ps.length, pipe.inner_diameter_m, ps.roughness)
        else:
            assert ps.inner_diameter is not None  # checked by PipeSpec
            roughness = ps.roughness if ps.roughness is not None else 4.5e-5
            pipe = Pipe(ps.length, ps.inner_diameter, roughness)
        return pipe, pipe.inner_diameter_m, None
    if el.fittings is not None or el.loss_coefficient is not None:
        if pipe_d is None:
            raise ValueError("fittings need a pipe before them in the list (for their size)")
        return Fittings(pipe_d, el.fittings or {}, extra_k=el.loss_coefficient or 0.0), None, None
    if el.valve is not None:
        v = el.valve
        tag = _tag(v.position_tag, "position", tags) if v.position_tag else None
        if v.kvs is not None:
            valve = ControlValve(
                v.kvs, characteristic=v.characteristic, rangeability=v.rangeability,
                position=v.position,
            )
        else:
            assert v.cv is not None
            valve = ControlValve.from_cv(
                v.cv, characteristic=v.characteristic, rangeability=v.rangeability,
                position=v.position,
            )
        return valve, None, tag
    if el.equipment is not None:
        e = el.equipment
        return Equipment(e.rated_dp, e.rated_flow, exponent=e.exponent), None, None
    assert el.elevation is not None
    return Elevation(el.elevation), None, None
