"""The long-term plume: steady-state transport for the sources that never stop (theory.md T17).

With ∂/∂t = 0 the transport equation of T0 loses its storage term, so each species needs one
linear solve K c = b, or one Newton solve when a nonlinear reaction or the decay of a
nonlinearly sorbed phase acts (T10, T11). K is the spatial operator of the case's scheme.
Under the default (``solver.monotone`` with ``flux_limiting``) the solve starts from the
low-order operator of discrete upwinding (T16, an M-matrix: bounded, but more diffusive) and is
corrected towards the Galerkin solve as far as local bounds allow
(:mod:`~fe3d.transport.steady_correction`); without ``flux_limiting`` it stays low order; with
``monotone = false`` it is the Galerkin operator with SUPG built for an unbounded step (T6, T8),
sharper but not bounded. Species are solved parents first, each daughter loaded by its parent's
steady decay (T12). Only continuous sources count (:func:`continuous_sources`).
"""

from __future__ import annotations

import logging
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np
import scipy.sparse as sp

from fe3d._threads import limit_blas_threads
from fe3d._typing import FloatArray, IndexArray
from fe3d.case.parts import TransportInputs
from fe3d.case.schema import Source
from fe3d.errors import CaseError
from fe3d.flow.solve import FlowField
from fe3d.linalg import LinearSolver
from fe3d.mesh.site_mesh import SiteMesh
from fe3d.p1 import split_rows
from fe3d.transport.model import SpeciesModel
from fe3d.transport.run import step_context
from fe3d.transport.sources import SourceGeometry
from fe3d.transport.steady_correction import steady_correction
from fe3d.transport.step import StepContext, nonlinear_step
from fe3d.transport.systems import StepSystem
from fe3d.transport.timeschemes import StepCoefficients

__all__ = ["STEADY_TAU_STEP", "SteadyBalance", "SteadySpecies", "SteadyTransport",
           "continuous_sources", "solve_steady_transport"]

logger = logging.getLogger(__name__)

STEADY_TAU_STEP = 1e30
"""Step length [s] τ (T8) is built with for the steady SUPG operator: its time term
(2/Δt)² = 4e-60 s⁻² is nil beside any advective or decay term, yet keeps τ finite in cells
where water stands still (there a = 0, so the SUPG terms vanish all the same)."""

STEADY = StepCoefficients(a0=0.0, a1=0.0, a2=0.0, theta=1.0)
"""The steady residual as a step of T13 with no storage: R(c) = K c − b + λ_s Σ(c) + L(c)."""


@dataclass(frozen=True)
class SteadyBalance:
    """Steady mass balance of one species [kg/s]: what enters at held nodes and loads,
    what leaves through each outflow item, what decays (dissolved, sorbed, reactions)."""

    source_input: float
    outflow: dict[str, float]
    decayed: float

    @property
    def imbalance(self) -> float:
        """input − outflow − decayed [kg/s]; zero to the solver tolerance (T9 at ∂/∂t = 0)."""
        return self.source_input - sum(self.outflow.values()) - self.decayed

    @property
    def relative_error(self) -> float:
        """|imbalance| / input [-] (0 when nothing enters)."""
        return abs(self.imbalance) / self.source_input if self.source_input > 0 else 0.0


@dataclass(frozen=True)
class SteadySpecies:
    """The long-term field of one species: nodal concentration [kg/m³] ``(n_nodes,)``, the
    sources it counts and those it leaves out (they stop, deplete, or only start a plume),
    its steady balance, the operator it was solved with (``"flux_corrected"``, bounded, the
    default; ``"low_order"``, bounded and more diffusive; ``"supg"`` or ``"galerkin"``, which
    may undershoot; T17) and the Newton or correction iterations (0: one linear solve)."""

    name: str
    concentration: FloatArray
    counted_sources: tuple[str, ...]
    left_out_sources: tuple[str, ...]
    balance: SteadyBalance
    operator: str
    iterations: int


@dataclass(frozen=True)
class SteadyTransport:
    """Every species' long-term field, parents first."""

    species: tuple[SteadySpecies, ...]


def continuous_sources(sources: tuple[Source, ...]) -> tuple[tuple[Source, ...],
                                                             tuple[Source, ...]]:
    """The sources that act for ever (no ``stop``, no depletion half-life, not an initial
    plume) and the others, whose long-time effect is nil: a source that stops or depletes
    leaves a plume that moves on and fades, and an initial plume is flushed out."""
    kept = tuple(s for s in sources if s.stop is None and s.depletion_half_life is None
                 and s.kind != "initial_plume")
    return kept, tuple(s for s in sources if s not in kept)


def _late_time(sources: tuple[Source, ...]) -> float:
    """A time [s] after every start and every row of a release series: the sources'
    strengths are constant from then on (T3c: a series holds its last value)."""
    times = [0.0] + [s.start for s in sources] + [
        t for s in sources if s.release_series is not None for t, _ in s.release_series]
    return 2.0 * max(times) + 1.0


def solve_steady_transport(site: SiteMesh, flow: FlowField, inputs: TransportInputs, *,
                           base_dir: Path | None = None) -> SteadyTransport:
    """Solve the steady transport of every species for the continuous sources (theory.md
    T17).

    Raises
    ------
    CaseError
        A user reaction law couples species (``user_reactions``): the long-term plume solves
        one species at a time; or a species has sources but nothing removes it (no outflow,
        no decay), so it has no steady state.
    SolverError, NewtonError
        The linear or Newton solve fails.
    """
    limit_blas_threads()
    if inputs.user_reactions is not None:
        msg = ("no user reaction law: the long-term plume solves one species at a time; "
               "use the transient run for species coupled by a user law")
        key, names = "user_reactions.species", ", ".join(inputs.user_reactions.species)
        raise CaseError(key, names, msg)
    kept, left_out = continuous_sources(inputs.sources)
    ctx = step_context(site, flow, inputs, base_dir)
    geometry = replace(ctx.sources, sources=kept)
    t_late = _late_time(kept)
    decay_loss: dict[str, FloatArray] = {}
    out = []
    for s in ctx.species:
        load = geometry.load(s.name, t_late, t_late, t_late, t_late)
        if s.spec.parent is not None:  # the parent's steady decay feeds it (T12)
            load = load + s.spec.yield_from_parent * decay_loss[s.spec.parent]
        held = geometry.held(s.name, t_late, t_late)
        fixed = _held_nodes(geometry, held.active, site.n_nodes)
        solved = _solve_species(ctx, s, load, fixed, held.end)
        c = solved.concentration
        if s.name in ctx.decay_matrix:
            decay_loss[s.name] = ctx.decay_matrix[s.name] @ c + (
                float(s.sorbed_decay) * s.sorbed(c)[0] if s.isotherms else 0.0)
        out.append(replace(
            solved, counted_sources=tuple(x.name for x in kept if x.species == s.name),
            left_out_sources=tuple(x.name for x in left_out if x.species == s.name)))
    return SteadyTransport(species=tuple(out))


def _held_nodes(geometry: SourceGeometry, active: tuple[str, ...], n: int) -> IndexArray:
    """Nodes held by the active fixed concentrations, sorted."""
    is_held = np.zeros(n, dtype=bool)
    for name in active:
        is_held[geometry.held_nodes[name]] = True
    return np.nonzero(is_held)[0]


def _solve_species(ctx: StepContext, s: SpeciesModel, load: FloatArray, fixed: IndexArray,
                   held_values: FloatArray) -> SteadySpecies:
    """K c = load on the free nodes with c = held_values on ``fixed``: one linear solve,
    corrected towards the Galerkin solve when the species is limited, or Newton when it is
    nonlinear (T17); the field, its balance, operator and iterations (name and sources are
    filled in by the caller)."""
    n = ctx.site.n_nodes
    operator = _operator(ctx, s)
    if fixed.size == 0 and not np.any(load > 0.0):  # no source of this species acts for ever
        return SteadySpecies(s.name, np.zeros(n), (), (), SteadyBalance(
            0.0, dict.fromkeys(s.outflow_weights, 0.0), 0.0), operator, 0)
    _check_removal(s, ctx)
    K = ctx.systems.operators(s, STEADY_TAU_STEP)[1]
    free = np.setdiff1d(np.arange(n), fixed, assume_unique=True)
    K_ff, K_fD = split_rows(K, free, fixed)
    solver = LinearSolver(K_ff, method=ctx.solver.linear_solver, tol=ctx.solver.tolerance)
    c = np.zeros(n)
    c[fixed] = held_values[fixed]

    def solve(rhs: FloatArray, start: FloatArray) -> FloatArray:
        out = c.copy()
        out[free] = solver.solve(rhs[free] - K_fD @ c[fixed], x0=start[free])
        return out

    c = solve(load, c)
    other_loss, its = 0.0, 0
    r = K @ c - load  # the residual: on the held nodes' rows, what they take in (T9)
    ops = ctx.systems.limiter(s)
    if s.nonlinear:  # Newton from the field without the nonlinear losses (T10, T11)
        system = StepSystem(S=K, explicit_part=None, M=sp.csr_matrix(K.shape), lumped=None,
                            solver=solver, free=free, fixed=fixed, S_fD=K_fD)
        c, r, other_loss, its = nonlinear_step(
            s, system, load, c, None, c, 1.0, STEADY, tol=ctx.solver.tolerance,
            max_iter=ctx.solver.newton_max_iterations)
    elif ops is not None:  # flux correction towards the Galerkin solve
        fix = steady_correction(ops, solve, c, load, fixed, ctx.sources.upper_bound[s.name])
        c, its = fix.field, fix.iterations
        r = K @ c - load - fix.fluxes
        operator = operator if fix.converged else "low_order"
    balance = SteadyBalance(
        source_input=float(r[fixed].sum()) + float(load.sum()),
        outflow={f: float(w @ c) for f, w in s.outflow_weights.items()},
        decayed=float(s.decay_weight @ c) + other_loss)
    logger.info("%s: steady balance in %.4g kg/s, relative error %.2e", s.name,
                balance.source_input, balance.relative_error)
    return SteadySpecies(s.name, c, (), (), balance, operator, its)


def _operator(ctx: StepContext, s: SpeciesModel) -> str:
    """The operator a species is solved with: the scheme's (T16, T16b, T6), except that a
    nonlinear species is not flux corrected (as in the transient run)."""
    scheme = ctx.systems.scheme
    if scheme.monotone:
        return "flux_corrected" if ctx.systems.limited(s) else "low_order"
    return "supg" if scheme.supg else "galerkin"


def _check_removal(s: SpeciesModel, ctx: StepContext) -> None:
    """A species with a continuous source needs somewhere to go: water leaving the model or
    decay; otherwise its mass grows for ever and there is no steady state."""
    leaves = any(float(w.sum()) > 0.0 for w in s.outflow_weights.values())
    decays = (float(s.decay_weight.sum()) > 0.0 or s.sorbed_decay > 0.0
              or s.reaction is not None)
    if not (leaves or decays):
        msg = ("a half-life or water leaving the model: with neither, a continuous source "
               "adds mass for ever and there is no long-term plume")
        key = f"species.{s.name}.half_life"
        raise CaseError(key, "none", msg)
