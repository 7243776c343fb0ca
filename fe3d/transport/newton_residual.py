"""The residual of a nonlinear step and the diagonal its Jacobian adds to the step matrix
(theory.md T10, T11, T13), for Newton's method on the free nodes.

R(c) = S c − known + (a0/Δt + θλ_s) Σ(c) + θ L(c), where ``known`` gathers once everything
that does not change with c: the right-hand side, the sorbed mass of the earlier levels, and
the (1 − θ) parts at cⁿ. J = S + diag((a0/Δt + θλ_s) Σ'(c) + θ L'(c)).

On the free nodes Newton's residual is S_ff x + S_fD c_D − known_f + …: the held values
c_D do not change within the step, so S_fD c_D − known_f is formed once and each
evaluation multiplies by S_ff only, as the step's solver holds it (one product with the
free block instead of one with S, which the Newton step reads as two value arrays). Given
S_ff x already (a combination of stored images, theory.md R14c), R needs no product.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from fe3d._typing import FloatArray
from fe3d.transport.model import RateLaw, SpeciesModel
from fe3d.transport.systems import StepSystem
from fe3d.transport.timeschemes import StepCoefficients

__all__ = ["StepResidual"]


@dataclass(frozen=True)
class _LawAt:
    """The reaction law at one field: the free values it came from (None when evaluated on
    a whole field), the field [kg/m³], the nodal loss [kg/s] and its derivative [m³/s],
    and S_ff x when R was evaluated on the free rows (else None)."""

    x: FloatArray | None
    c: FloatArray
    loss: FloatArray
    dloss: FloatArray
    product: FloatArray | None = None


class StepResidual:
    """R and J − S_ff of one species' nonlinear step. Remembers the law at the last field R
    was evaluated at: Newton asks for J where it has just evaluated R, and the budget needs
    the loss at the result."""

    def __init__(self, s: SpeciesModel, system: StepSystem, rhs: FloatArray, old: FloatArray,
                 prev: FloatArray | None, held: FloatArray, dt: float,
                 formula: StepCoefficients, rate_now: RateLaw | None,
                 loss_old: FloatArray) -> None:
        # with linear sorption (K_d) the sorbed storage and its decay are already in S (m
        # and k of T1, T5); only nonlinear isotherms add them here (T10)
        self.nonlinear_sorption = bool(s.isotherms)
        self.sorbed_decay = float(s.sorbed_decay) if self.nonlinear_sorption else 0.0
        th, lam_s = formula.theta, self.sorbed_decay
        self.sorbed_old = s.sorbed(old)[0] if self.nonlinear_sorption else 0.0
        history = formula.a1 * self.sorbed_old + (
            0.0 if prev is None or not self.nonlinear_sorption
            else formula.a2 * s.sorbed(prev)[0])
        self.known = rhs - history / dt - lam_s * (1 - th) * self.sorbed_old \
            - (1 - th) * loss_old
        self.storage_weight = formula.a0 / dt + th * lam_s
        self.s, self.system, self.held, self.theta = s, system, held, th
        self.rate_now = rate_now
        free, fixed = system.free, system.fixed
        self.known_free = self.known[free] - system.S_fD @ held[fixed]
        self._last: _LawAt | None = None

    def full(self, c: FloatArray) -> FloatArray:
        """R(c) on every node [kg/s] (the held nodes' rows give the budget, T9)."""
        loss, dloss = self.s.reaction_loss(c, self.rate_now)
        out = self.system.S @ c - self.known
        out += self.theta * loss
        if self.nonlinear_sorption:
            out += self.storage_weight * self.s.sorbed(c)[0]
        self._last = _LawAt(None, c, loss, dloss)
        return out

    def field(self, x: FloatArray) -> FloatArray:
        """The whole field with the free values ``x`` and the held values."""
        c = self.held.copy()
        c[self.system.free] = x
        return c

    def free_rows(self, x: FloatArray) -> FloatArray:
        """R on the free nodes at the free values ``x``, with S_ff the step solver's
        operator."""
        return self.rows_with_product(x, self.system.solver.A @ x)

    def rows_with_product(self, x: FloatArray, product: FloatArray) -> FloatArray:
        """R on the free nodes at ``x`` given ``product`` = S_ff x: S_ff x −
        (known_f − S_fD c_D) plus the nonlinear terms."""
        c = self.field(x)
        free = self.system.free
        loss, dloss = self.s.reaction_loss(c, self.rate_now)
        out = product - self.known_free
        out += self.theta * loss[free]
        if self.nonlinear_sorption:
            out += self.storage_weight * self.s.sorbed(c)[0][free]
        self._last = _LawAt(x, c, loss, dloss, product)
        return out

    def last_product(self, x: FloatArray) -> FloatArray | None:
        """S_ff x when R was last evaluated on the free rows at ``x`` itself, else None."""
        last = self._last
        return last.product if last is not None and last.x is x else None

    def jacobian_diagonal(self, x: FloatArray) -> FloatArray:
        """J − S_ff on the free nodes at ``x`` [m³/s] (T10, T11)."""
        last = self._last
        if last is not None and last.x is x:
            c, dloss = last.c, last.dloss
        else:
            c = self.field(x)
            dloss = self.s.reaction_loss(c, self.rate_now)[1]
        free = self.system.free
        extra = self.theta * dloss[free]
        if self.nonlinear_sorption:
            extra += self.storage_weight * self.s.sorbed(c)[1][free]
        return np.asarray(extra, dtype=float)

    def decayed(self, c: FloatArray, loss_old: FloatArray, dt: float) -> float:
        """Mass lost over the step [kg] by sorbed-phase decay and the reaction, θ-weighted
        between cⁿ (``loss_old`` [kg/s]) and ``c``, the field of the last :meth:`full`."""
        assert self._last is not None and self._last.c is c
        th = self.theta
        sorbed = self.sorbed_decay * float(np.sum(
            th * self.s.sorbed(c)[0] + (1 - th) * self.sorbed_old)) \
            if self.nonlinear_sorption else 0.0
        return dt * (sorbed + float(np.sum(th * self._last.loss + (1 - th) * loss_old)))
