"""The site file's sections, part 2: how the site is watched — [analysis], [diagnosis],
[schedule], [report], [notify] (e-mail, webhook) and [cost] with its energy price.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Annotated, Any, Literal

from pydantic import (
    BeforeValidator,
    Field,
    field_validator,
    model_validator,
)

from monitor.site.site_sections import Delay, Duration, Period, StrictSection, window_problem


class AnalysisSection(StrictSection):
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


class DiagnosisSection(StrictSection):
    """[diagnosis]: the spans of the diagnosis as times of the plant, converted to
    windows of ``[analysis] window`` (`monitor.analysis.findings.DiagnosisSettings.for_window`).
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


class ScheduleSection(StrictSection):
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


class ReportSection(StrictSection):
    folder: str = "reports"


class EmailSection(StrictSection):
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


class WebhookSection(StrictSection):
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


class NotifySection(StrictSection):
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


class CostSection(StrictSection):
    """What the extra pump energy costs: ``energy_price = "0.14 EUR/kWh"``."""

    energy_price: Annotated[EnergyPrice, BeforeValidator(parse_energy_price)]
