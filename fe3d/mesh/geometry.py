"""P1 tetrahedron geometry: volumes and barycentric gradients (constant per cell); pure numpy."""

from __future__ import annotations

import numpy as np

from fe3d._typing import FloatArray, IndexArray

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
    p = points[:, cells]  # (3, 4, n)
    jac = np.stack([p[:, 1] - p[:, 0], p[:, 2] - p[:, 0], p[:, 3] - p[:, 0]], axis=-1)
    jac = np.moveaxis(jac, 1, 0)  # (n, 3 coords, 3 edges)
    det = np.linalg.det(jac)
    inv = np.linalg.inv(jac)  # (n, 3 edges, 3 coords): rows are ∇λ_1..3
    grads = np.empty((cells.shape[1], 4, 3))
    grads[:, 1:, :] = inv
    grads[:, 0, :] = -inv.sum(axis=1)
    return grads, det / 6.0
