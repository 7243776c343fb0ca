"""Closed-form assembly of the P1 conductance matrix (theory.md F1).

P1 gradients are constant in a tetrahedron, so the element matrix of ∫ K∇φ_j·∇φ_i dx is
exactly V_e (G_e K_e G_eᵀ), with G_e the 4 × 3 matrix of basis gradients. The compiled
kernel of :mod:`fe3d.p1` adds it straight into the mesh's CSR pattern (no quadrature, no
(cells × 4 × 4) temporaries, no sort); the result equals scikit-fem's assembly of
:func:`fe3d.flow.forms.conductance` to round-off (tested).
"""

from __future__ import annotations

import scipy.sparse as sp

from fe3d._typing import FloatArray, IndexArray
from fe3d.flow.conductivity import CellConductivity
from fe3d.p1 import CsrPattern

__all__ = ["conductance_matrix"]


def conductance_matrix(points: FloatArray, cells: IndexArray,
                       conductivity: FloatArray | CellConductivity, *,
                       pattern: CsrPattern | None = None) -> sp.csr_matrix:
    """Assemble ∫ K∇u·∇v over P1 tetrahedra.

    Parameters
    ----------
    points
        Nodes [m], shape ``(3, n)``.
    cells
        Tetrahedra, shape ``(4, m)``.
    conductivity
        Conductivity per cell [m/s]: full tensors, shape ``(3, 3, m)``, or a
        :class:`~fe3d.flow.conductivity.CellConductivity` (K_h per cell times a shape tensor
        per unit, passed to the kernel as they are: no (3, 3, m) array is formed).
    pattern
        The mesh's :class:`fe3d.p1.CsrPattern` (built here when not given).

    Returns
    -------
    scipy.sparse.csr_matrix
        Shape ``(n, n)``, symmetric [m²/s], on ``pattern``.
    """
    if pattern is None:
        pattern = CsrPattern.of_cells(cells, points.shape[1])
    if isinstance(conductivity, CellConductivity):
        return pattern.stiffness(points, cells, conductivity.unit_shape,
                                 tensor_of=conductivity.cell_unit,
                                 scale=conductivity.horizontal)
    return pattern.stiffness(points, cells, conductivity)
