"""P1 tetrahedron geometry: volumes and barycentric gradients (constant per cell), the nodal
lumping of cell values, and which plan points lie in a polygon."""

from __future__ import annotations

import numpy as np

from fe3d._typing import FloatArray, IndexArray
from fe3d.p1 import gradients, sum_at_corners

__all__ = ["lump_to_nodes", "p1_gradients", "points_in_polygon"]


def p1_gradients(points: FloatArray, cells: IndexArray) -> tuple[FloatArray, FloatArray]:
    """Gradients of the four P1 basis functions and the volume of each tetrahedron.

    Parameters
    ----------
    points
        Nodes [m], shape ``(3, n_nodes)``.
    cells
        Tetrahedra, shape ``(4, n_cells)``.

    Returns
    -------
    grads, volumes
        ``grads[e, i, :]`` = ∇φ_i on cell e [1/m], shape ``(n_cells, 4, 3)``; volumes [m³],
        shape ``(n_cells,)`` (positive for positively oriented cells).
    """
    return gradients(points, cells)


def lump_to_nodes(cells: IndexArray, volumes: FloatArray, per_cell: FloatArray,
                  n_nodes: int) -> FloatArray:
    """Σ over the cells at each node of value · |V| / 4 (∫φ_j = |V|/4 for P1: row-sum
    lumping of the mass matrix weighted by a value constant per cell).

    Parameters
    ----------
    cells
        Tetrahedra, shape ``(4, n_cells)``.
    volumes
        Cell volumes [m³] (signed or not), shape ``(n_cells,)``.
    per_cell
        Values, shape ``(n_cells,)`` or ``(k, n_cells)``.
    n_nodes
        Number of nodes.

    Returns
    -------
    Nodal sums [value · m³], shape ``(n_nodes,)`` or ``(k, n_nodes)``.
    """
    size = np.abs(volumes)
    v = np.asarray(per_cell, dtype=float)
    rows = v[None] if v.ndim == 1 else v
    out = np.vstack([sum_at_corners(cells, row * size / 4.0, n_nodes) for row in rows])
    return out[0] if v.ndim == 1 else out


def points_in_polygon(xy: FloatArray, vertices: list[tuple[float, float]], *,
                      tol: float) -> np.ndarray:
    """Which points lie inside the polygon or within ``tol`` [m] of its edges.

    The test of :func:`fe3d.case.geology.point_in_polygon` (even-odd crossings of a ray
    towards +x, then the distance to each edge), one edge at a time over all points
    instead of one point at a time over the edges: the same operations on each point.

    Parameters
    ----------
    xy
        Plan points [m], shape ``(2, k)``.
    vertices
        Polygon vertices [m], in order (closed implicitly).
    tol
        Distance to an edge within which a point counts as inside [m].

    Returns
    -------
    Boolean mask, shape ``(k,)``.
    """
    x, y = xy[0], xy[1]
    inside = np.zeros(x.shape, dtype=bool)
    near = np.zeros(x.shape, dtype=bool)
    n = len(vertices)
    for i in range(n):
        x0, y0 = vertices[i]
        x1, y1 = vertices[(i + 1) % n]
        dx, dy = x1 - x0, y1 - y0
        length2 = dx * dx + dy * dy
        t = (np.zeros(x.shape) if length2 == 0
             else np.clip(((x - x0) * dx + (y - y0) * dy) / length2, 0.0, 1.0))
        near |= np.hypot(x - x0 - t * dx, y - y0 - t * dy) <= tol
        spans = (y0 > y) != (y1 > y)
        with np.errstate(divide="ignore", invalid="ignore"):
            crossing = x0 + (y - y0) * (x1 - x0) / (y1 - y0)
        inside ^= spans & (crossing > x)
    return inside | near
