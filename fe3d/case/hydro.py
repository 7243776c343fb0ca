"""Case sections for the flow boundaries beyond fixed heads: wells, recharge, head-dependent
boundaries (streams, drains) and specified fluxes. Values are SI after validation."""

from __future__ import annotations

from typing import TYPE_CHECKING, Annotated, Literal

from pydantic import BeforeValidator, Field

from fe3d.case.schema_types import (
    Concentration,
    FlowRate,
    Length,
    Name,
    PlanPolygon,
    PositiveLeakance,
    Range,
    Section,
    Velocity,
)
from fe3d.errors import CaseError

if TYPE_CHECKING:
    from fe3d.case.schema import Case

__all__ = ["HeadDependent", "Recharge", "SpecifiedFlux", "Well", "hydro_checks"]


class Well(Section):
    """A vertical well with one or several screens (each [top, bottom] elevation).

    ``rate`` is the total volume rate [m³/s]; ``kind`` says whether water is taken out
    (extraction) or put in (injection); an injection well carries
    ``injection_concentration`` of the species named there (clean water otherwise). The rate
    is split over the screens in proportion to conductivity × screened length. When ``unit``
    names the screened unit, every screen must lie in it at the well (a unit pinched out
    there is an error).
    """

    name: Name
    x: Length
    y: Length
    screens: list[Range] = Field(min_length=1)
    rate: FlowRate = 0.0
    kind: Literal["extraction", "injection", "observation"] = "extraction"
    unit: Name | None = None
    injection_concentration: dict[Name, Concentration] = Field(default_factory=dict)


class Recharge(Section):
    """Recharge on the top face, over the whole top or a plan polygon zone [m/s]."""

    name: Name
    rate: Velocity
    zone: PlanPolygon | None = None


def _renamed_kind(value: object) -> object:
    if value == "river":
        msg = "must be 'stream' or 'drain' ('river' is now called 'stream')"
        raise ValueError(msg)
    return value


class HeadDependent(Section):
    """A head-dependent boundary on a named face (default the top), optionally limited to
    the part inside a plan polygon: q_in = leakance · (stage − h).

    A ``stream`` both gains and loses water; a ``drain`` only removes water (no inflow when
    the head is below the stage). The former word ``river`` for a stream is refused with a
    line that names the new one.
    """

    name: Name
    kind: Annotated[Literal["stream", "drain"], BeforeValidator(_renamed_kind)]
    stage: Length
    leakance: PositiveLeakance
    face: Name = "top"
    zone: PlanPolygon | None = None


class SpecifiedFlux(Section):
    """A specified inward Darcy flux on a named face [m/s] (negative: outward)."""

    face: Name
    flux: Velocity


def hydro_checks(case: Case) -> list[CaseError]:
    """Cross-section rules for wells, recharge, head-dependent zones and specified fluxes."""
    from fe3d.case.geology import point_in_polygon

    errs: list[CaseError] = []
    if not case.fixed_heads and not case.head_dependent:
        errs.append(CaseError("fixed_heads", "(none)", "give at least one fixed head or "
                              "head-dependent boundary, otherwise the head is undetermined"))
    verts, _ = case.outline()
    zmin, top = case.z_bottom_min, case.z_top
    names = [w.name for w in case.wells]
    for w in case.wells:
        key = f"wells[{w.name}]"
        if names.count(w.name) > 1:
            errs.append(CaseError(f"{key}.name", w.name, "well names must be unique"))
        if not point_in_polygon(w.x, w.y, verts, tol=1e-9):
            errs.append(CaseError(key, f"x = {w.x:g} m, y = {w.y:g} m",
                                  "must lie inside the model boundary"))
        for i, (t, b) in enumerate(w.screens):
            if not (t > b and zmin - 1e-9 <= b and t <= top + 1e-9):
                errs.append(CaseError(f"{key}.screens[{i}]", f"[{t:g}, {b:g}] m",
                                      f"must be [top, bottom] with top > bottom inside the "
                                      f"model, [{zmin:g}, {top:g}] m"))
        if w.kind != "observation" and w.rate <= 0:
            errs.append(CaseError(f"{key}.rate", f"{w.rate:g} m^3/s",
                                  f"an {w.kind} well needs a rate greater than zero"))
        if w.injection_concentration and w.kind != "injection":
            errs.append(CaseError(f"{key}.injection_concentration", w.kind,
                                  "only an injection well carries an injection_concentration"))
        for sp_name in w.injection_concentration:
            if sp_name not in case.species:
                errs.append(CaseError(f"{key}.injection_concentration.{sp_name}", sp_name,
                                      f"must name a species: {sorted(case.species)}"))
    faces = case.face_names()
    for hd in case.head_dependent:
        if hd.face not in faces:
            errs.append(CaseError(f"head_dependent[{hd.name}].face", hd.face,
                                  f"must be one of the faces: {faces}"))
    for i, sf in enumerate(case.specified_fluxes):
        if sf.face not in faces:
            errs.append(CaseError(f"specified_fluxes[{i}].face", sf.face,
                                  f"must be one of the faces: {faces}"))
    return errs
