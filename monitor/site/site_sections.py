"""The site file's sections, part 1: quantities with units, keys, and the sections that
describe the site — [site], [store], [source], [header], [pump], each branch's elements and
termination, and the [flow_drop] alarm settings.

Validation uses pydantic; `monitor.site.config` turns a validated file into model objects and
reports every problem as a `ConfigError` (defined here, the loader's contract name).
"""

from __future__ import annotations

import re
import zoneinfo
from typing import Annotated, Any, Literal

from pydantic import (
    BaseModel,
    BeforeValidator,
    ConfigDict,
    Field,
    field_validator,
    model_validator,
)

from adapters.source_tools import pattern_problem
from adapters.units import UnitError, parse_quantity


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
#: (see `monitor.app.windows.windows`).
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


class StrictSection(BaseModel):
    """The base of every section of the site file: unknown keys are refused, and a
    parsed section cannot be changed."""

    model_config = ConfigDict(extra="forbid", frozen=True)


class TagRef(StrictSection):
    """A historian tag and the unit it is logged in."""

    tag: str = Field(min_length=1)
    unit: str
    low: float | None = None
    high: float | None = None
    #: typical value in the tag's unit: what `curve` uses, and the fallback baseline
    nominal: float | None = None


class SiteSection(StrictSection):
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


class StoreSection(StrictSection):
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


class SourceSection(StrictSection):
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


class HeaderSection(StrictSection):
    pressure: TagRef
    temperature: TagRef | None = None
    total_flow: TagRef | None = None
    design_temperature: Annotated[float, _quantity("degC")] = 20.0
    #: below this header pressure the pumps count as stopped (no [pump] section needed)
    running_pressure: Pressure | None = None


class PumpPoint(StrictSection):
    flow: Flow
    head: Length


class PumpSection(StrictSection):
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


class PipeSpec(StrictSection):
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


class ValveSpec(StrictSection):
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


class EquipmentSpec(StrictSection):
    rated_dp: Pressure
    rated_flow: Flow
    exponent: float = Field(default=1.9, ge=1.0, le=2.2)
    name: str = ""


class ElementSpec(StrictSection):
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


class TerminationSpec(StrictSection):
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


class FlowDropSection(StrictSection):
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


class BranchSection(StrictSection):
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
