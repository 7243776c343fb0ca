"""The Newton correction of a step: J δ = r with J = S_ff + diag(d), solved only as
accurately as the forcing term asks (theory.md R14b, T10), with the step matrix's own solver.

J differs from the step matrix S_ff by a diagonal, so S_ff's symmetric Gauss–Seidel (SSOR)
splitting, built once per step length by its :class:`~fe3d.linalg.LinearSolver`, serves J
too: only the diagonal of the split is exchanged (O(n), no new triangular parts). BiCGSTAB
then runs on the split system with Eisenstat's product (fe3d/sgs.py), each product one
backward and one forward pass, as a linear step does; J is never formed. Direct systems are
factorised afresh (small); the other methods run GMRES with S_ff's preconditioner (AMG
V-cycle, Jacobi, or the operator a :class:`~fe3d.transport.systems.NearbySolver` carries).
"""

from __future__ import annotations

import copy

import numpy as np

from fe3d._typing import FloatArray
from fe3d.krylov import bicgstab
from fe3d.linalg import LinearSolver, solve_with_preconditioner
from fe3d.sgs import SymmetricGaussSeidel, plus_diagonal
from fe3d.transport.systems import NearbySolver

__all__ = ["LINEAR_FLOOR", "CorrectionSolver"]

LINEAR_FLOOR = 1e-12
"""Smallest relative residual a correction's linear solve is asked for: about what the
Krylov methods reach in double precision on these matrices (fe3d.linalg's true-residual
check accepts 1e-13)."""

MAX_ITERATIONS = 300
"""Krylov iterations per correction before BiCGSTAB hands over to GMRES (as
:class:`~fe3d.linalg.LinearSolver`'s default)."""


def _with_diagonal(split: SymmetricGaussSeidel, extra: FloatArray) -> SymmetricGaussSeidel | None:
    """The splitting of A + diag(extra) from that of A: the same triangular parts, the
    relaxed diagonal (D + extra)/ω. None when the new diagonal has a zero."""
    diagonal = split.d * split.omega + extra
    if not np.all(diagonal != 0.0) or not np.all(np.isfinite(diagonal)):
        return None
    out = copy.copy(split)  # shares the triangular parts; d, inv_d, e are new arrays
    out.diagonal = diagonal
    out.d = diagonal / split.omega
    out.inv_d = 1.0 / out.d
    out.e = 2.0 * out.d - diagonal
    return out


class CorrectionSolver:
    """Solves J δ = r, J = S_ff + diag(``extra``), for every Newton iteration of one step
    with the step matrix's solver; ``iterations`` lists the Krylov iterations of each
    correction (0 for a direct solve)."""

    def __init__(self, solver: LinearSolver | NearbySolver) -> None:
        self.solver = solver
        self.iterations: list[int] = []
        self._split = solver._sgs() if (  # S_ff's own splitting, shared
            isinstance(solver, LinearSolver) and solver.method == "gauss_seidel") else None
        self._preconditioner = None if solver.method == "direct" else (
            solver.M if isinstance(solver, NearbySolver) else solver.preconditioner())

    def solve(self, extra: FloatArray, r: FloatArray, eta: float) -> FloatArray:
        """δ with J δ = r to the relative residual ``eta`` (at least LINEAR_FLOOR);
        raises :class:`~fe3d.errors.SolverError` when no method reaches it."""
        eta = max(eta, LINEAR_FLOOR)
        A = self.solver.A
        if self._preconditioner is None:
            self.iterations.append(0)
            return LinearSolver(plus_diagonal(A, extra), method="direct",
                                tol=LINEAR_FLOOR).solve(r)
        split = None if self._split is None else _with_diagonal(self._split, extra)
        start = None
        if split is not None:
            delta, its, reached = self._split_bicgstab(split, r, eta)
            if reached:
                self.iterations.append(its)
                return delta
            start = delta if np.all(np.isfinite(delta)) else None
        else:
            its = 0
        stats: dict[str, float] = {}
        delta = solve_with_preconditioner(plus_diagonal(A, extra), r, self._preconditioner,
                                          tol=eta, x0=start, max_iter=MAX_ITERATIONS,
                                          stats=stats)
        self.iterations.append(its + int(stats["iterations"]))
        return delta

    @staticmethod
    def _split_bicgstab(split: SymmetricGaussSeidel, r: FloatArray,
                        eta: float) -> tuple[FloatArray, int, bool]:
        """BiCGSTAB on M_L⁻¹ J M_R⁻¹ y = M_L⁻¹ r from y = 0 until the split residual is at
        most η ‖M_L⁻¹ r‖; returns (δ = M_R⁻¹ y, iterations, whether that was reached)."""
        b_hat = split.left(r)
        target = eta * float(np.linalg.norm(b_hat))
        y = np.zeros_like(b_hat)
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            its, rest = bicgstab(split.split_product, b_hat.copy(), y, target=target,
                                 max_iter=MAX_ITERATIONS)
            reached = bool(float(np.linalg.norm(rest)) <= target) and bool(
                np.all(np.isfinite(y)))
        return split.right_solve(y), its, reached
