"""P1 tetrahedron geometry: volumes and barycentric gradients (constant per cell)."""

from __future__ import annotations

from fe3d._typing import FloatArray, IndexArray
from fe3d.p1 import gradients

__all__ = ["p1_gradients"]


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
