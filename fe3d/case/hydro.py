"""Case sections for the flow boundaries beyond fixed heads: wells, recharge, head-dependent
boundaries (streams, drains) and specified fluxes. Values are SI after validation."""

from __future__ import annotations

from typing import Literal

from pydantic import Field

from fe3d.case.schema_types import (
    Length,
    Name,
    PlanPolygon,
    PositiveLeakance,
    PositiveRate,
    Range,
    Section,
    Velocity,
)

__all__ = ["HeadDependent", "Recharge", "SpecifiedFlux", "Well"]


class Well(Section):
    """A vertical well with one or several screens (each [top, bottom] elevation).

    ``rate`` is the total volume rate [m³/s]; ``kind`` says whether water is taken out
    (extraction) or put in (injection). The rate is split over the screens in proportion to
    conductivity × screened length.
    """

    name: Name
    x: Length
    y: Length
    screens: list[Range] = Field(min_length=1)
    rate: PositiveRate = 0.0
    kind: Literal["extraction", "injection", "observation"] = "extraction"


class Recharge(Section):
    """Recharge on the top face, over the whole top or a plan polygon zone [m/s]."""

    name: Name
    rate: Velocity
    zone: PlanPolygon | None = None


class HeadDependent(Section):
    """A head-dependent boundary on (part of) the top face: q_in = leakance · (stage − h).

    A ``river`` both gains and loses water; a ``drain`` only removes water (no inflow when
    the head is below the stage). ``bed_bottom`` is the elevation of the bed base; it must lie
    above the model base under the zone.
    """

    name: Name
    kind: Literal["river", "drain"]
    stage: Length
    leakance: PositiveLeakance
    zone: PlanPolygon
    bed_bottom: Length | None = None


class SpecifiedFlux(Section):
    """A specified inward Darcy flux on a named face [m/s] (negative: outward)."""

    face: Name
    flux: Velocity
