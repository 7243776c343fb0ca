"""Closed-form P1 assembly of the transport operators (theory.md T1, T2, T4–T6).

All coefficients are constant per cell and P1 gradients are constant too, so every term has
an exact element matrix (row = test node i, column = trial node j, V = cell volume):

- storage T1: m V (1 + δ_ij)/20; decay T5: k V (1 + δ_ij)/20
- advection T2 (conservative): −(q·∇φ_i) V/4
- dispersion T4: V ∇φ_i·(θD)∇φ_j
- SUPG T6: τ (a·∇φ_i) [m V/4 (storage), (q·∇φ_j) V (advection), k V/4 (decay)]

They equal scikit-fem's quadrature assembly of the forms in fe3d/transport/forms.py to
round-off (tested), at a fraction of the time and memory: the compiled kernel of
:mod:`fe3d.p1` adds them straight into the mesh's CSR pattern in one pass over the cells.
"""

from __future__ import annotations

from collections.abc import Callable

import numba
import numpy as np
import scipy.sparse as sp

from fe3d._typing import FloatArray, IndexArray
from fe3d.p1 import MASS_FRACTION, CsrPattern, transpose_positions

__all__ = ["P1_MASS", "low_order_operators", "transport_operators"]

P1_MASS = MASS_FRACTION  # ∫φ_iφ_j dV / V on a tetrahedron


def transport_operators(
    points: FloatArray, cells: IndexArray, *, m: FloatArray, k: FloatArray,
    q: FloatArray, a: FloatArray, tau: FloatArray,
    theta_d: FloatArray | Callable[[int, int], FloatArray], n: int,
    m_supg: FloatArray | None = None, parts: str = "all",
    pattern: CsrPattern | None = None,
) -> tuple[sp.csr_matrix, sp.csr_matrix]:
    """Mass operator (storage + SUPG storage) and spatial operator (advection, dispersion,
    decay and their SUPG parts), both ``(n, n)``, on the mesh's CSR pattern.

    Parameters
    ----------
    points, cells
        Nodes ``(3, n)`` [m] and tetrahedra ``(4, e)``; the constant P1 gradients and the
        volume of each cell are formed inside the compiled kernel, never stored.
    m, k
        θR [-] and decay coefficient [1/s] per cell, ``(e,)``.
    q, a
        Darcy flux [m/s] and advective velocity q/m [m/s] per cell, ``(3, e)``.
    tau
        SUPG parameter [s] per cell, ``(e,)``.
    theta_d
        θD [m²/s] per cell, ``(3, 3, e)``, or a function giving it for the cells
        ``start:stop`` (called block by block, so that it is never held for every cell;
        :class:`fe3d.transport.model.Dispersion`).
    m_supg
        Storage coefficient of the SUPG storage term when it differs from ``m`` (nonlinear
        sorption: the Galerkin storage holds θ, the sorbed part is added outside).
    parts
        ``"all"``, ``"galerkin"`` (T1, T2, T4, T5: independent of the step length) or
        ``"supg"`` (T6: depends on τ, hence on the step length), so that a new step length
        rebuilds only the SUPG part; ``galerkin + supg == all``.
    pattern
        The mesh's :class:`fe3d.p1.CsrPattern` (built from ``cells`` when not given). Both
        operators are stored on it, so operators of one mesh add by their value arrays.
    """
    if parts not in ("all", "galerkin", "supg"):
        msg = f"parts must be 'all', 'galerkin' or 'supg', not {parts!r}"
        raise ValueError(msg)
    if pattern is None:
        pattern = CsrPattern.of_cells(cells, n)
    return pattern.transport(points, cells, m=m, m_supg=m if m_supg is None else m_supg, k=k,
                             q=q, a=a, tau=tau, theta_d=theta_d,
                             galerkin=parts in ("all", "galerkin"),
                             supg=parts in ("all", "supg"))


@numba.njit(cache=True, nogil=True)
def _upwind_kernel(indptr: IndexArray, indices: IndexArray, k: FloatArray, mirror: IndexArray,
                   m: FloatArray, kd: FloatArray, lumped: FloatArray) -> None:
    for i in range(indptr.size - 1):
        row_sum, mass, diagonal = 0.0, 0.0, -1
        for p in range(indptr[i], indptr[i + 1]):
            if indices[p] == i:
                diagonal, d = p, 0.0
            else:
                d = -max(0.0, max(k[p], k[mirror[p]]))
            kd[p] = k[p] + d
            row_sum += d  # in the row's order, as np.bincount adds them
            mass += m[p]
        if diagonal >= 0:
            kd[diagonal] = k[diagonal] + -row_sum
        lumped[i] = mass


def low_order_operators(M: sp.csr_matrix, K: sp.csr_matrix,
                        ) -> tuple[FloatArray, sp.csr_matrix]:
    """Low-order operators by discrete upwinding (theory.md T16; Kuzmin & Turek 2002): the
    mass operator lumped to its row sums (the diagonal alone, shape ``(n,)``), and K + D
    with the symmetric D that removes every positive off-diagonal entry of K,
    d_ij = −max(0, k_ij, k_ji) (i ≠ j), d_ii = −Σ_j d_ij.

    D has zero row and column sums, so no mass is made or lost; M_L/Δt + K + D has no
    positive off-diagonal entry. K + D keeps the CSR structure of ``M`` and ``K``, which
    must be one structurally symmetric pattern with sorted column indices (the mesh's
    :class:`fe3d.p1.CsrPattern`), so operators still add by their value arrays. One
    compiled pass over the rows: besides the results, only the mirror positions (4 bytes
    per entry) are held while it runs."""
    M, K = M.tocsr(), K.tocsr()
    msg = "monotone operators need one structurally symmetric pattern with sorted columns"
    if not (np.array_equal(M.indptr, K.indptr) and np.array_equal(M.indices, K.indices)):
        raise ValueError(msg)
    try:
        mirror = transpose_positions(K)  # the position of (j, i) for each entry (i, j)
    except ValueError as exc:
        raise ValueError(msg) from exc
    kd, lumped = np.empty_like(K.data, dtype=float), np.empty(K.shape[0])
    _upwind_kernel(K.indptr, K.indices, np.ascontiguousarray(K.data, dtype=float), mirror,
                   np.ascontiguousarray(M.data, dtype=float), kd, lumped)
    return lumped, sp.csr_matrix((kd, K.indices, K.indptr), shape=K.shape)

