"""Running totals folded over the accepted steps: the mass budget of every species (T9) and
the diagnostics that tell whether the discretisation was adequate."""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from fe3d._typing import FloatArray
from fe3d.transport.budget import MassBudget
from fe3d.transport.courant import PlumeRate
from fe3d.transport.model import SpeciesModel
from fe3d.transport.step import StepBudget, StepResult

__all__ = ["BudgetTotals", "RunStatistics", "StatisticsState", "TotalsState",
           "TransportDiagnostics"]

Extreme = tuple[float, tuple[float, ...] | None]
"""A value [kg/m³] and where it was reached (x, y, z) [m], None before any step."""


@dataclass(frozen=True)
class TransportDiagnostics:
    """Numbers that tell whether the discretisation was adequate.

    Per species: the largest grid Péclet number over the cells the plume has reached (T14b),
    the largest Courant number over all cells, and over the cells of the plume with the
    node where it was reached [m] (None before the plume had a step), the most negative
    value [kg/m³] and where [m] (None before any value fell below zero) and the largest
    value over the run [kg/m³] and where (None at t = 0). For the run: steps taken,
    the linear solver used, step cuts and rejections, the smallest and largest step [s],
    the most Newton iterations and user-law sweeps (T11b) in one step."""

    n_steps: int
    max_grid_peclet: dict[str, float]
    max_courant: dict[str, float]
    min_concentration: dict[str, tuple[float, tuple[float, ...] | None]]
    solver: str
    step_cuts: int = 0
    rejected_steps: int = 0
    smallest_step: float = 0.0
    largest_step: float = 0.0
    max_newton_iterations: int = 0
    max_coupling_sweeps: int = 0
    max_concentration: dict[str, tuple[float, tuple[float, ...] | None]] = field(
        default_factory=dict)
    max_plume_courant: dict[str, Extreme] = field(default_factory=dict)


@dataclass(frozen=True)
class TotalsState:
    """The running budget totals of every species [kg] (for a checkpoint): the initial
    stored mass, and the mass that entered, was produced by a parent, decayed and flowed out
    through each item so far."""

    initial: dict[str, float]
    source_input: dict[str, float]
    produced: dict[str, float]
    decayed: dict[str, float]
    outflow: dict[str, dict[str, float]]


@dataclass(frozen=True)
class StatisticsState:
    """The running diagnostics (for a checkpoint): per species the grid Péclet number, the
    largest Courant numbers (all cells; plume, and where), the lowest and highest values
    [kg/m³] and where; for the run the steps taken, the smallest and largest step [s], the most
    Newton iterations and coupling sweeps in a step and the last solver kind."""

    peclet: dict[str, float]
    courant: dict[str, float]
    plume_courant: dict[str, Extreme]
    lowest: dict[str, Extreme]
    highest: dict[str, Extreme]
    n_steps: int
    dt_min: float
    dt_max: float
    newton: int
    sweeps: int
    solver: str


class BudgetTotals:
    """Mass that entered, decayed and flowed out of each species so far [kg] (T9)."""

    def __init__(self, species: tuple[SpeciesModel, ...], fields: dict[str, FloatArray]) -> None:
        self.initial = {s.name: float(s.dissolved_volume @ fields[s.name])
                        + s.sorbed_mass(fields[s.name]) for s in species}
        self.source_input = dict.fromkeys(self.initial, 0.0)
        self.produced = dict.fromkeys(self.initial, 0.0)
        self.decayed = dict.fromkeys(self.initial, 0.0)
        self.outflow = {s.name: dict.fromkeys(s.outflow_weights, 0.0) for s in species}

    def state(self) -> TotalsState:
        """The totals so far (copies)."""
        return TotalsState(initial=dict(self.initial), source_input=dict(self.source_input),
                           produced=dict(self.produced), decayed=dict(self.decayed),
                           outflow={k: dict(v) for k, v in self.outflow.items()})

    def resume_from(self, saved: TotalsState) -> None:
        """Continue from totals saved by :meth:`state`."""
        self.initial, self.source_input = dict(saved.initial), dict(saved.source_input)
        self.produced, self.decayed = dict(saved.produced), dict(saved.decayed)
        self.outflow = {k: dict(v) for k, v in saved.outflow.items()}

    def add(self, budget: dict[str, StepBudget]) -> None:
        """Fold one accepted step's terms in."""
        for name, b in budget.items():
            self.source_input[name] += b.source_input + b.switch_on
            self.produced[name] += b.produced
            self.decayed[name] += b.decayed
            for f, x in b.outflow.items():
                self.outflow[name][f] += x

    def at(self, t: float, species: tuple[SpeciesModel, ...],
           fields: dict[str, FloatArray]) -> dict[str, MassBudget]:
        """The budget of every species at time ``t`` [s] with the fields then."""
        return {s.name: MassBudget(
            species=s.name, time=t, dissolved=float(s.dissolved_volume @ fields[s.name]),
            sorbed=s.sorbed_mass(fields[s.name]), initial=self.initial[s.name],
            source_input=self.source_input[s.name], produced=self.produced[s.name],
            outflow=dict(self.outflow[s.name]),
            decayed=self.decayed[s.name]) for s in species}


class RunStatistics:
    """Diagnostics folded over the accepted steps."""

    def __init__(self, peclet: dict[str, float]) -> None:
        self.peclet = peclet
        self.courant = dict.fromkeys(peclet, 0.0)
        self.plume_courant: dict[str, Extreme] = dict.fromkeys(peclet, (0.0, None))
        self.lowest: dict[str, Extreme] = dict.fromkeys(peclet, (0.0, None))
        self.highest: dict[str, Extreme] = dict.fromkeys(peclet, (-np.inf, None))
        self.n_steps = 0
        self.dt_min, self.dt_max = math.inf, 0.0
        self.newton = self.sweeps = 0
        self.solver = "none"

    def state(self) -> StatisticsState:
        """The diagnostics so far (copies)."""
        return StatisticsState(
            peclet=dict(self.peclet), courant=dict(self.courant),
            plume_courant=dict(self.plume_courant), lowest=dict(self.lowest),
            highest=dict(self.highest), n_steps=self.n_steps,
            dt_min=self.dt_min, dt_max=self.dt_max, newton=self.newton, sweeps=self.sweeps,
            solver=self.solver)

    def resume_from(self, saved: StatisticsState) -> None:
        """Continue from diagnostics saved by :meth:`state`."""
        self.peclet, self.courant = dict(saved.peclet), dict(saved.courant)
        self.plume_courant = dict(saved.plume_courant)
        self.lowest, self.highest = dict(saved.lowest), dict(saved.highest)
        self.n_steps = saved.n_steps
        self.dt_min, self.dt_max = saved.dt_min, saved.dt_max
        self.newton, self.sweeps, self.solver = saved.newton, saved.sweeps, saved.solver

    def add(self, result: StepResult, dt: float, species: tuple[SpeciesModel, ...],
            points: FloatArray, plume_rates: dict[str, PlumeRate]) -> list[str]:
        """Fold one accepted step in; ``plume_rates``: the largest |a|/h over each species'
        plume at the step's start and its node. Returns a log line per species (its lowest
        value)."""
        self.n_steps += 1
        self.solver = result.solver_kind
        self.dt_min, self.dt_max = min(self.dt_min, dt), max(self.dt_max, dt)
        if result.solver_kind == "newton":
            self.newton = max(self.newton, result.newton_iterations)
        self.sweeps = max(self.sweeps, result.sweeps)
        lows = []
        for s in species:
            new = result.fields[s.name]
            j = int(np.argmin(new))
            if new[j] < self.lowest[s.name][0]:
                self.lowest[s.name] = (float(new[j]), tuple(float(x) for x in points[:, j]))
            k = int(np.argmax(new))
            if new[k] > self.highest[s.name][0]:
                self.highest[s.name] = (float(new[k]), tuple(float(x) for x in points[:, k]))
            where = ", ".join(f"{x:.1f}" for x in points[:, j])
            lows.append(f"{s.name} min {new[j]:.3g} kg/m³ at ({where}) m")
            self.courant[s.name] = max(self.courant[s.name],
                                       dt * s.courant_rate)
            plume = plume_rates[s.name]
            if dt * plume.rate > self.plume_courant[s.name][0]:
                self.plume_courant[s.name] = (dt * plume.rate,
                                              tuple(float(x) for x in points[:, plume.node]))
        return lows

    def note_plume_peclet(self, largest: dict[str, float]) -> None:
        """Keep the largest grid Péclet number of the cells each plume has reached so far
        (:class:`~fe3d.transport.courant.PlumeCourant`); cells it never reaches do not
        count."""
        for name, value in largest.items():
            self.peclet[name] = max(self.peclet.get(name, 0.0), value)

    def diagnostics(self, step_cuts: int, rejected: int) -> TransportDiagnostics:
        """The diagnostics so far."""
        return TransportDiagnostics(
            n_steps=self.n_steps, max_grid_peclet=dict(self.peclet),
            max_courant=dict(self.courant), min_concentration=dict(self.lowest),
            solver=self.solver, step_cuts=step_cuts, rejected_steps=rejected,
            smallest_step=0.0 if self.n_steps == 0 else float(self.dt_min),
            largest_step=float(self.dt_max), max_newton_iterations=self.newton,
            max_coupling_sweeps=self.sweeps,
            max_plume_courant=dict(self.plume_courant),
            max_concentration={k: v for k, v in self.highest.items() if v[1] is not None})
