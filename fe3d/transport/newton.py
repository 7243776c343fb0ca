"""Newton's method with a backtracking line search on the residual norm; knows no physics.

theory.md R14. The caller supplies the residual R(x) and a function that solves the
Jacobian system J(x) δ = r (it may factorise J once per call, reuse a factorisation, or run
a preconditioned Krylov method). The iterate is updated as x ← x − α δ with α = 1, ½, ¼, …
until the residual norm decreases enough (R15). With :class:`Forcing` the solve is asked
only for the relative accuracy η_k of Eisenstat & Walker's second choice (R14b), so early
iterations do not over-solve; convergence is still judged on the true residual R(x).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

from fe3d._typing import FloatArray
from fe3d.errors import NewtonError

__all__ = ["Forcing", "NewtonResult", "forcing_term", "newton"]

SUFFICIENT_DECREASE = 1e-4
"""c₁ in ‖R(x − αδ)‖ ≤ (1 − c₁α)‖R(x)‖ (Kelley 1995, ch. 8, from memory)."""


ROUND_OFF = 4.0 * float(np.finfo(float).eps)
"""A correction with max|δ| ≤ ROUND_OFF · max|x| ends the iteration as converged: the
residual is then at its floating-point floor and cannot be reduced further."""


@dataclass(frozen=True)
class Forcing:
    """Eisenstat & Walker's second choice of forcing terms (R14b; Eisenstat & Walker 1996,
    "Choosing the forcing terms in an inexact Newton method", SIAM J. Sci. Comput. 17(1)):
    η_k = γ (‖R_k‖/‖R_{k−1}‖)^α. ``gamma`` = 0.9 and ``alpha`` = 2 are the values the paper
    recommends, ``largest`` (η_max = 0.9) its experimental setting (from memory). The paper
    leaves η_0 free (its experiments used 0.5, from memory); ``first`` = 0.1 is measured
    on the benchmark box at 223 k nodes (second-order decay, SUPG, backward Euler): step
    cost 51, 46, 45 SpMV at Courant 1 and 91, 83, 86 at Courant 10 for η_0 = 0.5, 0.1,
    0.01 (docs/performance.md, "Newton steps"). It serves a start from cⁿ; a start
    that already lowered ‖R‖ takes η_0 from the formula (:func:`forcing_term`, R14c)."""

    gamma: float = 0.9
    alpha: float = 2.0
    first: float = 0.1
    largest: float = 0.9


def forcing_term(forcing: Forcing, previous: float | None, r_norm: float,
                 r_previous: float | None, target: float) -> float:
    """The relative accuracy η_k asked of the k-th linear solve (R14b).

    η_0 = ``forcing.first`` (``r_previous`` is None); then η_k = γ(‖R_k‖/‖R_{k−1}‖)^α,
    raised to γ η_{k−1}^α when that exceeds 0.1 (the paper's safeguard against η falling
    too fast when the residual ratio is briefly small; not for η_0, which has no
    predecessor), and at most η_max. A start that already reduced ‖R‖ from ‖R_{−1}‖
    (``r_previous`` given with ``previous`` None, R14c) sets η_0 by the same formula.
    Last, η_k is at least 0.5 τ/‖R_k‖ with τ the Newton target (Kelley 1995, "Iterative
    methods for linear and nonlinear equations", SIAM, §6.3, from memory): the final solve
    is not asked for more than the target needs.
    """
    if r_previous is None:
        eta = forcing.first
    else:
        eta = forcing.gamma * (r_norm / r_previous) ** forcing.alpha
        guard = 0.0 if previous is None else forcing.gamma * previous ** forcing.alpha
        if guard > 0.1:
            eta = max(eta, guard)
    if r_norm > 0:
        eta = max(eta, 0.5 * target / r_norm)
    return min(eta, forcing.largest)


@dataclass(frozen=True)
class NewtonResult:
    """The converged iterate and the solver log.

    ``residual_norms[0]`` is ‖R(x0)‖ and ``residual_norms[k]`` is ‖R‖ after iteration k;
    ``step_lengths[k-1]`` is the α accepted in iteration k; ``forcing_terms[k-1]`` the
    relative accuracy asked of its linear solve (empty without :class:`Forcing`);
    ``target`` the ‖R‖ the iteration had to reach.
    """

    x: FloatArray
    iterations: int
    residual_norms: list[float] = field(default_factory=list)
    step_lengths: list[float] = field(default_factory=list)
    forcing_terms: list[float] = field(default_factory=list)
    target: float = 0.0

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
    jacobian_solve: Callable[..., FloatArray],
    x0: FloatArray,
    *,
    rtol: float = 1e-10,
    atol: float = 1e-14,
    max_iter: int = 25,
    line_search: bool = True,
    max_halvings: int = 10,
    norm: Callable[[FloatArray], float] = _l2,
    forcing: Forcing | None = None,
    started_from: float | None = None,
    r0: FloatArray | None = None,
) -> NewtonResult:
    """Solve R(x) = 0 from ``x0``.

    Parameters
    ----------
    residual
        x ↦ R(x), same shape as x.
    jacobian_solve
        (x, r) ↦ δ with J(x) δ = r, J = ∂R/∂x at x; with ``forcing``, (x, r, η) ↦ δ with
        ‖r − J δ‖ ≤ η ‖r‖ (the solve's own measure of it).
    rtol, atol
        Converged when ‖R(x_k)‖ ≤ max(atol, rtol ‖R(x_0)‖) (``started_from`` in place of
        ‖R(x_0)‖ when given), or when the correction is at
        round-off level (max|δ| ≤ 4ε max|x|, see ``ROUND_OFF``), whichever comes first.
    forcing
        Inexact Newton with Eisenstat & Walker's forcing terms (R14b); None: the solve is
        called as (x, r) and trusted to be accurate.
    started_from
        ‖R‖ at the point ``x0`` was improved from (R14c), at least ‖R(x0)‖: the target is
        then rtol times it instead of rtol ‖R(x0)‖, and η_0 follows from the reduction
        (:func:`forcing_term`). None: ``x0`` is the reference itself.
    r0
        R(x0) when the caller has already evaluated it (not evaluated again).
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
    x = np.asarray(x0, dtype=float)  # never written to: every update makes a new array
    r = residual(x) if r0 is None else r0
    r_norm = norm(r)
    norms = [r_norm]
    steps: list[float] = []
    if not np.isfinite(r_norm):
        msg = "Newton: the residual is not finite at the starting point"
        raise NewtonError(msg, norms)
    reference = r_norm if started_from is None else max(started_from, r_norm)
    target = max(atol, rtol * reference)
    before = [] if started_from is None else [reference]
    etas: list[float] = []
    for _ in range(max_iter):
        if r_norm <= target:
            break
        if forcing is None:
            delta = jacobian_solve(x, r)
        else:
            history = before + norms
            etas.append(forcing_term(forcing, etas[-1] if etas else None, r_norm,
                                     history[-2] if len(history) > 1 else None, target))
            delta = jacobian_solve(x, r, etas[-1])
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
                                step_lengths=steps, forcing_terms=etas, target=target)
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
    return NewtonResult(x=x, iterations=len(steps), residual_norms=norms, step_lengths=steps,
                        forcing_terms=etas, target=target)
