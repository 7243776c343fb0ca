"""Where Newton starts a nonlinear step: the best combination of earlier steps' solutions
(theory.md R14c).

A nonlinear step keeps its last few solutions x (free values) with their images S_ff x
under the step matrix, as the linear solver keeps its own (fe3d/krylov.py). The start of
the next step is the combination Σ a_j x_j that minimises the step's true residual ‖R‖
over their span, found by Gauss–Newton from a = e(cⁿ) (cⁿ is the latest solution): R of a
combination needs no product with S_ff (its image is Σ a_j S_ff x_j), only the nodal law,
and its Jacobian on the span is J x_j = S_ff x_j + d ∘ x_j with d the law's diagonal.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from fe3d._typing import FloatArray
from fe3d.krylov import gram_least_squares

__all__ = ["GAUSS_NEWTON_STEPS", "StepWindow", "WindowStart", "window_start"]

GAUSS_NEWTON_STEPS = 1
"""Gauss–Newton iterations on the window's span. Measured on benchmarks/newton_bench.py's
box (19 k nodes, SUPG, backward Euler, second-order decay, Courant 1 and 10): the start's
‖R‖ a median 0.020 of ‖R(cⁿ)‖ after one iteration, 0.018 after two, and the step cheaper
with one (NEWTON_REPORT.md of the branch that added the start)."""

HALVINGS = 3
"""Step halvings of a Gauss–Newton iteration before the start stops where it is."""


class StepWindow:
    """The last ``size`` solutions of one step matrix's nonlinear steps (free values) and
    their images under S_ff; 2 ``size`` vectors of ``n``."""

    def __init__(self, n: int, size: int) -> None:
        self.size = max(0, int(size))
        self.solutions = np.empty((self.size, n))
        self.images = np.empty((self.size, n))
        self.count = 0
        self.latest = -1

    def add(self, solution: FloatArray, image: FloatArray) -> None:
        """Store a solution and its image S_ff x, replacing the oldest when full."""
        if self.size == 0:
            return
        self.latest = (self.latest + 1) % self.size
        self.solutions[self.latest] = solution
        self.images[self.latest] = image
        self.count = min(self.count + 1, self.size)

    def ends_at(self, x: FloatArray) -> bool:
        """Whether the latest solution stored is ``x`` (the step's cⁿ), value for value."""
        return self.count > 0 and bool(np.array_equal(self.solutions[self.latest], x))


@dataclass(frozen=True)
class WindowStart:
    """The start ``x``, its residual R(x) and norm, the residual norm at cⁿ and S_ff cⁿ."""

    x: FloatArray
    residual: FloatArray
    norm: float
    reference: float
    old_image: FloatArray


ResidualFromImage = Callable[[FloatArray, FloatArray], FloatArray]
"""(x, S_ff x) ↦ R(x) on the free nodes."""


def _least_squares(images: FloatArray, r: FloatArray) -> FloatArray:
    """The coefficients c minimising ‖r − Σ c_j images_j‖₂ (fe3d.krylov.gram_least_squares);
    a zero image gets c_j = 0."""
    out = np.zeros(images.shape[0])
    gram = images @ images.T
    used = np.diag(gram) > 0.0
    if np.any(used):
        out[used] = gram_least_squares(gram[np.ix_(used, used)], images[used] @ r)
    return out


def window_start(window: StepWindow, residual: ResidualFromImage,
                 diagonal: Callable[[FloatArray], FloatArray],
                 steps: int = GAUSS_NEWTON_STEPS) -> WindowStart | None:
    """Gauss–Newton on a ↦ ‖R(Σ a_j x_j)‖ from cⁿ, the window's latest solution (the
    caller checks :meth:`StepWindow.ends_at`); ``diagonal`` (x ↦ J − S_ff at x) is asked
    at the point ``residual`` was last evaluated at. Each iteration takes the full
    least-squares step or halves it until ‖R‖ decreases (at most HALVINGS times), else
    stops. None when the window is empty or R is not finite at cⁿ."""
    k = window.count
    if k == 0:
        return None
    X, SX = window.solutions[:k], window.images[:k]

    def at(a: FloatArray) -> tuple[FloatArray, FloatArray, float]:
        x = a @ X
        r = residual(x, a @ SX)
        return x, r, float(np.linalg.norm(r))

    a = np.zeros(k)
    a[window.latest] = 1.0
    x, r, norm = at(a)
    reference = norm
    if not np.isfinite(norm):
        return None
    for _ in range(steps):
        images = SX + diagonal(x)[None, :] * X  # J x_j for every stored x_j
        step = _least_squares(images, r)
        for halving in range(HALVINGS + 1):
            trial = a - 0.5 ** halving * step
            x_t, r_t, n_t = at(trial)
            if n_t < norm:
                a, x, r, norm = trial, x_t, r_t, n_t
                break
        else:
            break
    return WindowStart(x=x, residual=r, norm=norm, reference=reference,
                       old_image=SX[window.latest])
