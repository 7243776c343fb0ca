"""Closed-form P1 conductance assembly against scikit-fem's quadrature assembly (reference)."""

from __future__ import annotations

import numpy as np
from skfem import Basis, ElementTetP1, MeshTet, asm

from fe3d.flow.assembly import conductance_matrix
from fe3d.flow.forms import conductance


def test_closed_form_matches_scikit_fem_for_full_tensors():
    """Random anisotropic SPD tensors on a distorted mesh; chunks smaller than the mesh.
    Tolerance 1e-12 relative to the largest entry (a few hundred roundings)."""
    rng = np.random.default_rng(0)
    mesh = MeshTet.init_tensor(np.linspace(0, 1, 5), np.linspace(0, 2, 4), np.linspace(0, 1, 4))
    p = mesh.p + 0.05 * rng.standard_normal(mesh.p.shape)
    mesh = MeshTet(p, mesh.t)
    m = mesh.t.shape[1]
    a = rng.standard_normal((m, 3, 3))
    tensors = np.moveaxis(a @ np.transpose(a, (0, 2, 1)) + 0.1 * np.eye(3), 0, 2)
    basis = Basis(mesh, ElementTetP1())
    ref = asm(conductance, basis, K=np.repeat(tensors[..., None], basis.X.shape[1], axis=-1))
    mine = conductance_matrix(mesh.p, mesh.t, tensors, )
    diff = abs(ref - mine).max()
    assert diff <= 1e-12 * abs(ref).max()
    # rows of a stiffness matrix sum to zero (constants are in its kernel)
    assert np.abs(mine.sum(axis=1)).max() <= 1e-12 * abs(ref).max()
