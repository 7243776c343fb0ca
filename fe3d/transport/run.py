"""run_transport: steps every species from 0 to the end time; yields snapshots, writes nothing.

Equation (theory.md T0), per species, with m = θR = θ + ρ_b K_d:

    m ∂c/∂t + ∇·(q c − θD∇c) + k c = 0,   k = λ m (or λ θ when only the dissolved phase decays)

discretised with P1 elements (T1–T8, T16), in time by backward Euler, Crank–Nicolson or
variable-step BDF2 (T13), with fixed steps or steps from a local error estimate (T14). The
loop ties together parts with one job each: what each species needs
(:mod:`~fe3d.transport.model`), where the sources act (:mod:`~fe3d.transport.sources`),
the step systems (:mod:`~fe3d.transport.systems`), one step of every species
(:mod:`~fe3d.transport.step`), the step planner (:mod:`~fe3d.transport.planner`) and the
running budget and diagnostics (:mod:`~fe3d.transport.accumulate`). What the loop carries
from step to step is one record; a :class:`~fe3d.transport.checkpoint.Checkpoint` is its
frozen copy, from which a stopped run continues.
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
)
from fe3d.transport.assembly import P1_MASS
from fe3d.transport.checkpoint import (
    Checkpoint,
    Checkpointer,
    check_resumable,
    run_fingerprints,
)
from fe3d.transport.courant import PlumeCourant, PlumeRate
from fe3d.transport.model import SpeciesModel, build_medium, build_species
from fe3d.transport.planner import PlannedStep, StepPlanner, time_steps
from fe3d.transport.run_wide import RunWideField
from fe3d.transport.snapshot import Snapshot
from fe3d.transport.sources import build_source_geometry, initial_fields
from fe3d.transport.step import StepContext, StepResult, StepState, UserLaw, take_step
from fe3d.transport.systems import Scheme, StepSystems
from fe3d.transport.timeschemes import local_error, step_coefficients, weighted_error

__all__ = ["Snapshot", "TransportDiagnostics", "next_state", "run_transport", "step_context",
           "time_steps"]

logger = logging.getLogger(__name__)


def run_transport(
    site: SiteMesh, flow: FlowField, inputs: TransportInputs, *,
    on_step: Callable[[float, float], None] | None = None, base_dir: Path | None = None,
    resume_from: Checkpoint | None = None, checkpoints: Checkpointer | None = None,
    extra_probe: sp.csr_matrix | None = None,
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
        Called after every step with (time reached, end time) [s], for progress display. A
        KeyboardInterrupt it raises is passed on after a checkpoint is saved.
    base_dir
        Folder searched first for the module of ``user_reactions.function`` (the case
        file's folder).
    resume_from
        Continue from this checkpoint (of the same mesh and flow) instead of from t = 0:
        the snapshots yielded before it are not yielded again, and every later one is the
        one an uninterrupted run yields, bit for bit.
    checkpoints
        Offered the state after every accepted step (saves it when due, stops the run when
        asked to).
    extra_probe
        More rows sampled at every step, shape ``(n_rows, n_nodes)``, after the observation
        points (e.g. the receptors' flux-averaged concentration): each history then has one
        column per observation point, then one per row. A run resumed must be given the same.

    Raises
    ------
    NewtonError, SolverError
        A step still fails after ``solver.max_step_cuts`` halvings; every snapshot yielded
        before stays valid.
    CaseError
        ``resume_from`` belongs to another mesh or flow field.

    Notes
    -----
    A resumed run repeats the uninterrupted run bit for bit when its step systems are solved
    directly (``solver.linear_solver = "direct"``, or ``"auto"`` up to 5,000 unknowns). The
    iterative solvers start each solve from a window of their earlier solutions
    (fe3d/krylov.py), which a checkpoint does not hold: there the continued steps agree
    with the uninterrupted ones within ``solver.tolerance``.
    """
    limit_blas_threads()
    ctx = step_context(site, flow, inputs, base_dir)
    courant = PlumeCourant(site, ctx.species, ctx.sources)  # reads the per-cell coefficients
    ctx = ctx.set_up()  # operators built; per-cell coefficients freed where no step reads them
    species, tc = ctx.species, inputs.time
    probe = _observation_operator(site, flow, inputs)
    if extra_probe is not None:
        probe = sp.vstack([probe, extra_probe]).tocsr()
    schedule = inputs.output_schedule()
    switches = {t for src in inputs.sources for t in (src.start, src.stop)
                if t is not None and 0 < t < tc.end}
    out_set = set(schedule)
    planner = StepPlanner(tc, sorted({*schedule, *switches, tc.end}), switches,
                          inputs.solver.max_step_cuts)
    run = _RunningState.started(site, flow, inputs, ctx, planner, probe) \
        if resume_from is None else _RunningState.resumed(site, flow, ctx, planner, probe,
                                                          resume_from)
    if run.outputs < _yields_until(planner.t, out_set):  # t = 0, or an output not yet given
        run.outputs += 1
        yield run.snapshot(planner.t)
    while not planner.finished:
        rates = courant.rates(run.state.fields, planner.t)
        step = planner.next(PlumeCourant.step(rates, tc.courant, tc.end))
        formula = step_coefficients(tc.scheme, step.dt, run.dt_prev)
        try:
            result = take_step(ctx, run.state if formula.a2 else _without_older(run.state),
                               step.t0, step.t1, step.dt, formula)
        except SolverError as exc:  # NewtonError included
            planner.failed(step, exc)
            continue
        error = _local_error(tc, species, result, step.t1, run.accepted) \
            if planner.adaptive else None
        if not planner.judge(step, result.newton_iterations, error):
            continue
        run.commit(step, result, rates)
        run.stats.note_plume_peclet(courant.largest_peclet)
        try:
            if on_step is not None:
                on_step(step.t1, tc.end)
        except KeyboardInterrupt:
            if checkpoints is not None:
                checkpoints.save(run.checkpoint())
            raise
        if any(abs(step.t1 - x) <= 1e-9 * max(1.0, x) for x in out_set):
            run.outputs += 1
            yield run.snapshot(step.t1)
        if checkpoints is not None and not planner.finished:
            checkpoints.offer(run.checkpoint)


def _yields_until(t: float, out_set: set[float]) -> int:
    """Snapshots a run yields up to time ``t`` [s]: t = 0 and the output times reached."""
    return 1 + sum(1 for x in out_set if 0 < x <= t + 1e-9 * max(1.0, x))


@dataclass
class _RunningState:
    """What the loop of :func:`run_transport` carries from step to step (a
    :class:`~fe3d.transport.checkpoint.Checkpoint` is its frozen copy)."""

    site: SiteMesh
    species: tuple[SpeciesModel, ...]
    probe: sp.csr_matrix
    planner: StepPlanner
    state: StepState
    totals: BudgetTotals
    stats: RunStatistics
    history_times: list[float]
    history: dict[str, list[FloatArray]]
    over_run: dict[str, RunWideField]
    accepted: list[tuple[float, dict[str, FloatArray]]]  # levels for the local error
    dt_prev: float | None
    outputs: int  # snapshots yielded
    fingerprints: tuple[str, str]  # mesh, flow

    @classmethod
    def started(cls, site: SiteMesh, flow: FlowField, inputs: TransportInputs,
                ctx: StepContext, planner: StepPlanner, probe: sp.csr_matrix,
                ) -> _RunningState:
        """The state at t = 0."""
        species, n = ctx.species, site.n_nodes
        start = initial_fields(inputs, site, ctx.sources)
        fields = {s.name: start[s.name] for s in species}
        return cls(site=site, species=species, probe=probe, planner=planner,
                   state=StepState(fields=fields,
                                   held_before={s.name: np.zeros(n, dtype=bool)
                                                for s in species},
                                   older=None, last_budget={}),
                   totals=BudgetTotals(species, fields),
                   stats=RunStatistics(dict.fromkeys((s.name for s in species), 0.0)),
                   history_times=[0.0],
                   history={s.name: [probe @ fields[s.name]] for s in species},
                   over_run={s.name: RunWideField.start(n).add(fields[s.name], 0.0,
                                                              s.spec.limit, None)
                             for s in species},
                   accepted=[(0.0, fields)], dt_prev=None, outputs=0,
                   fingerprints=run_fingerprints(site, flow))

    @classmethod
    def resumed(cls, site: SiteMesh, flow: FlowField, ctx: StepContext, planner: StepPlanner,
                probe: sp.csr_matrix, saved: Checkpoint) -> _RunningState:
        """The state saved in ``saved``, which must belong to this mesh and flow."""
        check_resumable(saved, site, flow, probe.shape[0])
        planner.resume_from(saved.planner)
        totals = BudgetTotals(ctx.species, saved.state.fields)
        totals.resume_from(saved.totals)
        stats = RunStatistics(dict(saved.statistics.peclet))
        stats.resume_from(saved.statistics)
        return cls(site=site, species=ctx.species, probe=probe, planner=planner,
                   state=saved.state, totals=totals, stats=stats,
                   history_times=[float(t) for t in saved.history_times],
                   history={k: list(v) for k, v in saved.history.items()},
                   over_run=dict(saved.over_run), accepted=list(saved.accepted),
                   dt_prev=saved.dt_prev,
                   outputs=saved.outputs, fingerprints=run_fingerprints(site, flow))

    def commit(self, step: PlannedStep, result: StepResult,
               rates: dict[str, PlumeRate]) -> None:
        """Fold an accepted step in: totals, diagnostics, fields, the fields over the run, levels
        and histories. ``rates``: each plume's largest Courant rate at the step's start and
        its node."""
        self.totals.add(result.budget)
        lows = self.stats.add(result, step.dt, self.species, self.site.points, rates)
        if logger.isEnabledFor(logging.INFO):
            logger.info("step %d: t = %.6g s, Δt = %.4g s, %s%s", self.stats.n_steps, step.t1,
                        step.dt, "; ".join(lows), f"; Newton {result.newton_iterations} "
                        "iterations" if result.solver_kind == "newton" else "")
        restart = self.planner.advance(step)
        before = self.state.fields
        self.state = next_state(result, self.site.n_nodes, restart)
        for s in self.species:
            self.over_run[s.name] = self.over_run[s.name].add(
                self.state.fields[s.name], step.t1, s.spec.limit,
                (before[s.name], self.history_times[-1]))
        self.dt_prev = None if restart else step.dt  # a source switched: multistep restart
        self.accepted = [(step.t1, self.state.fields)] if restart else [
            *self.accepted[-2:], (step.t1, self.state.fields)]
        self.history_times.append(step.t1)
        for s in self.species:
            self.history[s.name].append(self.probe @ self.state.fields[s.name])

    def snapshot(self, t: float) -> Snapshot:
        """The snapshot at time ``t`` [s] (copies)."""
        fields = self.state.fields
        return Snapshot(time=t, concentration={k: c.copy() for k, c in fields.items()},
                        budgets=self.totals.at(t, self.species, fields),
                        history_times=np.array(self.history_times),
                        history={k: np.array(v) for k, v in self.history.items()},
                        diagnostics=self.stats.diagnostics(self.planner.step_cuts,
                                                           self.planner.rejected),
                        over_run=dict(self.over_run))

    def checkpoint(self) -> Checkpoint:
        """A frozen copy of the state (arrays shared: the loop never changes them)."""
        n_obs = self.probe.shape[0]
        return Checkpoint(
            state=self.state, planner=self.planner.state(), totals=self.totals.state(),
            statistics=self.stats.state(), history_times=np.array(self.history_times),
            history={k: np.array(v).reshape(len(v), n_obs) for k, v in self.history.items()},
            over_run=dict(self.over_run), accepted=tuple(self.accepted),
            dt_prev=self.dt_prev, outputs=self.outputs,
            mesh=self.fingerprints[0], flow=self.fingerprints[1])


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
    geometry = build_source_geometry(site, flow, inputs, spacing=inputs.sample_spacing)
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
    kh_cell = flow.cell_conductivity.horizontal
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
