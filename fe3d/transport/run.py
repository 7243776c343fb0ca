"""run_transport: steps every species from 0 to the end time; yields snapshots, writes nothing.

Equation (theory.md T0), per species, with m = θR = θ + ρ_b K_d:

    m ∂c/∂t + ∇·(q c − θD∇c) + k c = 0,   k = λ m (or λ θ when only the dissolved phase decays)

discretised with P1 elements (T1–T8, T16), in time by backward Euler, Crank–Nicolson or
variable-step BDF2 (T13), with fixed steps or steps from a local error estimate (T14). The
loop ties together parts with one job each: what each species needs
(:mod:`~fe3d.transport.model`), where the sources act (:mod:`~fe3d.transport.sources`),
the step systems (:mod:`~fe3d.transport.systems`), one step of every species
(:mod:`~fe3d.transport.step`), the step planner (:mod:`~fe3d.transport.planner`) and the
running budget and diagnostics (:mod:`~fe3d.transport.accumulate`).
"""

from __future__ import annotations

import logging
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import scipy.sparse as sp

from fe3d._threads import limit_blas_threads
from fe3d._typing import FloatArray
from fe3d.case.parts import TransportInputs
from fe3d.case.schema import TimeControl
from fe3d.errors import SolverError
from fe3d.flow.solve import FlowField
from fe3d.mesh.locate import sample_operator, screen_points
from fe3d.mesh.site_mesh import SiteMesh
from fe3d.p1 import gradients
from fe3d.reactions import kinetics
from fe3d.transport.accumulate import (
    BudgetTotals,
    RunStatistics,
    TransportDiagnostics,
    grid_peclet,
)
from fe3d.transport.assembly import P1_MASS
from fe3d.transport.budget import MassBudget
from fe3d.transport.courant import PlumeCourant
from fe3d.transport.model import SpeciesModel, build_medium, build_species, lumped
from fe3d.transport.planner import StepPlanner, time_steps
from fe3d.transport.sources import build_source_geometry, initial_fields
from fe3d.transport.step import StepContext, StepResult, StepState, UserLaw, take_step
from fe3d.transport.systems import Scheme, StepSystems
from fe3d.transport.timeschemes import local_error, step_coefficients, weighted_error

__all__ = ["Snapshot", "TransportDiagnostics", "next_state", "run_transport", "step_context",
           "time_steps"]

logger = logging.getLogger(__name__)


@dataclass(frozen=True)
class Snapshot:
    """State at one output time.

    ``concentration`` maps species → nodal concentration [kg/m³]; ``history_times`` [s] and
    ``history`` (species → array ``(n_times, n_observations)`` [kg/m³]) hold every step so far.
    """

    time: float
    concentration: dict[str, FloatArray]
    budgets: dict[str, MassBudget]
    history_times: FloatArray
    history: dict[str, FloatArray]
    diagnostics: TransportDiagnostics


def run_transport(
    site: SiteMesh, flow: FlowField, inputs: TransportInputs, *,
    on_step: Callable[[float, float], None] | None = None, base_dir: Path | None = None,
) -> Iterator[Snapshot]:
    """Step every species from 0 to ``inputs.time.end``; yield a :class:`Snapshot` at t = 0 and
    at every output time.

    Parameters
    ----------
    site, flow
        Mesh and steady flow field.
    inputs
        Materials, species, sources, observation points, time and solver controls
        (:meth:`TransportInputs.of <fe3d.case.parts.TransportInputs.of>` a case).
    on_step
        Called after every step with (time reached, end time) [s], for progress display.
    base_dir
        Folder searched first for the module of ``user_reactions.function`` (the case
        file's folder).

    Raises
    ------
    NewtonError, SolverError
        A step still fails after ``solver.max_step_cuts`` halvings; every snapshot yielded
        before stays valid.
    """
    limit_blas_threads()
    ctx = step_context(site, flow, inputs, base_dir)
    species, tc = ctx.species, inputs.time
    probe = _observation_operator(site, flow, inputs)
    schedule = inputs.output_schedule()
    switches = {t for src in inputs.sources for t in (src.start, src.stop)
                if t is not None and 0 < t < tc.end}
    out_set = set(schedule)
    planner = StepPlanner(tc, sorted({*schedule, *switches, tc.end}), switches,
                          inputs.solver.max_step_cuts)
    start = initial_fields(inputs, site, ctx.sources)
    state = StepState(fields={s.name: start[s.name] for s in species},
                      held_before={s.name: np.zeros(site.n_nodes, dtype=bool) for s in species},
                      older=None, last_budget={})
    totals = BudgetTotals(species, state.fields)
    stats = RunStatistics({s.name: grid_peclet(s, ctx.systems.medium.seepage_velocity,
                                               ctx.systems.medium.porosity) for s in species})
    history_times, history = [0.0], {s.name: [probe @ state.fields[s.name]] for s in species}
    accepted = [(0.0, state.fields)]  # recent levels for the local error estimate
    dt_prev: float | None = None

    def snapshot(t: float) -> Snapshot:
        return Snapshot(time=t, concentration={k: c.copy() for k, c in state.fields.items()},
                        budgets=totals.at(t, species, state.fields),
                        history_times=np.array(history_times),
                        history={k: np.array(v) for k, v in history.items()},
                        diagnostics=stats.diagnostics(planner.step_cuts, planner.rejected))

    courant = PlumeCourant(site, species, ctx.sources)
    yield snapshot(0.0)
    while not planner.finished:
        rates = courant.rates(state.fields, planner.t)
        step = planner.next(PlumeCourant.step(rates, tc.courant, tc.end))
        formula = step_coefficients(tc.scheme, step.dt, dt_prev)
        try:
            result = take_step(ctx, state if formula.a2 else _without_older(state),
                               step.t0, step.t1, step.dt, formula)
        except SolverError as exc:  # NewtonError included
            planner.failed(step, exc)
            continue
        error = _local_error(tc, species, result, step.t1, accepted) \
            if planner.adaptive else None
        if not planner.judge(step, result.newton_iterations, error):
            continue
        totals.add(result.budget)
        lows = stats.add(result, step.dt, species, site.points, rates)
        if logger.isEnabledFor(logging.INFO):
            logger.info("step %d: t = %.6g s, Δt = %.4g s, %s%s", stats.n_steps, step.t1,
                        step.dt, "; ".join(lows), f"; Newton {result.newton_iterations} "
                        "iterations" if result.solver_kind == "newton" else "")
        restart = planner.advance(step)
        state = next_state(result, site.n_nodes, restart)
        dt_prev = None if restart else step.dt  # a source switched: multistep schemes restart
        accepted = [(step.t1, state.fields)] if restart else [
            *accepted[-2:], (step.t1, state.fields)]
        history_times.append(step.t1)
        for s in species:
            history[s.name].append(probe @ state.fields[s.name])
        if on_step is not None:
            on_step(step.t1, tc.end)
        if any(abs(step.t1 - x) <= 1e-9 * max(1.0, x) for x in out_set):
            yield snapshot(step.t1)


def _without_older(state: StepState) -> StepState:
    """The state as a one-step scheme sees it (no level before the start)."""
    return StepState(fields=state.fields, held_before=state.held_before, older=None,
                     last_budget=state.last_budget)


def next_state(result: StepResult, n: int, restart: bool) -> StepState:
    """The state after an accepted step; after a restart nothing is carried (T13)."""
    held = {}
    for name, b in result.budget.items():
        held[name] = np.zeros(n, dtype=bool)
        held[name][b.fixed] = True
    return StepState(fields=dict(result.fields), held_before=held,
                     older=None if restart else {k: b.start for k, b in result.budget.items()},
                     last_budget={} if restart else dict(result.budget))


def _local_error(tc: TimeControl, species: tuple[SpeciesModel, ...], result: StepResult,
                 t1: float, accepted: list[tuple[float, dict[str, FloatArray]]]) -> float | None:
    """Largest weighted local error of the step over the species (T14; 1 = tolerance),
    None without enough earlier levels."""
    times = [t1] + [a for a, _ in reversed(accepted)]
    errs = []
    tol = tc.error_tolerance
    for s in species:
        e = local_error(tc.scheme, result.fields[s.name], times,
                        [c[s.name] for _, c in reversed(accepted)])
        if e is not None:
            errs.append(weighted_error(e, result.fields[s.name], rtol=tol,
                                       atol=tol * s.spec.limit))
    return max(errs) if errs else None


def step_context(site: SiteMesh, flow: FlowField, inputs: TransportInputs,
                  base_dir: Path | None) -> StepContext:
    """Everything the steps share, built once."""
    medium = build_medium(site, flow, inputs.ground)
    species = tuple(build_species(site, flow, inputs, medium))
    node_volume = lumped(site, np.abs(medium.cell_volume))
    geometry = build_source_geometry(site, flow, inputs, node_volume=node_volume,
                                     spacing=inputs.sample_spacing)
    systems = StepSystems(site, medium, flow.darcy_flux, Scheme.of(inputs.solver), inputs.time,
                          inputs.solver, geometry.held_nodes)
    parents = {spec.parent for spec in inputs.species.values() if spec.parent is not None}
    decay_matrix = {s.name: site.pattern.element_sum(
        (s.coefficients.decay * np.abs(medium.cell_volume))[:, None, None] * P1_MASS)
        for s in species if s.name in parents}
    user = inputs.user_reactions
    user_law = None if user is None else UserLaw(
        species=tuple(user.species), law=kinetics.user_kinetics(
            user.function, n_species=len(user.species), key_path="user_reactions.function",
            search_dirs=[base_dir or Path()]))
    # basis gradients (cells × 4 × 3) only where a term needs them stored: shock capturing
    grads = gradients(site.points, site.cells)[0] if inputs.solver.shock_capturing else None
    return StepContext(site=site, darcy_flux=flow.darcy_flux, species=species,
                       systems=systems, sources=geometry, decay_matrix=decay_matrix,
                       user_law=user_law, solver=inputs.solver, time_scheme=inputs.time.scheme,
                       grads=grads)


def _observation_operator(site: SiteMesh, flow: FlowField, inputs: TransportInputs,
                          ) -> sp.csr_matrix:
    """Rows that sample the nodal field at each observation point: a point value, or the
    conductivity-weighted mean over a well screen."""
    kh_cell = flow.conductivity[0]
    spacing = inputs.sample_spacing
    rows = []
    for o in inputs.observation_points:
        if o.screen is not None:
            pts = screen_points(o.x, o.y, o.screen[0], o.screen[1], spacing=spacing)
            op, _ = sample_operator(site.points, site.cells, pts, weights_per_cell=kh_cell)
        else:
            op, _ = sample_operator(site.points, site.cells, np.array([[o.x], [o.y], [o.z]]))
        rows.append(op)
    return sp.vstack(rows).tocsr() if rows else sp.csr_matrix((0, site.n_nodes))
