"""Boundary and source terms of the flow equation as nodal vectors (theory.md F2–F7).

Every term is expressed as a nodal inflow vector f (positive = water entering the model,
[m³/s] per node) so that the water budget is the sum of the terms, item by item.
"""

from __future__ import annotations

import numpy as np

from fe3d._typing import BoolArray, FloatArray, IndexArray

__all__ = ["facet_areas", "in_polygon", "lumped_face_weights"]


def in_polygon(x: FloatArray, y: FloatArray, polygon: list[tuple[float, float]]) -> BoolArray:
    """Points (x, y) inside a plan polygon (even–odd ray casting; edges count as inside)."""
    px = np.array([p[0] for p in polygon])
    py = np.array([p[1] for p in polygon])
    inside = np.zeros(np.shape(x), dtype=bool)
    j = len(polygon) - 1
    for i in range(len(polygon)):
        xi, yi, xj, yj = px[i], py[i], px[j], py[j]
        crosses = (yi > y) != (yj > y)
        with np.errstate(divide="ignore", invalid="ignore"):
            x_at = (xj - xi) * (y - yi) / (yj - yi) + xi
        inside ^= crosses & (x < x_at)
        j = i
    return inside


def facet_areas(points: FloatArray, tri: IndexArray) -> FloatArray:
    """Areas [m²] of triangles ``(3, k)``."""
    a, b, c = (points[:, tri[i]] for i in range(3))
    return 0.5 * np.linalg.norm(np.cross(b - a, c - a, axis=0), axis=0)


def lumped_face_weights(points: FloatArray, tri: IndexArray, n_nodes: int,
                        mask: BoolArray | None = None) -> FloatArray:
    """∫_Γ φ_i ds per node [m²] over the (masked) triangles: one third of each area."""
    if mask is not None:
        tri = tri[:, mask]
    area = facet_areas(points, tri)
    return np.bincount(tri.ravel(), weights=np.tile(area / 3.0, 3), minlength=n_nodes)
