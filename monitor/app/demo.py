"""The demo site: months of simulated historian exports for the example site, with faults.

`write_exports` turns a `model.simulate.Simulation` of a configured site into the daily
CSV exports a historian job would drop into the site's inbox, in the plant units the site
file names (bar, m3/h, %, °C), with local timestamps carrying their UTC offset. A few rows
are spoiled on purpose (a garbled line, a repeated row, a text value) so that the demo
shows the quarantine at work.

The demo scenario is invented: the faults below happen to the example site's branches
on fixed dates, so every run of the demo tells the same story.
"""

from __future__ import annotations

import logging
import os
import shutil
import time
from collections.abc import Sequence
from dataclasses import dataclass, replace
from datetime import UTC, datetime, timedelta
from pathlib import Path
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd

from adapters.units import from_si
from model.branch import Branch, HeldHeader, ReturnHeader
from model.network import ParallelHeader
from model.simulate import (
    BackPressureStep,
    BranchTags,
    Cleaning,
    Fault,
    FoulingRamp,
    FrozenMeter,
    NoiseSpec,
    OperatingSpec,
    Simulation,
    SiteTags,
    StepRestriction,
    simulate,
)
from monitor.site.config import BranchConfig, Site

log = logging.getLogger(__name__)

__all__ = ["DEMO_START", "demo_faults", "simulate_site", "site_tags", "write_exports"]

#: The demo's first day (UTC midnight); fixed so that every demo tells the same story.
DEMO_START = datetime(2026, 4, 1, tzinfo=UTC)


def demo_faults(start: datetime = DEMO_START) -> list[Fault]:
    """What happens at the invented site during the demo period."""
    day = timedelta(days=1)
    return [
        # the reactor exchanger fouls steadily through the warm season
        FoulingRamp("B1-reactor", start + 15 * day, days=140, r_end=1.65, shape="linear"),
        # after a maintenance stop a manual valve on the compressor branch is left throttled
        StepRestriction("B2-compressor", start + 70 * day + timedelta(hours=9.5), ratio=1.5),
        # the make-up station's set point on the process-water header is raised 0.3 bar
        BackPressureStep("B4-process", start + 95 * day + timedelta(hours=14), delta_pa=0.3e5),
        # the quench branch's flow meter freezes for four days
        FrozenMeter("FT-310", start + 120 * day + timedelta(hours=3), start + 124 * day),
        # the chiller condenser is cleaned early in the period
        Cleaning("B6-chiller", start + 5 * day),
    ]


def site_tags(site: Site) -> SiteTags:
    """The simulator's tag map of a configured site."""
    if site.header_temperature_tag is None:
        raise ValueError("the simulator needs a header temperature tag")
    return SiteTags(
        header_pressure=site.header_pressure_tag,
        temperature=site.header_temperature_tag,
        total_flow=site.total_flow_tag,
        pump_speed=site.pump_speed_tag,
        branches={
            b.name: BranchTags(
                flow=b.flow_tag, level=b.level_tag, end_pressure=b.end_pressure_tag,
                valve_position=b.valve_position_tag,
            )
            for b in site.branches
        },
    )


#: How the demo site is run: the drive slows a little at night and at weekends.
DEMO_OPERATION = OperatingSpec(speed_day=1.0, speed_night=0.9, weekend_factor=0.97)


def simulate_site(
    site: Site, start: datetime, end: datetime, *, faults: Sequence[Fault] = (),
    step_s: float = 60.0, seed: int = 7, operation: OperatingSpec = DEMO_OPERATION,
    noise: NoiseSpec | None = None,
) -> Simulation:
    """Simulated historian data of *site* from *start* to *end*.

    Logged termination pressures and levels move around the nominal values of their tags.
    *noise* is the instrument noise (default `NoiseSpec()`, the demo's).
    """
    if site.pump is None:
        raise ValueError("the simulator needs the site's [pump] section")
    return simulate(
        ParallelHeader([_at_nominal(b) for b in site.branches]), site.pump, site_tags(site),
        start=start, end=end, step_s=step_s, faults=faults, seed=seed, operation=operation,
        noise=noise,
    )


def _at_nominal(b: BranchConfig) -> Branch:
    """The branch with a logged header termination held at its tag's nominal pressure."""
    term = b.model.termination
    p = b.nominal.get("end_pressure_pa")
    if p is None:
        return b.model
    if isinstance(term, ReturnHeader):
        return replace(b.model, termination=replace(term, pressure_pa=p))
    if isinstance(term, HeldHeader):
        return replace(b.model, termination=replace(term, set_pressure_pa=p))
    return b.model


@dataclass(frozen=True)
class ExportSummary:
    files: int
    rows: int
    spoiled_rows: int


def write_exports(
    site: Site, sim: Simulation, folder: Path, *, spoil: bool = True
) -> ExportSummary:
    """Write *sim* as daily wide CSV exports (one file per local day) into *folder*."""
    folder.mkdir(parents=True, exist_ok=True)
    zone = ZoneInfo(site.timezone)
    times = pd.DatetimeIndex(sim.times).tz_localize("UTC").tz_convert(zone)
    columns = {}
    for tag, spec in site.tags.items():
        values = sim.values.get(tag)
        if values is None:
            continue
        plant = from_si(values, spec.unit, spec.kind)
        columns[tag] = np.round(plant, _decimals(spec.unit))
    frame = pd.DataFrame(columns, index=times)
    stamps = pd.Series(times.map(lambda t: t.isoformat()), index=times)
    files = rows = spoiled = 0
    for day, part in frame.groupby(times.date):
        text = part.set_index(stamps[part.index].rename("timestamp")).to_csv(na_rep="")
        lines = text.splitlines(keepends=True)
        if spoil and files % 29 == 3 and len(lines) > 10:
            lines.insert(7, "2026-##-## transmission error\n")
            lines.insert(9, lines[8])  # the historian repeats a row
            cells = lines[10].split(",")
            cells[1] = "Bad Input"
            lines[10] = ",".join(cells)
            spoiled += 3
        path = folder / f"cw-loopB_{day:%Y%m%d}.csv"
        path.write_text("".join(lines), encoding="utf-8")
        files += 1
        rows += len(part)
    log.info("wrote %d export files (%d rows) to %s", files, rows, folder)
    return ExportSummary(files=files, rows=rows, spoiled_rows=spoiled)


def _decimals(unit: str) -> int:
    return {"bar": 4, "m3/h": 2, "percent": 2, "degC": 2, "m": 3}.get(unit, 4)


def reset_folder(folder: Path) -> None:
    """Remove a previous demo's files (only inside *folder*)."""
    if folder.exists():
        shutil.rmtree(folder)
    folder.mkdir(parents=True)


@dataclass(frozen=True)
class DemoPaths:
    """Where a demo run put its files."""

    folder: Path
    site_file: Path
    inbox: Path


EXAMPLE_SITE = Path(__file__).resolve().parents[2] / "config" / "example-site.toml"


def prepare_demo(folder: Path, *, days: int, step_s: float, seed: int = 7) -> DemoPaths:
    """A fresh demo folder: the example site file and *days* of simulated exports."""
    from monitor.site.config import load_site

    if not EXAMPLE_SITE.exists():
        raise FileNotFoundError(
            f"the example site file {EXAMPLE_SITE} is missing; run the demo from a checkout"
        )
    reset_folder(folder)
    site_file = folder / "site.toml"
    shutil.copyfile(EXAMPLE_SITE, site_file)
    site = load_site(site_file)
    end = DEMO_START + timedelta(days=days)
    sim = simulate_site(site, DEMO_START, end, faults=demo_faults(), step_s=step_s, seed=seed)
    inbox = folder / "inbox"
    write_exports(site, sim, inbox)
    # the historian dropped these exports long ago: they are settled, not being written
    settled = time.time() - 3600
    for path in inbox.iterdir():
        os.utime(path, (settled, settled))
    return DemoPaths(folder=folder, site_file=site_file, inbox=inbox)
