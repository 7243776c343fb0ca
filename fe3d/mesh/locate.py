"""Locate points in the mesh and build sampling operators (point values, screen averages)."""

from __future__ import annotations

from typing import Any

import numpy as np
import scipy.sparse as sp

from fe3d._typing import FloatArray, IndexArray
from fe3d.errors import MeshError

__all__ = ["sample_operator", "screen_points"]


def screen_points(x: float, y: float, top: float, bottom: float, *, spacing: float) -> FloatArray:
    """Evenly spaced sample points [m] along a vertical screen, shape ``(3, k)``, k ≥ 5."""
    k = max(5, int(np.ceil((top - bottom) / spacing)) + 1)
    z = np.linspace(top, bottom, k)
    return np.vstack([np.full(k, x), np.full(k, y), z])


def sample_operator(mesh: Any, points: FloatArray, *, weights_per_cell: FloatArray | None = None,
                    ) -> tuple[sp.csr_matrix, IndexArray]:
    """Sparse operator whose product with a P1 nodal field gives the (weighted) mean over points.

    Parameters
    ----------
    mesh
        A scikit-fem ``MeshTet``.
    points
        Sample points [m], shape ``(3, k)``.
    weights_per_cell
        Optional weight of each cell (e.g. horizontal conductivity); the mean over the points
        is weighted by the weight of the cell that contains each point.

    Returns
    -------
    operator, cells
        A ``(1, n_nodes)`` matrix and the containing cell of every point.
    """
    from skfem import Basis, ElementTetP1

    finder = mesh.element_finder()
    try:
        cells = np.asarray(finder(*points), dtype=np.int64)
    except ValueError:
        msg = f"a sample point near {points[:, 0].round(3).tolist()} m lies outside the mesh"
        raise MeshError(msg) from None
    basis = Basis(mesh, ElementTetP1())
    rows = basis.probes(points)  # (k, n_nodes): P1 interpolation at each point
    w = np.ones(points.shape[1]) if weights_per_cell is None else weights_per_cell[cells]
    w = w / w.sum()
    return sp.csr_matrix(sp.csr_matrix(w) @ rows), cells
