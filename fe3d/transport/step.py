"""One time step of every species: state + step → new state, budget terms, statistics.

:func:`take_step` steps the species in order (parents before daughters, T12), sweeping the
species of a user law until they agree (T11b), and commits nothing: a failure raises and
leaves no trace. The budget terms of each species come from the residual of its full
(unreduced) system (T9); multistep schemes spread them as in T13.
"""

from __future__ import annotations

import logging
from collections.abc import Callable
from dataclasses import dataclass, replace

import numpy as np
import scipy.sparse as sp

from fe3d._typing import BoolArray, FloatArray, IndexArray
from fe3d.case.schema import SolverControl
from fe3d.errors import SolverError
from fe3d.linalg import LinearSolver
from fe3d.mesh.site_mesh import SiteMesh
from fe3d.p1 import split_rows
from fe3d.transport.limiter import (
    Correction,
    TargetFluxes,
    limited_target_fluxes,
    linearised_correction,
)
from fe3d.transport.model import RateLaw, SpeciesModel
from fe3d.transport.newton import Forcing, newton
from fe3d.transport.newton_correction import CorrectionSolver
from fe3d.transport.newton_residual import StepResidual
from fe3d.transport.newton_start import StepWindow, WindowStart, window_start
from fe3d.transport.shock import isotropic_stiffness, shock_diffusivity
from fe3d.transport.sources import SourceGeometry
from fe3d.transport.systems import NearbySolver, StepSystem, StepSystems, cell_coefficients
from fe3d.transport.timeschemes import StepCoefficients

BACKWARD_EULER = StepCoefficients(1.0, -1.0, 0.0, 1.0)
"""The low-order step of flux correction (T16b): backward Euler keeps it bounded."""

__all__ = ["StepBudget", "StepContext", "StepResult", "StepState",
           "Target", "UserLaw", "take_step"]

logger = logging.getLogger(__name__)

ROUND_OFF_FACTOR = 64.0
"""Newton inside a step stops once ‖R‖ ≤ ROUND_OFF_FACTOR · ε · max(‖rhs‖, ‖S cⁿ‖): the
round-off of evaluating R from terms of that size (a sum over about 30 neighbours per
row, rounded twice; common practice, no source)."""

MAX_SWEEPS = 50
"""Sweeps over the species of a user law that couple both ways before a step is cut."""

MIXING_DEPTH = 5
"""Earlier sweeps the coupling of user laws combines (Anderson acceleration, T11b)."""


@dataclass(frozen=True)
class UserLaw:
    """A user rate law (T11b): the species it couples, in its order, and the law, which maps
    concentrations ``(n_species, n)`` to rates [kg/m³/s] and their Jacobian."""

    species: tuple[str, ...]
    law: Callable[[FloatArray], tuple[FloatArray, FloatArray]]

    def rate_of(self, name: str, current: dict[str, FloatArray]) -> RateLaw:
        """Rate of ``name`` and its derivative in its own concentration, the other species
        held at their values in ``current``."""
        row = self.species.index(name)

        def rate(c: FloatArray) -> tuple[FloatArray, FloatArray]:
            allc = np.vstack([c if other == name else current[other]
                              for other in self.species])
            r, jac = self.law(allc)
            return r[row], jac[row, row]

        return rate


@dataclass(frozen=True)
class StepContext:
    """What every step of a run shares: the mesh, the species in stepping order, their
    step systems, the sources, the decay coupling of parents (T12: consistent decay matrix
    per parent), the user law and the solver settings; ``grads`` are the P1 basis gradients
    (only with shock capturing)."""

    site: SiteMesh
    darcy_flux: FloatArray
    species: tuple[SpeciesModel, ...]
    systems: StepSystems
    sources: SourceGeometry
    decay_matrix: dict[str, sp.csr_matrix]
    user_law: UserLaw | None
    solver: SolverControl
    time_scheme: str
    grads: FloatArray | None

    def set_up(self) -> StepContext:
        """The context the steps run with. With the bounded scheme (T16) and no shock
        capturing every species' operators are built now, once, and its per-cell
        coefficients freed, since no step reads them again (32 bytes per cell and species,
        about 0.17 KiB per node); otherwise the context itself (SUPG rebuilds its operators
        for a new step length, shock capturing reads them at every step)."""
        if not self.systems.scheme.monotone or self.solver.shock_capturing:
            return self
        for s in self.species:
            self.systems.operators(s, 0.0)  # T16: independent of the step length
        return replace(self, species=tuple(s.without_cell_coefficients()
                                           for s in self.species))


@dataclass(frozen=True)
class StepState:
    """The fields [kg/m³] at the start of a step, the nodes held in the step before (a
    source switching on is detected against them), the level before (multistep schemes)
    and the last step's budget terms (spread by multistep schemes, T13)."""

    fields: dict[str, FloatArray]
    held_before: dict[str, BoolArray]
    older: dict[str, FloatArray] | None
    last_budget: dict[str, StepBudget]


@dataclass(frozen=True)
class StepBudget:
    """Mass [kg] one species gained or lost in one step: ``source_input`` (held nodes and
    loads), ``produced`` (by the decay of its parent, T12), ``decayed``, ``outflow`` per
    item, ``switch_on`` (mass placed at nodes of a source that switched on), the nodes held
    and the starting field the step used."""

    source_input: float
    produced: float
    decayed: float
    outflow: dict[str, float]
    switch_on: float
    fixed: IndexArray
    start: FloatArray


@dataclass(frozen=True)
class StepResult:
    """New fields [kg/m³], budget terms, largest Newton iteration count, the kind of solver
    used and the sweeps a user law needed (0 without one)."""

    fields: dict[str, FloatArray]
    budget: dict[str, StepBudget]
    newton_iterations: int
    solver_kind: str
    sweeps: int


def take_step(ctx: StepContext, state: StepState, t0: float, t1: float, dt: float,
              formula: StepCoefficients) -> StepResult:
    """Every species from t0 to t1 [s]; nothing is committed (a failure leaves no trace).

    ``dt`` is t1 − t0 rounded to 12 significant digits, so that equal steps share their
    operators. Raises :class:`SolverError` (Newton's included) when a solve fails.
    """
    conc = state.fields
    new_conc = dict(conc)
    budget: dict[str, StepBudget] = {}
    decay_loss: dict[str, FloatArray] = {}
    newton_max, kind = 1, "none"
    coupled = [s.name for s in ctx.species if s.in_user_law]
    order = list(ctx.species)
    mixing: list[tuple[FloatArray, FloatArray]] = []  # (sweep result, its change)
    tol = ctx.solver.tolerance
    sweep = 0
    for sweep in range(MAX_SWEEPS):  # noqa: B007 (the count is reported)
        before = {k: new_conc[k] for k in coupled}
        for s in order:
            user_rates = _user_rates(ctx, s, new_conc, conc)
            new, step_budget, its, loss, method = _step_species(
                ctx, state, s, t0, t1, dt, formula, decay_loss, user_rates)
            if loss is not None:
                decay_loss[s.name] = loss
            if s.nonlinear:
                newton_max, kind = max(newton_max, its), "newton"
            elif kind == "none":
                kind = method
            budget[s.name] = step_budget
            new_conc[s.name] = new
        if len(coupled) < 2:
            break
        change = max(float(np.max(np.abs(new_conc[k] - before[k]))) for k in coupled)
        scale = max(float(np.max(np.abs(new_conc[k]))) for k in coupled) or 1.0
        if change <= 10.0 * tol * scale:
            break
        order = list(ctx.species[next(i for i, s in enumerate(ctx.species) if s.in_user_law):])
        start = anderson(mixing, np.concatenate([before[k] for k in coupled]),
                         np.concatenate([new_conc[k] for k in coupled]))
        for k, part in zip(coupled, np.split(start, len(coupled)), strict=True):
            new_conc[k] = part
    else:
        msg = (f"the species of user_reactions did not agree after {MAX_SWEEPS} sweeps "
               f"in the step from t = {t0:.6g} s")
        raise SolverError(msg)
    return StepResult(fields=new_conc, budget=budget, newton_iterations=newton_max,
                      solver_kind=kind, sweeps=sweep + 1 if len(coupled) >= 2 else 0)


def _user_rates(ctx: StepContext, s: SpeciesModel, current: dict[str, FloatArray],
                start: dict[str, FloatArray]) -> tuple[RateLaw, RateLaw] | None:
    """The user law's rate of ``s`` with the other species at their newest values, and at
    the step's start (T11b); None when the species is not in a user law."""
    if not s.in_user_law or ctx.user_law is None:
        return None
    return ctx.user_law.rate_of(s.name, current), ctx.user_law.rate_of(s.name, start)


def _step_species(
    ctx: StepContext, state: StepState, s: SpeciesModel, t0: float, t1: float, dt: float,
    formula: StepCoefficients, decay_loss: dict[str, FloatArray],
    user_rates: tuple[RateLaw, RateLaw] | None,
) -> tuple[FloatArray, StepBudget, int, FloatArray | None, str]:
    """One species over one step: new field, budget terms, Newton iterations, the decay
    loss rate it hands to its daughters [kg/s per node] (None when it has none) and the
    kind of linear solver of the step system."""
    step = (ctx, state, s, t0, t1, dt)
    if ctx.systems.limited(s):  # T16b: a low-order backward Euler step, then corrected
        return _attempt(*step, BACKWARD_EULER, formula, decay_loss, user_rates)
    if ctx.systems.scheme.monotone and formula.theta < 1.0:
        # T16: the low-order Crank–Nicolson step is kept when it stays within the bounds,
        # else the step is taken again with backward Euler, which is bounded at any step
        out = _attempt(*step, formula, None, decay_loss, user_rates)
        if _within_bounds(ctx, s, state.fields[s.name], out[0]):
            return out
        return _attempt(*step, BACKWARD_EULER, None, decay_loss, user_rates)
    return _attempt(*step, formula, None, decay_loss, user_rates)


def _within_bounds(ctx: StepContext, s: SpeciesModel, old: FloatArray,
                   new: FloatArray) -> bool:
    """No value below zero, and none above the largest old, held or source value unless the
    species is produced (a daughter or a user law), each to the solver tolerance."""
    tol = ctx.solver.tolerance
    upper = ctx.sources.upper_bound[s.name]
    top = max(float(old.max()), float(np.max(upper, initial=0.0)),
              max((src.peak_concentration or 0.0 for src in ctx.sources.sources
                   if src.species == s.name), default=0.0))
    if new.min() < -tol * max(top, 1e-300):
        return False
    produced = s.spec.parent is not None or s.in_user_law
    return produced or bool(new.max() <= top * (1.0 + tol))


def _attempt(
    ctx: StepContext, state: StepState, s: SpeciesModel, t0: float, t1: float, dt: float,
    formula: StepCoefficients, target: StepCoefficients | None,
    decay_loss: dict[str, FloatArray], user_rates: tuple[RateLaw, RateLaw] | None,
) -> tuple[FloatArray, StepBudget, int, FloatArray | None, str]:
    """One species over one step with the coefficients ``formula``, corrected towards the
    Galerkin step of ``target`` when given (T16b); returns as :func:`_step_species`."""
    # sources are evaluated at the step's mean (θ-schemes) or its end (BDF2)
    ta, tb = (t1, t1) if ctx.time_scheme == "bdf2" else (t0, t1)
    held = ctx.sources.held(s.name, t0, t1)
    step_system = ctx.systems.system(s, dt, formula, held.active)
    fixed = step_system.fixed
    load = ctx.sources.load(s.name, t0, t1, ta, tb)
    production = 0.0
    if s.spec.parent is not None:  # first-order decay of the parent feeds it (T12)
        from_parent = s.spec.yield_from_parent * decay_loss[s.spec.parent]
        load = load + from_parent
        production = float(from_parent.sum())
    old = state.fields[s.name]
    switch_on = 0.0
    switched_on = fixed[~state.held_before[s.name][fixed]]
    if switched_on.size:
        # a source switching on holds its nodes at the source value from t0, so the scheme
        # does not see a ramp; the mass placed there is counted as input
        jump = np.zeros_like(old)
        jump[switched_on] = held.start[switched_on] - old[switched_on]
        switch_on = float(s.dissolved_volume @ jump) + \
            s.sorbed_mass(old + jump) - s.sorbed_mass(old)
        old = old + jump
    prev = None if state.older is None else state.older[s.name]
    hist_part = formula.a1 * old + (0.0 if prev is None else formula.a2 * prev)
    rhs = step_system.known_terms(hist_part, old, dt) + load
    guess = old.copy()
    guess[fixed] = held.end[fixed]
    aim = None if target is None else Target(
        target, None if ctx.systems.scheme.target == "linearised" else
        ctx.systems.target_system(s, dt, target, held.active), load,
        None if state.older is None else state.older[s.name])
    solve = _Solve(ctx, s, old, prev, dt, formula, user_rates, aim)
    new, r, other_loss, its = solve(step_system, rhs, guess)
    for _ in range(ctx.solver.shock_capturing_passes if ctx.solver.shock_capturing else 0):
        sys_x, extra = _with_shock_capturing(ctx, s, step_system, new, old, prev, dt, formula)
        new, r, other_loss, its_x = solve(sys_x, rhs + extra, new)
        its = max(its, its_x)
    if not np.all(np.isfinite(new)):
        msg = f"{s.name}: the step from t = {t0:.6g} s gave non-finite values"
        raise SolverError(msg)
    flux_state = new if solve.limited_state is None else solve.limited_state
    c_mid = formula.theta * flux_state + (1.0 - formula.theta) * old
    loss = None
    if s.name in ctx.decay_matrix:
        loss = ctx.decay_matrix[s.name] @ c_mid + (
            _sorbed_decay_rate(s, new, old, formula.theta) if s.isotherms else 0.0)
    now = StepBudget(
        source_input=dt * (float(r[fixed].sum()) + float(load.sum()) - production),
        produced=dt * production, decayed=dt * float(s.decay_weight @ c_mid) + other_loss,
        outflow={f: dt * float(w @ c_mid) for f, w in s.outflow_weights.items()},
        switch_on=switch_on, fixed=fixed, start=old)
    last = state.last_budget.get(s.name)
    if formula.a2 != 0.0 and last is not None:  # a multistep scheme spreads them (T13)
        a0, a2 = formula.a0, formula.a2
        now = replace(
            now, source_input=(now.source_input + a2 * last.source_input) / a0,
            produced=(now.produced + a2 * last.produced) / a0,
            decayed=(now.decayed + a2 * last.decayed) / a0,
            outflow={f: (x + a2 * last.outflow[f]) / a0 for f, x in now.outflow.items()})
    return new, now, its, loss, step_system.solver.method


@dataclass(frozen=True)
class Target:
    """The step flux correction aims at (T16b): its scheme's coefficients, its system (None
    when the target is linearised at the low-order step), the step's load [kg/s per node]
    and the level before (multistep schemes)."""

    scheme: StepCoefficients
    system: StepSystem | None
    load: FloatArray
    older: FloatArray | None


class _Solve:
    """Solves one species' step system: Newton when nonlinear, else one linear solve with
    the flux correction of T16b when limited. Remembers the low-order field the limited
    fluxes acted on (the budget's state)."""

    def __init__(self, ctx: StepContext, s: SpeciesModel, old: FloatArray,
                 prev: FloatArray | None, dt: float, formula: StepCoefficients,
                 user_rates: tuple[RateLaw, RateLaw] | None, target: Target | None) -> None:
        self.ctx, self.s, self.old, self.prev, self.dt, self.co = ctx, s, old, prev, dt, formula
        self.user_rates, self.target = user_rates, target
        self.limited_state: FloatArray | None = None

    def __call__(self, sy: StepSystem, rhs: FloatArray, guess: FloatArray,
                 ) -> tuple[FloatArray, FloatArray, float, int]:
        s, old, dt = self.s, self.old, self.dt
        if s.nonlinear:
            return nonlinear_step(s, sy, rhs, old, self.prev, guess, dt, self.co,
                                  tol=self.ctx.solver.tolerance,
                                  max_iter=self.ctx.solver.newton_max_iterations,
                                  user_rates=self.user_rates)
        out = guess.copy()
        out[sy.free] = sy.solver.solve(rhs[sy.free] - sy.S_fD @ guess[sy.fixed],
                                       x0=old[sy.free])
        # budget from the consistent residual of the full (unreduced) system (T9)
        r = sy.S @ out - rhs
        ops = self.ctx.systems.limiter(s)
        counts = {"target_iterations": 0, "limiter_passes": 0, "limiter_row_sweeps": 0.0}
        if ops is not None and self.target is not None:  # T16b: the limited fluxes, explicit
            fix, its = self._correct(ops, self.target, sy, guess, out)
            counts = {"target_iterations": its, "limiter_passes": fix.passes,
                      "limiter_row_sweeps": fix.row_sweeps}
            self.limited_state = fix.sink_state  # the state decay and outflow acted on
            out = fix.corrected
            r -= fix.fluxes
        logger.debug("%s: linear step, counts %s", s.name, counts,
                     extra={"step_iterations": _last_iterations(sy.solver), **counts})
        return out, r, 0.0, 1

    def _correct(self, ops: TargetFluxes, target: Target, sy: StepSystem, guess: FloatArray,
                 low: FloatArray) -> tuple[Correction, int]:
        """The low-order step ``low`` corrected towards the target (T16b), linearised at it
        or solved, and the target solve's Krylov iterations (0 when linearised)."""
        theta, upper = target.scheme.theta, self.ctx.sources.upper_bound[self.s.name]
        if target.system is None:  # linearised at c_L: no second solve
            return linearised_correction(ops, low, self.old, self.dt, theta, sy.fixed,
                                         upper=upper), 0
        high = self._target_step(guess, low)
        return limited_target_fluxes(ops, low, high, self.old, self.dt, theta, sy.fixed,
                                     upper=upper), \
            _last_iterations(target.system.solver)

    def _target_step(self, guess: FloatArray, low: FloatArray) -> FloatArray:
        """The Galerkin step of the target scheme (T16b), started from the low-order one."""
        assert self.target is not None and self.target.system is not None
        formula, sy, load, prev = (self.target.scheme, self.target.system, self.target.load,
                              self.target.older)
        hist = formula.a1 * self.old + (0.0 if prev is None else formula.a2 * prev)
        rhs = sy.known_terms(hist, self.old, self.dt) + load
        high = guess.copy()
        high[sy.free] = sy.solver.solve(rhs[sy.free] - sy.S_fD @ guess[sy.fixed],
                                        x0=low[sy.free])
        return high


def _last_iterations(solver: LinearSolver | NearbySolver | None) -> int:
    """Krylov iterations of the solver's last solve (0 for a direct solve or none)."""
    its = getattr(solver, "iterations", None)
    return int(its[-1]) if its else 0


def _with_shock_capturing(
    ctx: StepContext, s: SpeciesModel, step_system: StepSystem, new: FloatArray, old: FloatArray,
    prev: FloatArray | None, dt: float, formula: StepCoefficients,
) -> tuple[StepSystem, FloatArray]:
    """The step system with the shock-capturing diffusion of the last iterate held fixed
    (T15), and the explicit part it adds to the right-hand side."""
    site, pattern, c = ctx.site, ctx.site.pattern, cell_coefficients(s)
    assert ctx.grads is not None  # computed when shock capturing is on
    nu = shock_diffusivity(
        site.cells, ctx.grads, new, old, dt=dt, m=c.storage, q=ctx.darcy_flux, k=c.decay,
        h=c.element_length, along_dispersion=c.storage * c.along_flow_diffusivity,
        theta_t=formula.theta, time_weights=(formula.a0, formula.a1, formula.a2), c_older=prev)
    Kx = isotropic_stiffness(site.points, site.cells, nu, site.n_nodes, pattern=pattern)
    S_x = pattern.matrix(step_system.S.tocsr().data + formula.theta * Kx.data)
    S_x_ff, S_x_fD = split_rows(S_x, step_system.free, step_system.fixed)
    # small systems: a new factor; large ones: the step's preconditioner reused
    tol = ctx.solver.tolerance
    solver_x: LinearSolver | NearbySolver = LinearSolver(S_x_ff, method="direct", tol=tol) \
        if step_system.solver.method == "direct" else NearbySolver(
            S_x_ff, step_system.solver.preconditioner(), tol, step_system.solver.method)
    return (replace(step_system, S=S_x, S_fD=S_x_fD, solver=solver_x, newton_window=None),
            (formula.theta - 1.0) * (Kx @ old))


def anderson(history: list[tuple[FloatArray, FloatArray]], x: FloatArray,
             g: FloatArray) -> FloatArray:
    """Start of the next sweep over the species of a user law (T11b): Anderson's
    acceleration of the fixed-point iteration x → g(x) (Walker & Ni 2011, "Anderson
    acceleration for fixed-point iterations", SIAM J. Numer. Anal. 49). ``history`` holds
    the last sweeps' (g, g − x) and is updated; the result is g − ΔG γ with γ minimising
    ‖f − ΔF γ‖₂, the differences taken against the newest sweep. The plain g when there
    is no history yet or the combination is not finite."""
    f = g - x
    history.append((g, f))
    del history[:-(MIXING_DEPTH + 1)]
    if len(history) < 2:
        return g
    dF = np.stack([f - fi for _, fi in history[:-1]], axis=1)
    dG = np.stack([g - gi for gi, _ in history[:-1]], axis=1)
    gamma = np.linalg.lstsq(dF, f, rcond=None)[0]
    out = g - dG @ gamma
    return out if np.all(np.isfinite(out)) else g


def nonlinear_step(
    s: SpeciesModel, step_system: StepSystem, rhs: FloatArray, old: FloatArray,
    prev: FloatArray | None, new: FloatArray, dt: float, formula: StepCoefficients, *, tol: float,
    max_iter: int, user_rates: tuple[RateLaw, RateLaw] | None = None,
) -> tuple[FloatArray, FloatArray, float, int]:
    """One step with nonlinear sorption and/or reactions, by Newton (T10, T11, T13).

    R(c) = S c − rhs + [a0 Σ(c) + a1 Σ(c^n) + a2 Σ(c^{n−1})]/Δt
    + λ_s [θ Σ(c) + (1 − θ) Σ(c^n)] + θ L(c) + (1 − θ) L(c^n), with Σ the lumped nodal
    sorbed mass and L the nodal reaction loss; J = S + diag(Σ'(c)(a0/Δt + θ λ_s) + θ L'(c)).
    ``user_rates``: the user law's rate of the species with the others at their newest
    values and at the step's start (T11b). Returns the new field, the full residual (for
    the budget), the mass lost in the step [kg] by sorbed-phase decay and reactions, and
    the Newton iteration count. Each correction is solved only to Eisenstat & Walker's
    forcing term (R14b); convergence is judged on R itself.
    """
    rate_now, rate_start = (None, None) if user_rates is None else user_rates
    free = step_system.free
    loss_old, _ = s.reaction_loss(old, rate_start)
    res = StepResidual(s, step_system, rhs, old, prev, new, dt, formula, rate_now, loss_old)
    S_ff = step_system.solver.A  # S on the free nodes, as the solver holds it
    # the step matrix's splitting or preconditioner serves every Newton iteration of the
    # step: J differs from S_ff by a diagonal (T10, T11); each correction is solved only to
    # the forcing term (R14b)
    corrections = CorrectionSolver(step_system.solver)

    def jacobian_solve(x: FloatArray, r: FloatArray, eta: float) -> FloatArray:
        return corrections.solve(res.jacobian_diagonal(x), r, eta)

    start = _window_start(step_system.newton_window, res, old[free])
    # an absolute floor at the round-off of evaluating R: near a steady state the first
    # residual is already tiny and tol times it would lie below what floating point reaches
    old_image = S_ff @ old[free] if start is None else start.old_image
    scale = max(float(np.linalg.norm(rhs[free])), float(np.linalg.norm(old_image)))
    # from cⁿ the first iterate is the linearised step's solution; from the window's start
    # the target stays tol ‖R(cⁿ)‖ (R14c)
    result = newton(res.free_rows, jacobian_solve,
                    old[free].copy() if start is None else start.x, rtol=tol,
                    atol=ROUND_OFF_FACTOR * np.finfo(float).eps * scale, max_iter=max_iter,
                    forcing=Forcing(), started_from=None if start is None else start.reference,
                    r0=None if start is None else start.residual)
    logger.info("%s: Newton %d iterations, residual norms %s, Krylov iterations %s%s",
                s.name, result.iterations, ", ".join(f"{r:.2e}" for r in result.residual_norms),
                corrections.iterations, "" if start is None else
                f" (started from earlier steps; |R(c^n)| = {start.reference:.2e})",
                extra={"krylov_iterations": corrections.iterations})
    if step_system.newton_window is not None:
        image = res.last_product(result.x)
        step_system.newton_window.add(result.x, S_ff @ result.x if image is None else image)
    c = res.field(result.x)
    r_full = res.full(c)
    return c, r_full, res.decayed(c, loss_old, dt), result.iterations


def _window_start(window: StepWindow | None, res: StepResidual,
                  old_free: FloatArray) -> WindowStart | None:
    """Newton's start from the earlier steps of this step matrix (R14c): when their window
    ends at cⁿ and the best combination lowers ‖R‖ below ‖R(cⁿ)‖; else None (start
    from cⁿ)."""
    if window is None or not window.ends_at(old_free):
        return None
    start = window_start(window, res.rows_with_product, res.jacobian_diagonal)
    return start if start is not None and start.norm < start.reference else None


def _sorbed_decay_rate(s: SpeciesModel, new: FloatArray, old: FloatArray,
                       theta_t: float) -> FloatArray:
    """Nodal decay rate of the lumped sorbed phase [kg/s] over a step (T10, T12)."""
    lam_s = float(s.sorbed_decay)
    return lam_s * (theta_t * s.sorbed(new)[0] + (1 - theta_t) * s.sorbed(old)[0])

