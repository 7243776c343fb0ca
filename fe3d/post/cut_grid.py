"""The cells a level set crosses, as a small VTK grid: what a slice or a contour filter
needs to read, instead of the whole mesh (pyvista).

A plane or an iso-surface of a P1 field lies only in the cells where the nodal signed
distance (to the plane, or of the field from its level) is ≥ 0 at some node and ≤ 0 at
another; VTK's filters give the same pieces from these cells as from the whole mesh, and
read a few per cent of it.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from fe3d._typing import FloatArray, IndexArray
from fe3d.p1 import cells_spanning_zero

__all__ = ["crossing_grid"]


def crossing_grid(points: FloatArray, cells: IndexArray, distance: FloatArray,
                  point_data: dict[str, FloatArray]) -> Any | None:
    """A ``pyvista.UnstructuredGrid`` of the tetrahedra (``cells`` ``(4, m)`` into
    ``points`` ``(3, n)`` [m]) that the zero level of the nodal ``distance`` ``(n,)``
    crosses or touches, with the nodal arrays ``point_data`` (each ``(n,)``) restricted to
    their nodes; None when no cell is crossed."""
    import pyvista as pv

    cut = cells[:, cells_spanning_zero(cells, distance)]
    if cut.size == 0:
        return None
    nodes, local = np.unique(cut, return_inverse=True)
    grid = pv.UnstructuredGrid(
        {pv.CellType.TETRA: np.ascontiguousarray(local.reshape(cut.shape).T)},
        np.ascontiguousarray(points[:, nodes].T))
    for name, values in point_data.items():
        grid.point_data[name] = values[nodes]
    return grid
