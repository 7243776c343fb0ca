"""The part of a plume above a limit: volume, dissolved mass, extent, iso-surface."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from fe3d._typing import FloatArray, IndexArray
from fe3d.post.files import write_atomic

__all__ = ["PlumeExtent", "plume_extent", "write_isosurface"]


@dataclass(frozen=True)
class PlumeExtent:
    """Aquifer volume [m³] and dissolved mass [kg] above the limit, and the farthest plan
    distance [m] from the origin (the source) of a node above the limit (0 when none)."""

    volume: float
    dissolved_mass: float
    extent: float


def plume_extent(points: FloatArray, node_volume: FloatArray, node_pore_volume: FloatArray,
                 conc: FloatArray, limit: float, origin: tuple[float, float]) -> PlumeExtent:
    """Measure the region where the nodal concentration exceeds ``limit``.

    ``node_volume`` and ``node_pore_volume`` are the lumped volumes ∫φ_j dV and ∫θφ_j dV
    [m³] of the nodes, so the volume is Σ_j V_j [c_j > limit] and the mass Σ_j θV_j c_j over
    the same nodes: a nodal (lumped) measure, exact as the mesh is refined.
    """
    above = conc > limit
    if not np.any(above):
        return PlumeExtent(0.0, 0.0, 0.0)
    d = np.hypot(points[0, above] - origin[0], points[1, above] - origin[1])
    return PlumeExtent(volume=float(node_volume[above].sum()),
                       dissolved_mass=float((node_pore_volume * conc)[above].sum()),
                       extent=float(d.max()))


def write_isosurface(path: Path, points: FloatArray, cells: IndexArray, conc: FloatArray,
                     level: float, *, name: str) -> Path:
    """Contour surface c = level of a P1 field as .vtp (an empty file when nothing exceeds)."""
    import pyvista as pv

    grid = pv.UnstructuredGrid({pv.CellType.TETRA: np.ascontiguousarray(cells.T)},
                               np.ascontiguousarray(points.T))
    grid.point_data[name] = conc
    surf = grid.contour([level], scalars=name) if conc.max() > level > conc.min() else \
        pv.PolyData()
    write_atomic(path, lambda p: surf.save(str(p)))
    return path
