"""P1 tetrahedron geometry: volumes and barycentric gradients (constant per cell), and the
nodal lumping of cell values."""

from __future__ import annotations

import numpy as np

from fe3d._typing import FloatArray, IndexArray
from fe3d.p1 import gradients

__all__ = ["lump_to_nodes", "p1_gradients"]


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
    flat = cells.ravel()
    size = np.abs(volumes)
    v = np.asarray(per_cell, dtype=float)
    rows = v[None] if v.ndim == 1 else v
    out = np.vstack([np.bincount(flat, weights=np.tile(row * size / 4.0, 4),
                                 minlength=n_nodes) for row in rows])
    return out[0] if v.ndim == 1 else out
