"""Newton's method with a backtracking line search on the residual norm; knows no physics.

theory.md R14. The caller supplies the residual R(x) and a function that solves the
Jacobian system J(x) δ = r (it may factorise J once per call, reuse a factorisation, or run
a preconditioned Krylov method). The iterate is updated as x ← x − α δ with α = 1, ½, ¼, …
until the residual norm decreases enough (R15).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

from fe3d._typing import FloatArray
from fe3d.errors import NewtonError

__all__ = ["NewtonResult", "newton"]

SUFFICIENT_DECREASE = 1e-4
"""c₁ in ‖R(x − αδ)‖ ≤ (1 − c₁α)‖R(x)‖ (Kelley 1995, ch. 8, from memory)."""


ROUND_OFF = 4.0 * float(np.finfo(float).eps)
"""A correction with max|δ| ≤ ROUND_OFF · max|x| ends the iteration as converged: the
residual is then at its floating-point floor and cannot be reduced further."""


@dataclass(frozen=True)
class NewtonResult:
    """The converged iterate and the solver log.

    ``residual_norms[0]`` is ‖R(x0)‖ and ``residual_norms[k]`` is ‖R‖ after iteration k;
    ``step_lengths[k-1]`` is the α accepted in iteration k.
    """

    x: FloatArray
    iterations: int
    residual_norms: list[float] = field(default_factory=list)
    step_lengths: list[float] = field(default_factory=list)

    def log_lines(self) -> list[str]:
        """One line per iterate, for the solver log."""
        lines = [f"newton it 0: |R| = {self.residual_norms[0]:.3e}"]
        for k, (res, a) in enumerate(zip(self.residual_norms[1:], self.step_lengths,
                                         strict=True), start=1):
            lines.append(f"newton it {k}: |R| = {res:.3e} (step {a:g})")
        return lines


def _l2(r: FloatArray) -> float:
    return float(np.linalg.norm(r))


def newton(
    residual: Callable[[FloatArray], FloatArray],
    jacobian_solve: Callable[[FloatArray, FloatArray], FloatArray],
    x0: FloatArray,
    *,
    rtol: float = 1e-10,
    atol: float = 1e-14,
    max_iter: int = 25,
    line_search: bool = True,
    max_halvings: int = 10,
    norm: Callable[[FloatArray], float] = _l2,
) -> NewtonResult:
    """Solve R(x) = 0 from ``x0``.

    Parameters
    ----------
    residual
        x ↦ R(x), same shape as x.
    jacobian_solve
        (x, r) ↦ δ with J(x) δ = r, J = ∂R/∂x at x.
    rtol, atol
        Converged when ‖R(x_k)‖ ≤ max(atol, rtol ‖R(x_0)‖), or when the correction is at
        round-off level (max|δ| ≤ 4ε max|x|, see ``ROUND_OFF``), whichever comes first.
    max_iter
        Largest number of Newton iterations.
    line_search
        Backtrack α = 1, ½, … (at most ``max_halvings`` times) until
        ‖R(x − αδ)‖ ≤ (1 − 10⁻⁴ α)‖R(x)‖; without it the full step is always taken.
    norm
        Residual norm (default Euclidean); pass a weighted norm to balance unknowns.

    Raises
    ------
    NewtonError
        Non-finite residual at x0 or non-finite correction; no sufficient decrease after
        ``max_halvings`` halvings; not converged after ``max_iter`` iterations. The error
        carries the residual norms reached.
    """
    x = np.array(x0, dtype=float, copy=True)
    r = residual(x)
    r_norm = norm(r)
    norms = [r_norm]
    steps: list[float] = []
    if not np.isfinite(r_norm):
        msg = "Newton: the residual is not finite at the starting point"
        raise NewtonError(msg, norms)
    target = max(atol, rtol * r_norm)
    for _ in range(max_iter):
        if r_norm <= target:
            break
        delta = jacobian_solve(x, r)
        if not np.all(np.isfinite(delta)):
            msg = (f"Newton: non-finite correction at iteration {len(steps) + 1} "
                   f"(|R| = {r_norm:.3e}); the Jacobian may be singular")
            raise NewtonError(msg, norms)
        if np.max(np.abs(delta), initial=0.0) <= ROUND_OFF * np.max(np.abs(x), initial=0.0):
            # The correction is at round-off level: x cannot be improved in floating point.
            x = x - delta
            r = residual(x)
            r_norm = norm(r)
            norms.append(r_norm)
            steps.append(1.0)
            return NewtonResult(x=x, iterations=len(steps), residual_norms=norms,
                                step_lengths=steps)
        alpha = 1.0
        for _ in range(max_halvings + 1):
            x_try = x - alpha * delta
            r_try = residual(x_try)
            n_try = norm(r_try)
            if not line_search and np.isfinite(n_try):
                break
            if np.isfinite(n_try) and n_try <= (1.0 - SUFFICIENT_DECREASE * alpha) * r_norm:
                break
            alpha *= 0.5
        else:
            msg = (f"Newton: line search found no decrease of |R| = {r_norm:.3e} at iteration "
                   f"{len(steps) + 1} (step cut to {2 * alpha:g})")
            raise NewtonError(msg, norms)
        x, r, r_norm = x_try, r_try, n_try
        norms.append(r_norm)
        steps.append(alpha)
    if r_norm > target:
        msg = (f"Newton: not converged in {max_iter} iterations: |R| {norms[0]:.3e} -> "
               f"{r_norm:.3e}, target {target:.3e}")
        raise NewtonError(msg, norms)
    return NewtonResult(x=x, iterations=len(steps), residual_norms=norms, step_lengths=steps)
