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
    p0 = points[:, cells[0]]
    e1, e2, e3 = (points[:, cells[k]] - p0 for k in (1, 2, 3))  # edges, (3, n) each
    # the inverse of the Jacobian [e1 e2 e3] has the rows (e2×e3, e3×e1, e1×e2)/det, with
    # det = e1·(e2×e3): closed form, several times faster than a batched LAPACK inverse
    c23, c31, c12 = np.cross(e2, e3, axis=0), np.cross(e3, e1, axis=0), np.cross(e1, e2, axis=0)
    det = np.einsum("kn,kn->n", e1, c23)
    grads = np.empty((cells.shape[1], 4, 3))
    for row, c in ((1, c23), (2, c31), (3, c12)):
        grads[:, row, :] = (c / det).T
    grads[:, 0, :] = -grads[:, 1:, :].sum(axis=1)
    return grads, det / 6.0
