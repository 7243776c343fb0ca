"""Field types shared by the case sections: quantities with units converted to SI, names,
ranges, plan polygons, and the frozen section base class."""

from __future__ import annotations

import math
from typing import Annotated

from pydantic import AfterValidator, BaseModel, BeforeValidator, ConfigDict, Field

from fe3d.case.plausible import BOUNDS, CONDUCTIVITY_RANGE_M_PER_DAY, MIN_POROSITY
from fe3d.units import to_si, unit_is


def _bounded(x: float, dimension: str | None) -> float:
    bound = BOUNDS.get(dimension) if dimension is not None else None
    problem = None if bound is None else bound.problem(x)
    if problem is not None:
        raise ValueError(problem)
    return x


def _quantity(dimension: str, *, bounded: bool = True) -> BeforeValidator:
    """Text with a unit → SI value, refused outside the dimension's bound
    (:data:`fe3d.case.plausible.BOUNDS`) when ``bounded``."""
    return BeforeValidator(lambda v: _bounded(to_si(v, dimension),
                                              dimension if bounded else None))


def _positive(x: float) -> float:
    if not x > 0:
        msg = "must be greater than zero"
        raise ValueError(msg)
    return x


def _non_negative(x: float) -> float:
    if not x >= 0:
        msg = "must be zero or greater"
        raise ValueError(msg)
    return x


def _fraction(x: float) -> float:
    if not (0 < x <= 1) or math.isnan(x):
        msg = "must be in (0, 1]"
        raise ValueError(msg)
    return x


def _conductivity_range(x: float) -> float:
    lo, hi = (v / 86400.0 for v in CONDUCTIVITY_RANGE_M_PER_DAY)
    if not lo <= x <= hi:
        msg = (f"must be between {CONDUCTIVITY_RANGE_M_PER_DAY[0]:g} and "
               f"{CONDUCTIVITY_RANGE_M_PER_DAY[1]:g} m/d (here {x * 86400.0:.3g} m/d; natural "
               "materials span about 1e-9 m/d, unfractured rock, to 1e5 m/d, clean gravel: "
               "Freeze & Cherry 1979, Groundwater, Table 2.2); check the unit")
        raise ValueError(msg)
    return x


def _usable_porosity(x: float) -> float:
    if x < MIN_POROSITY:
        msg = (f"must be at least {MIN_POROSITY:g} (common practice, no source: below it the "
               "pore velocity q/θ grows without bound)")
        raise ValueError(msg)
    if x == 1.0:
        msg = ("must be below 1: a porosity of 1 leaves no solids, yet the material has a "
               "bulk_density")
        raise ValueError(msg)
    return x


def _concentration_unit(u: str) -> str:
    if not unit_is(u, "concentration"):
        msg = "must be a mass-per-volume unit such as 'mg/L', 'ug/L' or 'kg/m^3'"
        raise ValueError(msg)
    return u


def _time_unit(u: str) -> str:
    if not unit_is(u, "time"):
        msg = "must be a time unit such as 'd', 'yr' or 's'"
        raise ValueError(msg)
    return u


Length = Annotated[float, _quantity("length")]
PositiveLength = Annotated[float, _quantity("length"), AfterValidator(_positive)]
NonNegativeLength = Annotated[float, _quantity("length"), AfterValidator(_non_negative)]
Time = Annotated[float, _quantity("time"), AfterValidator(_non_negative)]
PositiveTime = Annotated[float, _quantity("time"), AfterValidator(_positive)]
PositiveVelocity = Annotated[float, _quantity("velocity"), AfterValidator(_positive)]
Concentration = Annotated[float, _quantity("concentration"), AfterValidator(_non_negative)]
PositiveConcentration = Annotated[float, _quantity("concentration"), AfterValidator(_positive)]
PositiveDensity = Annotated[float, _quantity("density"), AfterValidator(_positive)]
Partition = Annotated[float, _quantity("specific_volume"), AfterValidator(_non_negative)]
Diffusivity = Annotated[float, _quantity("diffusivity"), AfterValidator(_non_negative)]
Fraction = Annotated[float, AfterValidator(_fraction)]
Porosity = Annotated[float, AfterValidator(_fraction), AfterValidator(_usable_porosity)]
Conductivity = Annotated[float, _quantity("velocity", bounded=False), AfterValidator(_positive),
                         AfterValidator(_conductivity_range)]
Name = Annotated[str, Field(pattern=r"^[A-Za-z][A-Za-z0-9_\-]*$", max_length=64)]
Range = tuple[Length, Length]
PlanPoint = tuple[Length, Length]
PlanPolygon = Annotated[list[PlanPoint], Field(min_length=3)]
Velocity = Annotated[float, _quantity("velocity")]
Angle = Annotated[float, _quantity("angle")]
SecondOrderRate = Annotated[float, _quantity("second_order_rate"), AfterValidator(_positive)]
ReactionRate = Annotated[float, _quantity("reaction_rate"), AfterValidator(_positive)]
MassRate = Annotated[float, _quantity("mass_rate"), AfterValidator(_positive)]
MassRatio = Annotated[float, _quantity("mass_ratio"), AfterValidator(_non_negative)]
FlowRate = Annotated[float, _quantity("flow_rate"), AfterValidator(_non_negative)]
PositiveLeakance = Annotated[float, _quantity("leakance"), AfterValidator(_positive)]


class Section(BaseModel):
    """Base of every case section: frozen, unknown keys refused."""

    model_config = ConfigDict(frozen=True, extra="forbid", populate_by_name=True)


