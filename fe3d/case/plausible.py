"""Physical bounds that refuse a value, and usual ranges that only warn.

A *bound* marks what cannot be meant (a porosity of 1 with a bulk density, a conductivity
faster than any gravel, a limit of 1e300 kg/m³, a strike of 1e300°): the case is refused
with one line naming the key. A *usual range* marks what is possible but unusual (a porosity
of 0.8, a dispersivity larger than the model): one warning line naming the key, the value
with its unit and the usual range; the run goes on.

Where each number comes from is said beside it. Values "from memory" were recalled, not
looked up; "common practice, no source" marks a rule of thumb.
"""

from __future__ import annotations

import math
from collections.abc import Iterator
from dataclasses import dataclass
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from fe3d.case.schema import Case

__all__ = ["BOUNDS", "CONDUCTIVITY_RANGE_M_PER_DAY", "MAX_COORDINATE_M", "MIN_POROSITY",
           "Bound", "plausibility_warnings"]

DAY = 86400.0
YEAR = 365.25 * DAY  # the Julian year, as pint's "yr"

CONDUCTIVITY_RANGE_M_PER_DAY = (1e-12, 1e5)
"""Accepted hydraulic conductivity [m/d]. Natural materials span about 1e-9 m/d (unfractured
igneous rock) to about 1e5 m/d (clean gravel, ~1 m/s): Freeze & Cherry 1979, Groundwater,
Table 2.2, recalled from memory; the lower bound leaves three decades of margin. A value
outside is taken as a unit slip (m/s written for m/d, cm/s for m/s)."""

MIN_POROSITY = 1e-4
"""Smallest accepted porosity [-] (common practice, no source: the effective porosity of
fractured rock is rarely set lower, and below it the pore velocity q/θ grows without bound)."""

MAX_COORDINATE_M = 1e8
"""Largest accepted coordinate, elevation or length [m]: UTM northings reach 1e7 m; 1e8 m is
more than twice the Earth's circumference (common practice, no source)."""


@dataclass(frozen=True)
class Bound:
    """Accepted magnitude of one kind of quantity, in SI: ``lowest ≤ |value| ≤ highest``
    (``lowest`` 0: no lower bound), with the same bounds in a unit people write."""

    highest: float
    shown_unit: str
    unit_factor: float  # SI value of one shown_unit
    why: str
    lowest: float = 0.0

    def problem(self, x: float) -> str | None:
        """What is wrong with SI value ``x`` (None when it is accepted)."""
        if not math.isfinite(x):
            return "must be a finite number"
        if abs(x) > self.highest or (x != 0 and abs(x) < self.lowest):
            lo = f"{self.lowest / self.unit_factor:g} to " if self.lowest else "at most "
            return (f"must be {lo}{self.highest / self.unit_factor:g} {self.shown_unit} in size "
                    f"(here {x / self.unit_factor:.3g} {self.shown_unit}; {self.why}); "
                    "check the number and the unit")
        return None


BOUNDS: dict[str, Bound] = {
    "length": Bound(MAX_COORDINATE_M, "m", 1.0, "coordinates, elevations and sizes of a "
                    "site; common practice, no source"),
    "time": Bound(1e11 * YEAR, "yr", YEAR, "longer than the age of the universe, 1.4e10 yr"),
    "velocity": Bound(100.0 / DAY, "m/d", 1.0 / DAY, "recharge and boundary fluxes; a spreading "
                      "basin infiltrates a few m/d, common practice, no source"),
    "concentration": Bound(1e4, "kg/m^3", 1.0, "ten times the density of water; no solution "
                           "holds more"),
    "density": Bound(1e4, "kg/m^3", 1.0, "bulk densities lie between peat, ~100 kg/m^3, and "
                     "ore, ~5000 kg/m^3; from memory", lowest=10.0),
    "specific_volume": Bound(1e6, "L/kg", 1e-3, "distribution coefficients of strongly sorbing "
                             "species reach ~1e5 L/kg; from memory"),
    "diffusivity": Bound(1e-6, "m^2/s", 1.0, "solutes in water diffuse at ~1e-9 m^2/s, gases "
                         "in air at ~1e-5 m^2/s; from memory"),
    "flow_rate": Bound(1e6 / DAY, "m^3/d", 1.0 / DAY, "the largest collector wells give ~1e5 "
                       "m^3/d; common practice, no source"),
    "leakance": Bound(1e5 / DAY, "1/d", 1.0 / DAY, "a streambed of 1e4 m/d over 0.1 m; "
                      "common practice, no source"),
    "angle": Bound(2.0 * math.pi, "deg", math.pi / 180.0, "a full turn"),
    "mass_ratio": Bound(1.0, "kg/kg", 1.0, "a mass ratio cannot exceed 1"),
    "mass_rate": Bound(1.0, "kg/s", 1.0, "86 t/d; common practice, no source"),
}
"""Hard bounds by dimension name (as in :data:`fe3d.units.DIMENSIONS`); a value outside is
refused. Dimensions not listed (reaction rates) are only required to be finite."""


@dataclass(frozen=True)
class Usual:
    """The usual range of one input: ``low ≤ value ≤ high`` in ``unit`` and where it is from."""

    low: float
    high: float
    unit: str
    source: str

    def warning(self, key: str, value: float) -> str | None:
        """One warning line for ``value`` [in ``unit``] outside the range, else None."""
        if self.low <= value <= self.high:
            return None
        unit = f" {self.unit}" if self.unit else ""
        return (f"{key} = {value:.3g}{unit}: outside the usual range {self.low:g}–"
                f"{self.high:g}{unit} ({self.source}); check it")


POROSITY = Usual(0.01, 0.7, "", "Freeze & Cherry 1979, Groundwater, Table 2.4: dense crystalline "
                 "rock near 0, clay up to 0.70; from memory")
BULK_DENSITY = Usual(1000.0, 2500.0, "kg/m^3", "unconsolidated sediments and porous rock; "
                     "common practice, no source")
GRAIN_DENSITY = Usual(2000.0, 3200.0, "kg/m^3", "bulk_density / (1 - porosity): quartz 2650, "
                      "most rock-forming minerals 2600-3000; from memory")
DIFFUSION = Usual(1e-11, 1e-8, "m^2/s", "free-water diffusion coefficients of dissolved "
                  "species, ~1e-10 to ~1e-8 at 25 °C; from memory")
KD = Usual(0.0, 1000.0, "L/kg", "above it the species hardly moves: retardation of thousands; "
           "common practice, no source")
RECHARGE = Usual(0.0, 2.0, "m/yr", "a part of yearly rainfall, which rarely exceeds 3 m; "
                 "common practice, no source")
WELL_RATE = Usual(0.0, 2e4, "m^3/d", "a large supply well gives ~100 L/s (8640 m^3/d); common "
                  "practice, no source")
SOURCE_CONCENTRATION = Usual(0.0, 400.0, "kg/m^3", "above the solubility of common salt, "
                             "~360 g/L; from memory")
LIMIT = Usual(1e-12, 10.0, "kg/m^3", "drinking-water limits run from ng/L to a few g/L; "
              "common practice, no source")
DIP = Usual(-90.0, 90.0, "deg", "a dip is at most 90°")


def _material_warnings(case: Case, extent: float) -> Iterator[str]:
    for name, m in case.materials.items():
        key = f"materials.{name}"
        yield from _present(POROSITY.warning(f"{key}.porosity", m.porosity))
        yield from _present(BULK_DENSITY.warning(f"{key}.bulk_density", m.bulk_density))
        if m.porosity < 1.0:
            yield from _present(GRAIN_DENSITY.warning(
                f"{key}.bulk_density / (1 - porosity)", m.bulk_density / (1.0 - m.porosity)))
        if m.diffusion_coefficient > 0:
            yield from _present(DIFFUSION.warning(f"{key}.diffusion_coefficient",
                                                  m.diffusion_coefficient))
        yield from _present(DIP.warning(f"{key}.conductivity_dip",
                                        math.degrees(m.conductivity_dip)))
        if m.k_vertical > m.horizontal_conductivity:
            yield (f"{key}.vertical_conductivity = {m.k_vertical * DAY:.3g} m/d: exceeds the "
                   f"horizontal one ({m.horizontal_conductivity * DAY:.3g} m/d); layered "
                   "sediments usually have K_v ≤ K_h (common practice, no source)")
        a_l, a_t, a_v = m.longitudinal_dispersivity, m.transverse_dispersivity, m.alpha_vertical
        if a_t > a_l:
            yield (f"{key}.transverse_dispersivity = {a_t:g} m: exceeds the longitudinal one "
                   f"({a_l:g} m); field values are about a tenth of it (Gelhar, Welty & "
                   "Rehfeldt 1992, A critical review of data on field-scale dispersion in "
                   "aquifers; from memory)")
        if a_v > a_t:
            yield (f"{key}.vertical_dispersivity = {a_v:g} m: exceeds the horizontal transverse "
                   f"one ({a_t:g} m); vertical values are usually smaller (Gelhar, Welty & "
                   "Rehfeldt 1992; from memory)")
        if extent > 0 and a_l > extent:
            yield (f"{key}.longitudinal_dispersivity = {a_l:g} m: exceeds the model's plan "
                   f"extent ({extent:.4g} m); it is usually about a tenth of the travel "
                   "distance (common practice, no source)")


def _species_warnings(case: Case) -> Iterator[str]:
    for name, sp in case.species.items():
        key = f"species.{name}"
        kds = sp.kd.items() if isinstance(sp.kd, dict) else [("", sp.kd)]
        for mat, kd in kds:
            where = f"{key}.kd.{mat}" if mat else f"{key}.kd"
            yield from _present(KD.warning(where, kd * 1e3))
        yield from _present(LIMIT.warning(f"{key}.limit", sp.limit))
        step = case.time.step
        if sp.half_life is not None and step is not None and sp.half_life < step:
            yield (f"{key}.half_life = {sp.half_life:.3g} s: shorter than time.step "
                   f"({step:.3g} s); most of the species decays within one step")
        peaks = [s.peak_concentration for s in case.sources if s.species == name]
        known = [p for p in peaks if p is not None]
        if known and len(known) == len(peaks) and max(known) < sp.limit \
                and sp.initial_concentration < sp.limit:
            yield (f"{key}.limit = {sp.limit:.3g} kg/m^3: above every source's concentration "
                   f"(largest {max(known):.3g} kg/m^3); nothing can exceed it")


def _flow_warnings(case: Case) -> Iterator[str]:
    for r in case.recharge:
        yield from _present(RECHARGE.warning(f"recharge[{r.name}].rate", r.rate * YEAR))
    for w in case.wells:
        yield from _present(WELL_RATE.warning(f"wells[{w.name}].rate", w.rate * DAY))
    for s in case.sources:
        if s.concentration is not None:
            yield from _present(SOURCE_CONCENTRATION.warning(
                f"sources[{s.name}].concentration", s.concentration))


def _present(line: str | None) -> Iterator[str]:
    if line is not None:
        yield line


def plausibility_warnings(case: Case) -> list[str]:
    """One line per input of ``case`` outside its usual range (key, value with its unit,
    the usual range and its source). Never raises: a warning does not stop a run."""
    verts = case.outline()[0]
    extent = math.hypot(max(v[0] for v in verts) - min(v[0] for v in verts),
                        max(v[1] for v in verts) - min(v[1] for v in verts)) if verts else 0.0
    return [*_material_warnings(case, extent), *_species_warnings(case), *_flow_warnings(case)]
