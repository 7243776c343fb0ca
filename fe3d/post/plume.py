"""The part of a plume above a limit, measured exactly on the P1 field; its contour surface.

:func:`measure_plume` takes the region where the field exceeds the limit from
:mod:`fe3d.post.iso_volume` (whole cells and the pieces of the cells the limit cuts) and
returns its volume, the dissolved and sorbed mass in it, its centroid and its extents along
and across the mean flow and in elevation, measured from the species' source (theory.md O1,
O2).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from fe3d._typing import FloatArray, IndexArray
from fe3d.case.schema import Case
from fe3d.flow.solve import FlowField
from fe3d.mesh.site_mesh import SiteMesh
from fe3d.post.cut_grid import crossing_grid
from fe3d.post.files import write_atomic
from fe3d.post.iso_volume import region_above
from fe3d.transport.model import ISOTHERMS

__all__ = ["MeasuringFrame", "PlumeMeasures", "SorbedPhase", "measure_plume",
           "measuring_frames", "write_isosurface"]


@dataclass(frozen=True)
class MeasuringFrame:
    """Where a plume's distances are measured from.

    ``origin`` [m] is the plan centre of the species' source, or of the nodes of its face
    patch when the source is on a face (``face`` names it, else None); ``along`` is the plan
    unit vector of the mean flow; "across" is ``along`` turned 90° anticlockwise (to the left
    looking downstream)."""

    origin: tuple[float, float]
    along: tuple[float, float]
    face: str | None = None


@dataclass(frozen=True)
class SorbedPhase:
    """What sorbs in each cell: the bulk density ρ_b [kg/m³] of each unit ``(n_units,)``,
    the unit of each cell ``(n_cells,)`` and the isotherm of each unit (law name and SI
    parameters, as :meth:`fe3d.case.schema.Species.isotherm_of` gives them; theory.md
    R1–R3). Nothing is held per cell but the units (the mesh's own array)."""

    unit_bulk_density: FloatArray
    unit_of_cell: IndexArray
    isotherms: tuple[tuple[str, dict[str, float]], ...]

    @property
    def is_linear(self) -> bool:
        """Every unit has a linear isotherm."""
        return all(law == "linear" for law, _ in self.isotherms)

    def linear_capacity(self) -> FloatArray:
        """ρ_b K_d per cell [-] (linear isotherms only)."""
        kd = np.array([par["kd"] for _, par in self.isotherms])
        return (self.unit_bulk_density * kd)[self.unit_of_cell]

    def sorbed_density(self, c: FloatArray, cell_ids: IndexArray) -> FloatArray:
        """ρ_b s(c) [kg/m³] at concentrations ``c`` [kg/m³] in cells ``cell_ids`` (same
        shape)."""
        out = np.zeros_like(c)
        units = self.unit_of_cell[cell_ids]
        for u, (law, par) in enumerate(self.isotherms):
            here = units == u
            if np.any(here):
                out[here] = ISOTHERMS[law](c[here], **par)[0] * self.unit_bulk_density[u]
        return out


@dataclass(frozen=True)
class PlumeMeasures:
    """The region where a species exceeds its limit at one time (SI units).

    ``volume`` [m³] of aquifer; ``dissolved_mass`` ∫θc and ``sorbed_mass`` ∫ρ_b s(c) [kg]
    over it; ``centroid`` [m] of the region; ``downstream`` and ``upstream`` [m] the farthest
    distances along and against the mean flow from the source (from the face patch for a
    face source; ≥ 0, 0 when the region does not reach that side); ``across`` [m] the
    smallest and largest signed distance across the flow; ``elevation`` [m] its lowest and
    highest point; ``extent`` [m] the farthest plan distance from the source's centre, or,
    for a face source, ``downstream``. The tuples are None when nothing exceeds the limit
    (every number is then 0)."""

    volume: float
    dissolved_mass: float
    sorbed_mass: float
    centroid: tuple[float, float, float] | None
    downstream: float
    upstream: float
    across: tuple[float, float] | None
    elevation: tuple[float, float] | None
    extent: float

    @classmethod
    def nothing(cls) -> PlumeMeasures:
        """Nothing above the limit."""
        return cls(0.0, 0.0, 0.0, None, 0.0, 0.0, None, None, 0.0)


def measure_plume(points: FloatArray, cells: IndexArray, cell_volume: FloatArray,
                  porosity: FloatArray, sorbed: SorbedPhase, conc: FloatArray, limit: float,
                  frame: MeasuringFrame) -> PlumeMeasures:
    """Measure the region where the P1 field ``conc`` [kg/m³] exceeds ``limit``.

    Parameters
    ----------
    points, cells, cell_volume
        Nodes [m] ``(3, n_nodes)``, tetrahedra ``(4, n_cells)``, their volumes [m³].
    porosity
        θ per cell [-], ``(n_cells,)``.
    sorbed
        Bulk density and isotherms per cell; with linear isotherms the sorbed mass is the
        exact ρ_b K_d ∫c, otherwise the 4-point degree-2 rule on every part (theory.md O1).
    conc, limit
        Nodal concentration ``(n_nodes,)`` and the limit [kg/m³].
    frame
        Source and mean-flow direction the distances are measured from.
    """
    region = region_above(points, cells, cell_volume, conc, limit)
    if region.is_empty:
        return PlumeMeasures.nothing()
    volume = region.volume
    if sorbed.is_linear:
        sorbed_mass = region.integral(sorbed.linear_capacity())
    else:
        sorbed_mass = region.integral_of_function(sorbed.sorbed_density)
    centroid = region.first_moment() / volume
    # distances over the region's vertices: its extreme points are among them (exact)
    x = region.vertices()
    dx, dy = x[0] - frame.origin[0], x[1] - frame.origin[1]
    ux, uy = frame.along
    along, across = dx * ux + dy * uy, -dx * uy + dy * ux
    downstream = max(float(along.max()), 0.0)
    return PlumeMeasures(
        volume=volume, dissolved_mass=region.integral(porosity), sorbed_mass=sorbed_mass,
        centroid=(float(centroid[0]), float(centroid[1]), float(centroid[2])),
        downstream=downstream, upstream=max(float(-along.min()), 0.0),
        across=(float(across.min()), float(across.max())),
        elevation=(float(x[2].min()), float(x[2].max())),
        extent=downstream if frame.face is not None else float(np.hypot(dx, dy).max()))


def write_isosurface(path: Path, points: FloatArray, cells: IndexArray, conc: FloatArray,
                     level: float, *, name: str) -> Path:
    """Contour surface c = level of a P1 field as .vtp (an empty file when nothing exceeds).

    Only the cells the level reaches (some node at or above it, some at or below) are handed
    to VTK's contour filter (:func:`~fe3d.post.cut_grid.crossing_grid`): the surface lies
    in them alone, and the filter then reads a few per cent of the mesh."""
    import pyvista as pv

    grid = crossing_grid(points, cells, conc - level, {name: conc})
    surf = pv.PolyData() if grid is None else grid.contour([level], scalars=name)
    write_atomic(path, lambda p: surf.save(str(p)))
    return path


def measuring_frames(case: Case, site: SiteMesh, flow: FlowField) -> dict[str, MeasuringFrame]:
    """The frame each species' plume is measured in (theory.md O2).

    The direction is that of the volume-weighted mean horizontal Darcy flux over the model
    (+x when it vanishes). The origin is the plan centre of the species' first source; for
    a source on a patch of a side face, the mean plan position of the face's nodes inside
    the patch's ranges (the distance downstream is then the distance from the face when the
    face lies across the flow; a patch on the top or bottom face is measured from its plan
    centre like a box); a daughter without a source of its own takes its parent's; a
    species with no source at all, the plan centre of the model.
    """
    vol = np.abs(site.cell_volumes())
    mean = (flow.darcy_flux[:2] * vol).sum(axis=1)
    norm = float(np.hypot(*mean))
    along = (float(mean[0]) / norm, float(mean[1]) / norm) if norm > 0 else (1.0, 0.0)
    centre = (float(site.points[0].mean()), float(site.points[1].mean()))
    frames: dict[str, MeasuringFrame] = {}

    def frame(name: str) -> MeasuringFrame:
        if name in frames:
            return frames[name]
        src = next((s for s in case.sources if s.species == name), None)
        parent = case.species[name].parent
        if src is None:
            return frame(parent) if parent is not None else MeasuringFrame(centre, along)
        if src.shape == "face_patch" and src.face not in (None, "top", "bottom"):
            nodes = site.face_nodes(src.face)
            inside = np.ones(nodes.size, dtype=bool)
            for axis, rng in enumerate((src.x, src.y, src.z)):
                if rng is not None:
                    x = site.points[axis, nodes]
                    inside &= (x >= min(rng)) & (x <= max(rng))
            patch = site.points[:2, nodes[inside] if np.any(inside) else nodes]
            return MeasuringFrame((float(patch[0].mean()), float(patch[1].mean())), along,
                                  face=src.face)
        return MeasuringFrame(src.plan_centre or centre, along)

    for name in case.species:
        frames[name] = frame(name)
    return frames
