r"""Shock capturing for SUPG transport: residual-based isotropic artificial diffusion
(theory.md T15); pure numpy/scipy.

SUPG (T6) adds diffusion along the flow only and keeps small over- and undershoots next to
steep fronts. Shock capturing adds, in the cells where the discrete solution does not satisfy
the equation, an isotropic diffusion ν_e [m²/s] that scales with the cell residual and
vanishes where the residual does (a smooth, resolved solution):

.. math::

   \sum_e \int_{\Omega_e} \nu_e\, \nabla c_h \cdot \nabla w \, dx,
   \qquad
   \nu_e = \min\!\Big(\tfrac12 |\mathbf q_e| h_e,\;
           \max\big(0,\; \tfrac{C}{2}\, h_e \frac{|R_e|}{|\nabla c_h|_e}
           - \theta D_{\parallel,e}\big)\Big),

with the cell residual of the time-discrete equation T0 at the cell centre

.. math::

   R_e = m\,\frac{\bar c - \bar c^{\,n}}{\Delta t} + \mathbf q\cdot\nabla c^{\vartheta}
         + k\,\bar c^{\,\vartheta}, \qquad c^{\vartheta} = \vartheta c + (1-\vartheta) c^n ,

(bars: mean of the four nodal values = value at the centre; for BDF2 the first term is
m (a0 c̄ + a1 c̄ⁿ + a2 c̄ⁿ⁻¹)/Δt with the scheme's weights). The dispersion part of the
residual is zero inside a P1 cell, as for SUPG (T6).

Source of the coefficient: Codina, R. (1993), *A discontinuity-capturing crosswind-dissipation
for the finite element solution of the convection–diffusion equation*, Comput. Methods Appl.
Mech. Eng. 110, 325–342, as reviewed by John, V. & Knobloch, P. (2007), *On spurious
oscillations at layers diminishing (SOLD) methods for convection–diffusion equations: Part I –
A review*, Comput. Methods Appl. Mech. Eng. 196, 2197–2215. Codina writes the coefficient as
½ h max(0, C − 2ε/(|b_∥| h)) |b_∥| with |b_∥| = |R|/|∇c| (the velocity component along the
concentration gradient that the residual implies); multiplied out this is
max(0, C h |R|/(2|∇c|) − ε). fe3d applies it to T0 divided by m (residual R/m, diffusion
κ of T8) and multiplies the result by m, which gives the form above with θD_∥ = mκ = â·θD·â:
ν is then in the units of θD and adds to it like ``w.thetaD`` (neither θ nor R multiplies
it again). For a dispersion tensor, ε is taken along the flow (fe3d's choice: the direction
in which the grid Péclet number and τ are measured). C = 0.7 for linear elements is the
value recommended in these papers (from memory). Codina applies the coefficient in the
crosswind direction only; fe3d applies it isotropically, as the isotropic SOLD methods of
the review do (e.g. Hughes, Mallet & Mizukami 1986), because in a column-like plume the front
is steep *along* the flow, where crosswind diffusion adds nothing.

The cap ½|q|h is the diffusion that full first-order upwinding adds to the central (Galerkin)
scheme in 1D: donor-cell differencing of q c equals the central difference plus
(|q|Δx/2) ∂²c/∂x² (the classical modified-equation result; Brooks & Hughes 1982 write the
upwind diffusion as ξ|u|h/2 with ξ → 1 at high grid Péclet; both from memory). The term
never adds more diffusion than a first-order upwind scheme would.

Where |∇c_h| is below ``gradient_floor`` (default: 10⁻¹⁰ × the largest |c| of the two levels,
divided by h_e) the coefficient is set to 0: the term multiplies ∇c there, so it would do
nothing, and the ratio |R|/|∇c| would be 0/0.

Limits (measured on the sharp-front column of tests/verification/test_sharp_front.py, backward
Euler, two passes): the worst undershoot of plain SUPG drops 19–22× at Courant 0.5 (strips 3
and 6 cells wide) and by 10⁶ or more at Courant 1, but only 3.6–4.5× at Courant 0.25 and
2.7× on a strip one cell wide at Courant 0.5. There the worst value is made on the step on
which the inlet switches on, several cells ahead of the front, by the consistent mass matrix:
its off-diagonal m h/(6Δt) (1D) is positive and grows as Δt shrinks, while the diffusion that
the cap allows only cancels the downstream advective coupling (1D argument made here, not
from a source; the small-step behaviour of consistent mass is known, e.g. Harari 2004,
Comput. Methods Appl. Mech. Eng. 193, from memory). Two Picard passes reach most of the
effect; more passes change the worst value by less than 2× in the cases tried. Other schemes
on the same column (3 cells wide, tried by hand): BDF2 (backward Euler first step) 23× at
Courant 0.5 and 10⁷× at Courant 1; Crank–Nicolson only 1.1× and 2.2×, because its
undershoot (−10 % c0 at Courant 0.5) comes from the undamped switch-on jump of the time
scheme, which a spatial term cannot remove: use backward Euler or BDF2 for sharp fronts.

The artificial diffusion matrix has zero row and column sums (Σ_j ∇φ_j = 0), so it moves no
mass across the boundary: the consistent-residual budget (T9) closes unchanged.

Recipe for the time loop (the coefficient depends on the solution, so the method is
nonlinear; it is applied as a lagged correction, Picard iteration). With run.py's step
``S c = rhs`` (S = a0/Δt M + ϑK, rhs = −M(a1 cⁿ + a2 cⁿ⁻¹)/Δt + (ϑ − 1)K cⁿ + load):

1. Predictor: solve the step with plain SUPG → ``c_pred``.
2. ``nu = shock_diffusivity(cells, grads, c_pred, c_old, dt=dt, m=m, q=q, k=k, h=h,
   along_dispersion=m * kappa, theta_t=ϑ, time_weights=(a0, a1, a2), c_older=cⁿ⁻¹)``.
3. ``Kx = isotropic_stiffness(points, cells, nu, n)``; solve
   ``(S + ϑ Kx) c = rhs + (ϑ − 1) Kx cⁿ`` on the free rows with the same fixed values, and
   take the budget residual r = (S + ϑKx) c − (rhs + (ϑ − 1) Kx cⁿ) from this same system.
4. Repeat 2–3 from the new ``c`` (``passes`` times in all; 2 in the verification case).
   :func:`picard_shock_step` does 2–4 given two closures.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import scipy.sparse as sp

from fe3d._typing import FloatArray, IndexArray
from fe3d.errors import SolverError
from fe3d.p1 import CsrPattern

__all__ = [
    "SHOCK_STRENGTH",
    "isotropic_stiffness",
    "picard_shock_step",
    "shock_diffusivity",
]

SHOCK_STRENGTH = 0.7  # C of Codina (1993) for linear elements (John & Knobloch 2007; memory)
_FLOOR_REL = 1e-10  # |∇c| h below this × max|c| counts as flat (round-off scale, no source)


def shock_diffusivity(
    cells: IndexArray, grads: FloatArray, c: FloatArray, c_old: FloatArray, *, dt: float,
    m: FloatArray, q: FloatArray, k: FloatArray, h: FloatArray, along_dispersion: FloatArray,
    theta_t: float = 1.0, time_weights: tuple[float, float, float] = (1.0, -1.0, 0.0),
    c_older: FloatArray | None = None, strength: float = SHOCK_STRENGTH,
    gradient_floor: float | None = None,
) -> FloatArray:
    r"""Artificial diffusion coefficient ν_e per cell [m²/s] (theory.md T15).

    Parameters
    ----------
    cells, grads
        Tetrahedra ``(4, e)`` and basis gradients ``(e, 4, 3)`` [1/m].
    c, c_old
        Nodal concentration [kg/m³] at the new level (the current iterate) and at the previous
        time level, ``(n,)``.
    dt
        Time step [s].
    m, k
        Storage θR [-] and decay coefficient [1/s] per cell, ``(e,)``.
    q
        Darcy flux [m/s] per cell, ``(3, e)``.
    h
        Element length along the flow [m] (T7), ``(e,)``.
    along_dispersion
        θD along the flow, â·θD·â [m²/s] (``m * kappa`` of T8), ``(e,)``.
    theta_t
        Weight ϑ of the spatial terms (1 backward Euler and BDF2, ½ Crank–Nicolson).
    time_weights, c_older
        (a0, a1, a2) of the discrete rate (a0 c + a1 c_old + a2 c_older)/Δt: (1, −1, 0) for
        backward Euler and Crank–Nicolson (the default; ``c_older`` unused), the variable-step
        BDF2 weights with the level before ``c_old`` as ``c_older`` (run.py's
        ``StepCoefficients``).
    strength
        The constant C (default 0.7).
    gradient_floor
        |∇c| [kg/m⁴] at or below which ν = 0. Default 10⁻¹⁰ max(|c|, |c_old|) / h_e.

    Returns
    -------
    FloatArray
        ν_e ≥ 0 [m²/s], ``(e,)``, never above ½|q_e| h_e. Same units as θD: the extra term
        is ∫ ν ∇c·∇w (it is not multiplied by θ or R).
    """
    if not dt > 0.0:
        msg = f"shock capturing: time step {dt} s must be positive"
        raise SolverError(msg)
    if not 0.0 < theta_t <= 1.0:
        msg = f"shock capturing: time weight {theta_t} must lie in (0, 1]"
        raise SolverError(msg)
    c_new = np.asarray(c, dtype=float)
    c_prev = np.asarray(c_old, dtype=float)
    a0, a1, a2 = time_weights
    rate = a0 * c_new + a1 * c_prev  # Δt × the discrete ∂c/∂t at the nodes
    if a2 != 0.0:
        if c_older is None:
            msg = "shock capturing: a two-step rate (a2 ≠ 0) needs c_older"
            raise SolverError(msg)
        rate = rate + a2 * np.asarray(c_older, dtype=float)
    c_mid = theta_t * c_new + (1.0 - theta_t) * c_prev
    grad_new = np.einsum("ie,eik->ek", c_new[cells], grads)  # ∇c at the new level, (e, 3)
    grad_mid = np.einsum("ie,eik->ek", c_mid[cells], grads)
    residual = (m * rate[cells].mean(axis=0) / dt + np.einsum("ke,ek->e", q, grad_mid)
                + k * c_mid[cells].mean(axis=0))
    slope = np.sqrt(np.sum(grad_new * grad_new, axis=1))
    if gradient_floor is None:
        scale = max(float(np.max(np.abs(c_new), initial=0.0)),
                    float(np.max(np.abs(c_prev), initial=0.0)))
        floor = _FLOOR_REL * scale / h
    else:
        floor = np.full_like(h, gradient_floor, dtype=float)
    steep = slope > floor
    ratio = np.divide(np.abs(residual), slope, out=np.zeros_like(slope), where=steep)
    nu = np.maximum(0.0, 0.5 * strength * h * ratio - along_dispersion)
    cap = 0.5 * np.sqrt(np.sum(q * q, axis=0)) * h
    return np.where(steep, np.minimum(nu, cap), 0.0)


def isotropic_stiffness(points: FloatArray, cells: IndexArray, coeff: FloatArray, n: int,
                        *, pattern: CsrPattern | None = None) -> sp.csr_matrix:
    r"""Σ_e ν_e |V_e| ∇φ_i·∇φ_j, ``(n, n)`` CSR (theory.md T15; closed form of the P1 form
    :math:`\int \nu \nabla c\cdot\nabla w`).

    ``points`` ``(3, n)`` [m], ``cells`` ``(4, e)``, ``coeff`` ``(e,)`` [m²/s]. Only cells
    with ν ≠ 0 are visited (shock capturing acts on the few cells of a front); the result
    is stored on the mesh's CSR ``pattern`` (built from ``cells`` when not given).
    Symmetric, positive semi-definite for ν ≥ 0, zero row and column sums.
    """
    if pattern is None:
        pattern = CsrPattern.of_cells(cells, n)
    active = np.flatnonzero(coeff)
    tensors = np.zeros((3, 3, active.size))
    for d in range(3):
        tensors[d, d] = coeff[active]
    return pattern.stiffness(points, cells, tensors, cell_ids=active)


def picard_shock_step(
    solve_with_extra: Callable[[FloatArray], FloatArray],
    coeff_from: Callable[[FloatArray], FloatArray],
    c_pred: FloatArray, passes: int = 2,
) -> tuple[FloatArray, FloatArray]:
    """Lagged (Picard) shock capturing for one time step.

    ``coeff_from(c)`` returns ν per cell from an iterate (usually :func:`shock_diffusivity`
    with c_old, dt, … bound); ``solve_with_extra(nu)`` re-solves the step with the matrix of
    ``nu`` added and returns the new nodal concentration. Starting from the plain-SUPG
    predictor ``c_pred``, this alternates the two ``passes`` times and returns the last
    concentration and the coefficient it was solved with (use that same coefficient for the
    budget residual).
    """
    if passes < 1:
        msg = f"shock capturing: passes = {passes}, at least 1 needed"
        raise SolverError(msg)
    nu = coeff_from(np.asarray(c_pred, dtype=float))
    c = solve_with_extra(nu)
    for _ in range(passes - 1):
        nu = coeff_from(c)
        c = solve_with_extra(nu)
    return c, nu
