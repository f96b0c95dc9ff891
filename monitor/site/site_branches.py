"""Each branch of the site file built into what the daemon uses: its model (elements and
termination), its tags and limits (`BranchConfig`), and its flow-drop alarm (`FlowDrop`).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from adapters.records import TagSpec
from adapters.units import UnitError, converter
from model.branch import Branch, HeldHeader, OpenDischarge, ReturnHeader, Tank
from model.elements import ControlValve, Elevation, Equipment, Fittings, Pipe
from monitor.site.site_sections import (
    BranchSection,
    ElementSpec,
    FlowDropSection,
    TagRef,
)


@dataclass(frozen=True)
class FlowDrop:
    """A branch's relative flow-drop alarm, resolved (see `FlowDropSection`)."""

    fraction: float = 0.05  # [-]
    reference_s: float = 1800.0  # [s]
    hold_s: float = 60.0  # [s]
    deadband: float = 0.02  # [-]
    off_delay_s: float = 30.0  # [s]
    follow_header: bool = True


def flow_drop_alarm(site: FlowDropSection, branch: FlowDropSection | None, has_meter: bool,
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


def checked_tag(ref: TagRef, kind: str, tags: dict[str, TagSpec]) -> str:
    """The tag of *ref*, registered in *tags* with its unit converter for a quantity of
    *kind*; a unit that is not one of *kind* is a `ValueError`."""
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


def build_branch(
    sec: BranchSection, tags: dict[str, TagSpec], site_cleaning_limit: float
) -> BranchConfig:
    """The model, tags and settings of one ``[[branch]]`` section (its tags registered
    in *tags*); *site_cleaning_limit* [-] is the default of its cleaning limit."""
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
            level_tag = checked_tag(t.level, "level", tags)
            nominal["level_m"] = _required_nominal(t.level, "level")
            termination = Tank(base_elevation_m=base, level_m=None, gas_pressure_pa=t.gas_pressure)
        else:
            termination = Tank(
                base_elevation_m=base, level_m=float(t.level or 0.0), gas_pressure_pa=t.gas_pressure
            )
    else:
        cls = HeldHeader if t.kind == "held_header" else ReturnHeader
        if isinstance(t.pressure, TagRef):
            end_tag = checked_tag(t.pressure, "pressure", tags)
            nominal["end_pressure_pa"] = _required_nominal(t.pressure, "pressure")
            value = None
        else:
            value = t.pressure
        termination = (
            HeldHeader(set_pressure_pa=value, elevation_m=t.elevation)
            if cls is HeldHeader
            else ReturnHeader(pressure_pa=value, elevation_m=t.elevation)
        )
    flow_tag = checked_tag(sec.flow, "flow", tags) if sec.flow else None
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
        tag = checked_tag(v.position_tag, "position", tags) if v.position_tag else None
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
