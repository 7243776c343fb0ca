"""One AMG hierarchy kept across flow solves (fe3d.linalg.SpdPreconditioner)."""

from __future__ import annotations

import math

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from fe3d.linalg import DIRECT_LIMIT, SpdPreconditioner, solve_spd

TOL = 1e-10


def _laplacian(m: int) -> sp.csr_matrix:
    """The 7-point Laplacian on an m × m × m grid with zero boundary values (h = 1)."""
    one = sp.diags([-np.ones(m - 1), 2.0 * np.ones(m), -np.ones(m - 1)], [-1, 0, 1])
    eye = sp.identity(m)
    return (sp.kron(sp.kron(one, eye), eye) + sp.kron(sp.kron(eye, one), eye)
            + sp.kron(sp.kron(eye, eye), one)).tocsr()


def test_kept_hierarchy_solves_a_changed_matrix_to_the_tolerance() -> None:
    """The second solve reuses the first matrix's hierarchy on a matrix with a larger
    diagonal. Reference: a direct solve. Error bound: ‖x − x*‖/‖x*‖ ≤ κ ‖r‖/‖b‖ ≤ κ · 10 TOL
    (the residual check allows 10 TOL), with κ of the 3D Dirichlet Laplacian
    sin²(mπ/(2(m+1))) / sin²(π/(2(m+1))) (from its eigenvalues 4 sin²(kπ/(2(m+1))) per
    direction, as in LeVeque 2007, Finite Difference Methods for Ordinary and Partial
    Differential Equations, ch. 2-3; section recalled from memory); adding a positive
    diagonal only lowers κ."""
    m = 22
    A = _laplacian(m)
    assert A.shape[0] > DIRECT_LIMIT  # the AMG-CG branch
    kappa = math.sin(m * math.pi / (2 * (m + 1))) ** 2 / math.sin(math.pi / (2 * (m + 1))) ** 2
    rng = np.random.default_rng(4)
    b = rng.standard_normal(A.shape[0])
    kept = SpdPreconditioner()
    stats: dict[str, float] = {}
    for shift in (0.0, 0.5):
        M = (A + shift * sp.identity(A.shape[0])).tocsr()
        x = solve_spd(M, b, tol=TOL, preconditioner=kept, stats=stats)
        exact = spla.spsolve(M.tocsc(), b)
        err = np.linalg.norm(x - exact) / np.linalg.norm(exact)
        assert err <= kappa * 10 * TOL
        assert stats["iterations"] > 0
    assert kept.builds == 1
    assert kept.uses == 2
    assert kept.levels > 1


def test_a_new_shape_builds_a_new_hierarchy() -> None:
    kept = SpdPreconditioner()
    for m in (19, 20):
        A = _laplacian(m)
        solve_spd(A, np.ones(A.shape[0]), tol=TOL, preconditioner=kept)
    assert kept.builds == 2
