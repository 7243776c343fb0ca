"""Sparse linear solvers chosen by matrix size and symmetry; knows nothing of the physics.

Choices follow the measurements in the project's solver notes: SuperLU only for small 3D
systems (measured 5.7 s for a 29 k-node 3D Laplacian here); conjugate gradients with one smoothed-
aggregation V-cycle for symmetric positive definite systems; GMRES with an unsmoothed-
aggregation V-cycle (``smooth=None``, nonsymmetric) for transport steps. Every iterative
result is checked against the true residual ‖b − Ax‖/‖b‖, never only the solver's flag.
"""

from __future__ import annotations

import logging
from collections.abc import Callable
from typing import Any

import numpy as np
import numpy.typing as npt
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from fe3d._typing import FloatArray
from fe3d.errors import SolverError

__all__ = ["DIRECT_LIMIT", "LinearSolver", "scatter_element_matrices", "solve_spd"]

logger = logging.getLogger(__name__)

DIRECT_LIMIT = 5_000
"""Largest number of unknowns for which a direct factorisation is used by default."""


def scatter_element_matrices(cells: npt.NDArray[np.int64], local: FloatArray,
                             n: int) -> sp.csr_matrix:
    """Sum element matrices ``local[e, i, j]`` (row = test node i, column = trial node j) of
    cells ``(k, m)`` into an ``(n, n)`` CSR matrix."""
    k = cells.shape[0]
    rows = np.repeat(cells.T[:, :, None], k, axis=2).ravel()
    cols = np.repeat(cells.T[:, None, :], k, axis=1).ravel()
    return sp.coo_matrix((local.ravel(), (rows, cols)), shape=(n, n)).tocsr()


def _check(A: Any, x: FloatArray, b: FloatArray, tol: float, what: str) -> None:
    if not np.all(np.isfinite(x)):
        msg = f"{what}: the solution contains NaN or infinite values"
        raise SolverError(msg)
    nb = float(np.linalg.norm(b))
    if nb == 0.0:
        return
    rel = float(np.linalg.norm(b - A @ x)) / nb
    if rel > max(10.0 * tol, 1e-13):
        msg = f"{what}: relative residual {rel:.2e} above the tolerance {tol:.1e}"
        raise SolverError(msg)


def solve_spd(A: sp.csr_matrix, b: FloatArray, *, tol: float = 1e-12,
              method: str = "auto", stats: dict[str, float] | None = None) -> FloatArray:
    """Solve a symmetric positive definite system (direct when small, AMG-CG otherwise).

    The iterative branch is conjugate gradients preconditioned by one V-cycle of classical
    Ruge–Stüben AMG.

    ``stats``, when given, receives ``iterations`` (0 for a direct solve), ``setup_s`` and
    ``solve_s`` [s].
    """
    import time

    n = A.shape[0]
    t0 = time.perf_counter()
    iters: list[float] = []
    setup = 0.0
    if method == "direct" or (method == "auto" and n <= DIRECT_LIMIT):
        x = spla.spsolve(A.tocsc(), b)
    else:
        import pyamg

        # classical (Ruge–Stüben) AMG: on layered, vertically thin cells with conductivity
        # contrasts of 1e4–1e5 it took 30 CG iterations where smoothed aggregation took 97
        # (170 k nodes, docs/performance.md), with a quarter of the set-up time
        ml = pyamg.ruge_stuben_solver(A.tocsr())
        setup = time.perf_counter() - t0
        x, info = spla.cg(A, b, rtol=tol, atol=0.0, maxiter=2000,
                          M=ml.aspreconditioner(cycle="V"),
                          callback=lambda _xk: iters.append(1.0))
        logger.info("flow: AMG-CG %d iterations (info=%d)", len(iters), info)
    x = np.asarray(x, dtype=float)
    if stats is not None:
        stats.update(iterations=float(len(iters)), setup_s=setup,
                     solve_s=time.perf_counter() - t0 - setup)
    _check(A, x, b, tol, "steady flow solve")
    return x


class LinearSolver:
    """Solve A x = b repeatedly for one matrix, reusing its factor or preconditioner.

    ``method`` is ``"direct"`` (SuperLU factor kept), ``"iterative"`` (GMRES with one
    unsmoothed-aggregation AMG V-cycle, kept), or ``"auto"`` (direct up to
    :data:`DIRECT_LIMIT` unknowns).
    """

    def __init__(self, A: sp.csr_matrix, *, method: str = "auto", tol: float = 1e-10) -> None:
        self.A = A.tocsr()
        self.tol = tol
        n = A.shape[0]
        self.method = "direct" if method == "direct" or (
            method == "auto" and n <= DIRECT_LIMIT) else "iterative"
        self._solve: Callable[[FloatArray, FloatArray | None], FloatArray]
        if self.method == "direct":
            lu = spla.splu(self.A.tocsc())
            self._solve = lambda b, _x0: lu.solve(b)
        else:
            import pyamg

            ml = pyamg.smoothed_aggregation_solver(self.A, symmetry="nonsymmetric",
                                                   smooth=None)
            M = ml.aspreconditioner(cycle="V")

            def run(b: FloatArray, x0: FloatArray | None) -> FloatArray:
                x, _info = spla.gmres(self.A, b, x0=x0, rtol=tol, atol=0.0, restart=50,
                                      maxiter=20, M=M)
                return np.asarray(x, dtype=float)

            self._solve = run

    def solve(self, b: FloatArray, x0: FloatArray | None = None) -> FloatArray:
        """Solve for one right-hand side; raises :class:`SolverError` on failure."""
        x = self._solve(b, x0)
        _check(self.A, x, b, self.tol, "transport step")
        return x
