"""Closed-form assembly of the P1 conductance matrix (theory.md F1).

P1 gradients are constant in a tetrahedron, so the element matrix of ∫ K∇φ_j·∇φ_i dx is
exactly V_e (G_e K_e G_eᵀ), with G_e the 4 × 3 matrix of basis gradients. Assembling it with
numpy in chunks avoids quadrature and keeps memory bounded; the result equals scikit-fem's
assembly of :func:`fe3d.flow.forms.conductance` to round-off (tested).
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp

from fe3d._typing import FloatArray, IndexArray
from fe3d.linalg import scatter_element_matrices
from fe3d.mesh.geometry import p1_gradients

__all__ = ["conductance_matrix"]


def conductance_matrix(points: FloatArray, cells: IndexArray, tensors: FloatArray, *,
                       chunk: int = 500_000,
                       geometry: tuple[FloatArray, FloatArray] | None = None,
                       ) -> sp.csr_matrix:
    """Assemble ∫ K∇u·∇v over P1 tetrahedra.

    Parameters
    ----------
    points
        Nodes [m], shape ``(3, n)``.
    cells
        Tetrahedra, shape ``(4, m)``.
    tensors
        Conductivity per cell [m/s], shape ``(3, 3, m)``.
    chunk
        Cells per assembly chunk (bounds the temporary memory).
    geometry
        Precomputed ``p1_gradients(points, cells)``, to avoid computing them again.

    Returns
    -------
    scipy.sparse.csr_matrix
        Shape ``(n, n)``, symmetric [m²/s].
    """
    n = points.shape[1]
    total = sp.csr_matrix((n, n))
    for start in range(0, cells.shape[1], chunk):
        c = cells[:, start:start + chunk]
        if geometry is None:
            grads, vol = p1_gradients(points, c)
        else:
            grads, vol = (g[start:start + chunk] for g in geometry)
        K = np.moveaxis(tensors[:, :, start:start + chunk], 2, 0)  # (m, 3, 3)
        # G K Gᵀ by batched matmul (about 2.7× faster than the equivalent einsum here)
        local = np.matmul(grads, np.matmul(K, grads.transpose(0, 2, 1))) \
            * np.abs(vol)[:, None, None]
        part = scatter_element_matrices(c, local, n)
        total = part if start == 0 else total + part
    return total.tocsr()
