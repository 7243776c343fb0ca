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


def test_level_by_level_hierarchy_is_pyamgs_with_one_threshold(monkeypatch) -> None:
    """With the finest level's threshold set to the others', the hierarchy built level by
    level (fe3d.linalg._amg_hierarchy) is pyamg's own ``ruge_stuben_solver`` with the same
    options (reference library: pyamg; Bell, Olson & Schroder 2022, PyAMG: Algebraic
    Multigrid Solvers in Python, JOSS 7(72); citation from memory). Same operations in the
    same order, so the level matrices agree to round-off (1e-14 relative). With the
    default threshold the finest level keeps fewer strong connections, so its first coarse
    level is no larger."""
    import pyamg

    import fe3d.linalg as linalg

    A = _laplacian(20) + sp.diags(np.linspace(0.0, 1.0, 20**3))  # no two rows alike
    A = A.tocsr()
    ref = pyamg.ruge_stuben_solver(A, strength=("classical", {"theta": linalg.STRENGTH,
                                                              "norm": "min"}),
                                   CF=("RS", {"second_pass": True}),
                                   max_coarse=linalg.COARSEST, coarse_solver="pinv")
    monkeypatch.setattr(linalg, "FIRST_STRENGTH", linalg.STRENGTH)
    mine = linalg._amg_hierarchy(A)
    assert len(mine.levels) == len(ref.levels) > 2
    for ours, theirs in zip(mine.levels, ref.levels, strict=True):
        assert ours.A.shape == theirs.A.shape
        assert abs(ours.A - theirs.A).max() <= 1e-14 * abs(theirs.A).max()
    monkeypatch.undo()
    default = linalg._amg_hierarchy(A)
    assert default.levels[1].A.shape[0] <= mine.levels[1].A.shape[0]


def test_a_forgotten_hierarchy_is_built_again() -> None:
    """``forget`` lets the hierarchy go (the run calls it when the corridor's first-pass
    mesh is dropped, so that it is not held while the final mesh is built): the next matrix,
    even of the same shape, gets a new one."""
    kept = SpdPreconditioner()
    A = _laplacian(12)
    first = kept.hierarchy(A)
    kept.forget()
    assert kept.hierarchy(A) is not first and kept.builds == 2
