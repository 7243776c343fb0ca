"""What the long-term plume writes: the steady field of every species and its measures above
the limit (theory.md T17, O1, O2).

:func:`measure_steady_plume` measures each species' steady field exactly on the P1 field
(:func:`fe3d.post.plume.measure_plume`); :func:`write_steady_plume` writes
``steady_plume.vtu`` (one point array per species, in the case's concentration unit) and
``steady_plume.csv`` (one row per species, units in the header).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from fe3d.case.parts import Ground
from fe3d.case.schema import Case
from fe3d.flow.solve import FlowField
from fe3d.mesh.materials import unit_materials, unit_values
from fe3d.mesh.site_mesh import SiteMesh
from fe3d.post.files import write_text_atomic
from fe3d.post.plume import PlumeMeasures, SorbedPhase, measure_plume, measuring_frames
from fe3d.post.tables import csv_text
from fe3d.post.vtk import write_field
from fe3d.transport.steady import SteadySpecies, SteadyTransport
from fe3d.units import from_si

__all__ = ["STEADY_CSV", "STEADY_VTU", "SteadyPlumeRow", "measure_steady_plume",
           "write_steady_plume"]

STEADY_VTU = "steady_plume.vtu"
STEADY_CSV = "steady_plume.csv"
DAY = 86400.0


@dataclass(frozen=True)
class SteadyPlumeRow:
    """One species' long-term plume (SI units): its steady solve, the limit [kg/m³], the
    largest and smallest nodal value [kg/m³] (a value below zero is an undershoot of the
    operator, T17) and the region above the limit."""

    steady: SteadySpecies
    limit: float
    peak: float
    lowest: float
    measures: PlumeMeasures


def measure_steady_plume(case: Case, site: SiteMesh, flow: FlowField,
                         steady: SteadyTransport) -> tuple[SteadyPlumeRow, ...]:
    """Measure each species' steady field above its limit, from its source along the mean
    flow (theory.md O1, O2)."""
    frames = measuring_frames(case, site, flow)
    materials, names = unit_materials(Ground.of(case), site)
    bulk_density = unit_values(materials, "bulk_density")
    rows = []
    for s in steady.species:
        spec = case.species[s.name]
        sorbed = SorbedPhase(bulk_density, site.cell_layer,
                             tuple(spec.isotherm_of(m) for m in names))
        c = s.concentration
        rows.append(SteadyPlumeRow(
            steady=s, limit=spec.limit, peak=float(c.max()), lowest=float(c.min()),
            measures=measure_plume(site.points, site.cells, site.cell_volumes(), flow.porosity,
                                   sorbed, c, spec.limit, frames[s.name])))
    return tuple(rows)


def write_steady_plume(folder: Path, case: Case, site: SiteMesh,
                       rows: tuple[SteadyPlumeRow, ...]) -> tuple[Path, Path]:
    """Write ``steady_plume.vtu`` and ``steady_plume.csv`` into ``folder`` (created when
    missing); returns their paths."""
    folder.mkdir(parents=True, exist_ok=True)
    unit = case.output.concentration_unit
    scale = from_si(1.0, unit)
    vtu = write_field(site, folder / STEADY_VTU, point_data={
        f"{r.steady.name} [{unit}]": r.steady.concentration * scale for r in rows})
    table = folder / STEADY_CSV
    write_text_atomic(table, _table(rows, unit))
    return vtu, table


def _table(rows: tuple[SteadyPlumeRow, ...], unit: str) -> str:
    """The CSV text: one row per species; blank cells where nothing exceeds the limit."""
    scale = from_si(1.0, unit)
    header = ["species", f"limit [{unit}]", f"largest concentration [{unit}]",
              f"smallest concentration [{unit}]", "volume above limit [m3]",
              "dissolved mass above limit [kg]", "sorbed mass above limit [kg]",
              "farthest extent from source [m]", "downstream of source [m]",
              "upstream of source [m]", "across flow min [m]", "across flow max [m]",
              "lowest elevation [m]", "highest elevation [m]", "input [kg/d]",
              "outflow [kg/d]", "decayed [kg/d]", "balance relative error [-]",
              "sources counted", "sources left out", "operator"]
    out = []
    for r in rows:
        m, b = r.measures, r.steady.balance
        out.append([r.steady.name, _g(r.limit * scale), _g(r.peak * scale),
                    _g(r.lowest * scale), _g(m.volume), _g(m.dissolved_mass),
                    _g(m.sorbed_mass), _g(m.extent), _g(m.downstream), _g(m.upstream),
                    *_pair(m.across), *_pair(m.elevation), _g(b.source_input * DAY),
                    _g(sum(b.outflow.values()) * DAY), _g(b.decayed * DAY),
                    f"{b.relative_error:.3e}", " ".join(r.steady.counted_sources),
                    " ".join(r.steady.left_out_sources), r.steady.operator])
    return csv_text(header, out)


def _g(x: float) -> str:
    return f"{x:.8g}"


def _pair(pair: tuple[float, float] | None) -> list[str]:
    return ["", ""] if pair is None else [_g(pair[0]), _g(pair[1])]
