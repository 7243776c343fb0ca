"""Step systems of each species: operators assembled once, step matrices and their solvers
reused while the step length and the held nodes repeat (theory.md T1–T8, T13, T16).

:class:`StepSystems` is the one cache of a run: per species the Galerkin operators, the
SUPG or low-order operators per step length, and a few step matrices S = a0/Δt M + θK split
into free and held nodes with their solver (:class:`StepSystem`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np
import scipy.sparse as sp

from fe3d._machine import machine_memory
from fe3d._typing import FloatArray, IndexArray
from fe3d.case.schema import SolverControl, TimeControl
from fe3d.free_block import FreeBlock
from fe3d.linalg import START_WINDOW, LinearSolver, solve_with_preconditioner
from fe3d.mesh.site_mesh import SiteMesh
from fe3d.p1 import split_rows
from fe3d.sgs import LinearCombination, ScaledMatrix
from fe3d.transport.assembly import low_order_operators, transport_operators
from fe3d.transport.limiter import TargetFluxes
from fe3d.transport.model import Coefficients, MediumFields, SpeciesModel
from fe3d.transport.newton_start import StepWindow
from fe3d.transport.stabilization import supg_tau
from fe3d.transport.timeschemes import StepCoefficients

__all__ = ["IN_PLACE_SHARE", "IN_PLACE_WINDOW", "PEAK_IN_PLACE", "PEAK_WITH_COPIES",
           "NearbySolver", "Scheme", "StepSystem", "StepSystems", "TargetKind",
           "cell_coefficients", "splittings_in_place"]

TargetKind = Literal["linearised", "solved"]
"""How flux correction's target step is found (T16b)."""

TARGET_TOLERANCE = 1e-4
"""Relative residual of the target's solve (T16b). The target only sets the raw fluxes: the
budget closes on the low-order step's residual and the antisymmetric fluxes whatever the
target's accuracy, and the limiter resolves no finer than its pass rule (PASS_TOLERANCE,
1e-3 of the fields' scale) and already keeps the result 0.0025–1.2 C0 from the target.
Measured through the engine at 223 k nodes (benchmarks/step_cost.py's box, 12 steps carried
on): the fields at 1e-4 and 1e-6 differ by at most 1.1e-4 C0 at Courant 1 and 5.1e-4 C0 at
Courant 10, below the pass rule, and 1e-4 saves one of two target iterations at Courant 1
and two of five at Courant 10 (docs/performance.md)."""

PEAK_WITH_COPIES = (530 * 2**20, 2.32 * 1024)
"""A run's peak memory with every step system's Gauss–Seidel splitting copied [bytes]: a
fixed part and a part per node (least-squares fit of one-species whole runs at 223 k,
1.04 M and 2.1 M nodes, 1,027, 2,907 and 5,310 MiB; benchmarks/memory_bench.py, 3 Dec
2026, docs/performance.md "Memory per node")."""

PEAK_IN_PLACE = (590 * 2**20, 1.86 * 1024)
"""The same with the bounded steps solved in place (:func:`splittings_in_place`) [bytes]:
least-squares fit of the same runs made to solve in place (benchmarks/memory_bench.py
``--in-place``): 969, 2,527 and 4,404 MiB."""

IN_PLACE_SHARE = 0.8
"""Share of the machine's memory above which the estimate :data:`PEAK_WITH_COPIES` makes a
run solve its bounded steps in place (:func:`splittings_in_place`): only where the copies
might not fit, since in place the steps take 1.3–1.55 times as long (223 k–2.1 M nodes;
docs/performance.md; the share itself is common practice, no source)."""


IN_PLACE_WINDOW = 3
"""Earlier solutions the solver of an in-place step system keeps to start from
(:data:`fe3d.linalg.START_WINDOW`, 6, otherwise): the windows of the two bounded systems
hold 2 × 2 × 6 vectors of the free nodes (0.19 KiB per node), so half of that where memory
is what limits the run (docs/performance.md for what it costs in iterations)."""


def splittings_in_place(n_nodes: int, memory: int) -> bool:
    """True when the low-order and target step systems of a bounded run (T16, T16b) are to
    be solved on their operators' own arrays (:class:`fe3d.free_block.FreeBlock`: no copy
    of the free block) rather than on a CSR copy: when a one-species run with copies would
    need more than :data:`IN_PLACE_SHARE` of the machine's ``memory`` [bytes] (never when
    the machine does not say, ``memory`` 0). With the same start window the results are the
    same bit for bit either way; in place the window is shorter (:data:`IN_PLACE_WINDOW`),
    so the fields agree within the target's solve tolerance. The choice trades time for
    memory. Measured 3 Dec 2026 (docs/performance.md): in place, the run's peak falls by
    about 0.45 KiB per node (:data:`PEAK_IN_PLACE`; the copies 0.16 the low-order system,
    0.19 the target, the shorter window 0.09), and the bounded step costs 72 and 144 SpMV at
    Courant 1 and 10 against 47–61 and 109–116 on copies (223 k nodes; 10 steps at 1 M
    nodes 1.55 times the time): a pass in place reads the pattern's whole rows where the
    copy reads one triangle, and 20 bytes per entry instead of 12 with M on the pattern.
    SUPG steps always keep the copy (in place they took 1.8 times as long)."""
    fixed, per_node = PEAK_WITH_COPIES
    return memory > 0 and fixed + per_node * n_nodes > IN_PLACE_SHARE * memory


def cell_coefficients(s: SpeciesModel) -> Coefficients:
    """The species' per-cell coefficients; a clear error where a run that freed them
    (:meth:`SpeciesModel.without_cell_coefficients`) would build an operator again."""
    if s.coefficients is None:
        msg = (f"{s.name}: the per-cell coefficients were freed after the run's set-up, "
               "but an operator is to be built again")
        raise RuntimeError(msg)
    return s.coefficients


MAX_CACHED = 3
"""Step systems (matrix + factor or preconditioner) kept per species: a few step lengths."""


@dataclass(frozen=True)
class NearbySolver:
    """Solves a matrix close to one whose solver is already set up (the same step with an
    extra diagonal or diffusion term) by GMRES with that solver's preconditioner."""

    A: sp.csr_matrix
    M: Any
    tol: float
    method: str

    def solve(self, b: FloatArray, x0: FloatArray | None = None) -> FloatArray:
        """Solve A x = b; raises SolverError when the tolerance is missed."""
        return solve_with_preconditioner(self.A, b, self.M, tol=self.tol, x0=x0)


@dataclass(frozen=True)
class StepSystem:
    """The step matrix S = a0/Δt M + θK of one species (an operator on M's and K's own
    arrays, :class:`fe3d.sgs.LinearCombination`, or a CSR matrix), split by held/free
    nodes, with its solver (factor or preconditioner), the mass operator M (``lumped``: its
    diagonal when M is lumped, T16, else None) and the explicit part ``explicit_part`` =
    (θ − 1)K (an operator on K's own arrays, :class:`fe3d.sgs.ScaledMatrix`; None for
    θ = 1)."""

    S: sp.csr_matrix | LinearCombination
    explicit_part: sp.csr_matrix | ScaledMatrix | None
    M: sp.csr_matrix
    lumped: FloatArray | None
    solver: LinearSolver | NearbySolver
    free: IndexArray
    fixed: IndexArray
    S_fD: sp.csr_matrix
    newton_window: StepWindow | None = None

    def known_terms(self, history: FloatArray, old: FloatArray, dt: float) -> FloatArray:
        """−M·history/Δt + (θ − 1)K cⁿ [kg/s]: the right-hand side of the step before its
        loads (T13), without products by zeros (a lumped M is a diagonal; θ = 1 has no
        explicit part)."""
        stored = self.lumped * history if self.lumped is not None else self.M @ history
        known = -stored / dt
        return known if self.explicit_part is None else known + self.explicit_part @ old


@dataclass(frozen=True)
class Scheme:
    """The spatial scheme of a run: ``monotone`` low-order operators (T16) or SUPG (T6)
    when ``supg``; ``flux_limiting`` corrects the low-order step (T16b) towards a
    ``target`` step linearised at the low-order one (``"linearised"``, no second solve) or
    solved (``"solved"``: the Galerkin step of the time scheme, a second linear solve)."""

    monotone: bool
    supg: bool
    flux_limiting: bool
    target: TargetKind = "solved"

    @classmethod
    def of(cls, solver: SolverControl) -> Scheme:
        """The scheme the case's solver section selects."""
        return cls(monotone=solver.monotone, supg=solver.supg and not solver.monotone,
                   flux_limiting=solver.monotone and solver.flux_limiting)


@dataclass
class _SpeciesCache:
    """Operators of one species (mutable: filled on first use)."""

    galerkin: tuple[sp.csr_matrix, sp.csr_matrix] | None = None
    operators: dict[float, tuple[sp.csr_matrix, sp.csr_matrix]] = field(default_factory=dict)
    limiter: TargetFluxes | None = None
    systems: dict[tuple[float, float, float, tuple[str, ...]], StepSystem] = field(
        default_factory=dict)
    targets: dict[tuple[float, float, tuple[str, ...]], StepSystem] = field(
        default_factory=dict)


class StepSystems:
    """Operators and step systems of every species of a run, built on first use."""

    def __init__(self, site: SiteMesh, medium: MediumFields, darcy_flux: FloatArray,
                 scheme: Scheme, time: TimeControl, solver: SolverControl,
                 held_nodes: dict[str, IndexArray]) -> None:
        self.site, self.q = site, darcy_flux
        # what the operators read of the medium, not the record (its bulk density and cell
        # volumes are set-up values: not held through the run)
        self.porosity, self.dispersion = medium.porosity, medium.dispersion
        self.outflow_matrix = medium.outflow_matrix
        self.scheme, self.time, self.solver = scheme, time, solver
        self.held_nodes = held_nodes
        self._cache: dict[str, _SpeciesCache] = {}
        self._scratch: FloatArray | None = None
        # bounded steps solved without copies of their free blocks on a large model
        self.in_place = scheme.monotone and splittings_in_place(site.n_nodes,
                                                                machine_memory())

    def _of(self, s: SpeciesModel) -> _SpeciesCache:
        return self._cache.setdefault(s.name, _SpeciesCache())

    def tau_step(self, dt: float) -> float:
        """Step length that τ (T8) is built with: the step itself with fixed steps; with
        adaptive steps the nearest time.step · 2^k, so that operators are reused."""
        if not self.time.adaptive:
            return dt
        return self.time.step * 2.0 ** round(math.log2(dt / self.time.step))

    def limited(self, s: SpeciesModel) -> bool:
        """True when the species' low-order steps are corrected towards a target (T16b)."""
        return self.scheme.flux_limiting and not s.nonlinear

    def limiter(self, s: SpeciesModel) -> TargetFluxes | None:
        """The operators of the species' flux correction (T16b), or None when it is not
        limited."""
        return self._of(s).limiter

    def operators(self, s: SpeciesModel, dt_tau: float) -> tuple[sp.csr_matrix, sp.csr_matrix]:
        """Mass and spatial operators (T1–T6, outflow included) with τ built for dt_tau, or
        with ``solver.monotone`` the low-order ones of T16 (no τ; the lumped mass as a
        diagonal matrix of its own, not on the mesh pattern).

        The Galerkin part does not depend on the step length and is built once per species;
        a new step length rebuilds only the SUPG part (T6)."""
        cache, pattern = self._of(s), self.site.pattern
        if self.scheme.monotone:  # T16: no step-length dependence, built once per species
            if not cache.operators:
                M0, K0 = self.galerkin(s)
                lumped, KD = low_order_operators(M0, K0)
                # the lumped mass as its diagonal alone: not a value per entry of the pattern
                cache.operators[0.0] = (sp.diags(lumped, format="csr"), KD)
                if self.limited(s):  # the Galerkin operators are the target's (T16b)
                    cache.limiter = TargetFluxes.of(M0, K0, KD, work=self._limiter_scratch())
                else:
                    cache.galerkin = None  # not needed again: free its memory
            return cache.operators[0.0]
        if dt_tau not in cache.operators:
            M, K = self.galerkin(s)
            if self.scheme.supg:  # same pattern: the parts add by their value arrays
                c = cell_coefficients(s)
                tau = supg_tau(c.velocity, c.along_flow_diffusivity, c.reaction_rate,
                               c.element_length, dt_tau)
                Ms, Ks = transport_operators(self.site.points, self.site.cells, tau=tau,
                                             parts="supg", pattern=pattern, **self._terms(s))
                M, K = pattern.matrix(M.data + Ms.data), pattern.matrix(K.data + Ks.data)
            while len(cache.operators) >= 2:  # keep at most two step lengths' operators
                cache.operators.pop(next(iter(cache.operators)))
            cache.operators[dt_tau] = (M, K)
        return cache.operators[dt_tau]

    def _limiter_scratch(self) -> FloatArray:
        """The flux limiter's scratch space, one for every species of the run: the species
        are corrected one after another (0.16 KiB per node saved for each further
        species)."""
        if self._scratch is None:
            p = self.site.pattern
            self._scratch = np.empty(TargetFluxes.scratch_size(p.nnz, p.n))
        return self._scratch

    def _terms(self, s: SpeciesModel) -> dict[str, Any]:
        """Coefficients of the species' operators (T1–T6) for transport_operators."""
        c = cell_coefficients(s)
        nonlinear_sorption = bool(s.isotherms)
        return {"m": self.porosity if nonlinear_sorption else c.storage, "k": c.decay,
                "q": self.q, "a": c.velocity, "theta_d": self.dispersion.of_cells,
                "n": self.site.n_nodes, "m_supg": c.storage if nonlinear_sorption else None}

    def galerkin(self, s: SpeciesModel) -> tuple[sp.csr_matrix, sp.csr_matrix]:
        """The Galerkin mass and spatial operators with the outflow term, built once."""
        cache, pattern = self._of(s), self.site.pattern
        if cache.galerkin is None:
            M0, K0 = transport_operators(self.site.points, self.site.cells,
                                         tau=np.zeros_like(cell_coefficients(s).storage),
                                         parts="galerkin", pattern=pattern, **self._terms(s))
            K0.data += pattern.values_of(self.outflow_matrix)
            cache.galerkin = (M0, K0)
        return cache.galerkin

    def target_system(self, s: SpeciesModel, dt: float, formula: StepCoefficients,
                      active: tuple[str, ...]) -> StepSystem:
        """The Galerkin step a0/Δt M + θK that flux correction aims at (T16b), reduced to
        the free nodes, with its solver; built like :meth:`system`."""
        cache = self._of(s)
        key = (float(f"{formula.a0 / dt:.12g}"), formula.theta, active)
        if key not in cache.targets:
            M, K = self.galerkin(s)
            while len(cache.targets) >= MAX_CACHED:
                cache.targets.pop(next(iter(cache.targets)))
            cache.targets[key] = self._split(M, K, dt, formula, active,
                                             tol=max(self.solver.tolerance, TARGET_TOLERANCE),
                                             in_place=self.in_place)
        return cache.targets[key]

    def _split(self, M: sp.csr_matrix, K: sp.csr_matrix, dt: float, formula: StepCoefficients,
               active: tuple[str, ...], tol: float | None = None,
               lumped: bool = False, in_place: bool = False,
               nonlinear: bool = False) -> StepSystem:
        """S = a0/Δt M + θK split by held and free nodes, with its solver (relative
        tolerance ``tol``, default ``solver.tolerance``); ``lumped``: M is a diagonal
        matrix (its own pattern), else M is on the mesh's pattern; ``in_place``: the solver
        reads S_ff off M's and K's arrays (:func:`splittings_in_place`), else a CSR copy of
        it. ``nonlinear``: the system of a Newton step, whose solver solves no system of
        its own (only its splitting or preconditioner serves the corrections, T10): the
        window of earlier solutions is Newton's start window (R14c), not the solver's, and
        like the solver's only with Gauss–Seidel (direct solves stay bit for bit the same
        when a run is resumed from a checkpoint, which holds no window)."""
        n = self.site.n_nodes
        # held as an operator on M's and K's arrays; its CSR copy only while it is split
        S = LinearCombination(M, formula.a0 / dt, K, formula.theta)
        is_fixed = np.zeros(n, dtype=bool)
        for name in active:
            is_fixed[self.held_nodes[name]] = True
        free = np.nonzero(~is_fixed)[0]
        fixed = np.nonzero(is_fixed)[0]
        if in_place:  # S_ff read off M's and K's arrays: no copy
            block = FreeBlock(S, free, fixed)
            S_ff, S_fD = block, block.held_columns()
        else:
            S_ff, S_fD = split_rows(S.tocsr(), free, fixed)
        window = IN_PLACE_WINDOW if in_place else START_WINDOW
        solver = LinearSolver(S_ff, method=self.solver.linear_solver,
                              tol=self.solver.tolerance if tol is None else tol,
                              window=0 if nonlinear else window)
        explicit = None if formula.theta == 1.0 else ScaledMatrix(K, formula.theta - 1.0)
        return StepSystem(S=S, explicit_part=explicit, M=M,
                          lumped=M.diagonal() if lumped else None, solver=solver,
                          free=free, fixed=fixed, S_fD=S_fD,
                          newton_window=StepWindow(free.size, window) if nonlinear and (
                              solver.method == "gauss_seidel") else None)

    def system(self, s: SpeciesModel, dt: float, formula: StepCoefficients,
               active: tuple[str, ...]) -> StepSystem:
        """S = a0/Δt M + θK for this step, reduced to the free nodes, with its solver."""
        cache = self._of(s)
        dt_tau = self.tau_step(dt)
        key = (float(f"{formula.a0 / dt:.12g}"), formula.theta, dt_tau, active)
        if key not in cache.systems:
            M, K = self.operators(s, dt_tau)
            while len(cache.systems) >= MAX_CACHED:
                cache.systems.pop(next(iter(cache.systems)))
            cache.systems[key] = self._split(M, K, dt, formula, active,
                                             lumped=self.scheme.monotone,
                                             in_place=self.in_place, nonlinear=s.nonlinear)
        return cache.systems[key]
