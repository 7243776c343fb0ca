"""Sparse linear solvers chosen by matrix size and symmetry; knows nothing of the physics.

Choices follow measurements on fe3d's own matrices (docs/performance.md, "Linear solvers"):
SuperLU only for small 3D systems; for symmetric positive definite (flow) systems conjugate
gradients with one classical Ruge–Stüben AMG cycle (strength 0.9 on the finest level and 0.5
below, second splitting pass);
for transport steps BiCGSTAB with a symmetric Gauss–Seidel preconditioner, or GMRES with an
unsmoothed-aggregation AMG V-cycle when a probe solve shows the step is too stiff for it.
Every iterative result is checked against the true residual ‖b − Ax‖/‖b‖, never only the
solver's flag.
"""

from __future__ import annotations

import logging
from typing import Any

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from fe3d._typing import FloatArray
from fe3d.errors import SolverError
from fe3d.free_block import BlockGaussSeidel, FreeBlock
from fe3d.krylov import SolutionWindow, bicgstab
from fe3d.sgs import GaussSeidelSplitting, SymmetricGaussSeidel

__all__ = ["COARSEST", "DIRECT_LIMIT", "FIRST_STRENGTH", "FLOW_TOLERANCE", "PROBE_ITERATIONS",
           "RELAXATION", "START_WINDOW", "STRENGTH", "TRANSPORT_METHODS", "LinearSolver",
           "SpdPreconditioner", "solve_spd", "solve_with_preconditioner"]

logger = logging.getLogger(__name__)

DIRECT_LIMIT = 5_000
"""Largest number of unknowns for which a direct factorisation is used by default."""


def _check(A: Any, x: FloatArray, b: FloatArray, tol: float, what: str) -> None:
    if not np.all(np.isfinite(x)):
        msg = f"{what}: the solution contains NaN or infinite values"
        raise SolverError(msg)
    nb = float(np.linalg.norm(b))
    if nb == 0.0:
        return
    rel = float(np.linalg.norm(b - A @ x)) / nb
    if rel > max(10.0 * tol, 1e-13):
        msg = f"{what}: relative residual {rel:.2e} above the tolerance {tol:.1e}"
        raise SolverError(msg)


FLOW_TOLERANCE = 1e-10
"""Relative residual of the flow solve, tied to the budget's 1e-8 target: the discrepancy
follows the tolerance, but by a factor that depends on the matrix (on the 177 k-node site
6.4e-9, 1.3e-10, 2.7e-11 and 2.9e-13 at 1e-8, 1e-9, 1e-10 and 1e-12; on the 137 k- and
927 k-node benchmark sites 3.4e-9 and 3.1e-9 at 1e-9), so 1e-10 keeps it at least an order
below the target (docs/performance.md). The flow stage (fe3d/flow/solve.py) passes it;
:func:`solve_spd` keeps 1e-12 as its own default."""


class SpdPreconditioner:
    """One AMG hierarchy (:func:`solve_spd`'s) kept for later solves with matrices of the
    same size: the drain passes of one flow solve, the drawdown's solve without the wells,
    or ensemble members that share a mesh and its fixed-head nodes (pass one object to every
    ``fe3d.flow.solve_flow`` call).

    The hierarchy is built from the first matrix it is asked for and reused for any later
    matrix of the same shape. One V-cycle of a fixed hierarchy is a fixed symmetric positive
    definite operator, so CG still converges on a changed matrix and the true residual is
    still checked; only the iteration count can grow as the matrix moves away from the one
    it was built from (measured in docs/performance.md, Flow). ``builds`` and ``uses``
    count what happened.
    """

    def __init__(self) -> None:
        self._ml: Any = None
        self._shape: tuple[int, int] | None = None
        self.builds = 0
        self.uses = 0
        self.levels = 0
        self.operator_complexity = 0.0

    def forget(self) -> None:
        """Let the kept hierarchy go (its matrix's mesh is no longer used); the next
        :meth:`hierarchy` builds a new one."""
        self._ml, self._shape = None, None

    def hierarchy(self, A: sp.csr_matrix) -> Any:
        """The kept hierarchy when it was built for a matrix of ``A``'s shape, else a new
        one built from ``A`` (and kept)."""
        if self._ml is None or self._shape != A.shape:
            self._ml = _amg_hierarchy(A)
            self._shape = A.shape
            self.builds += 1
            self.levels = len(self._ml.levels)
            self.operator_complexity = float(self._ml.operator_complexity())
        self.uses += 1
        return self._ml


FIRST_STRENGTH = 0.9
"""Strength threshold θ of the classical AMG's finest level (the coarser levels take
:data:`STRENGTH`). Measured on the 918 k-unknown flow benchmark matrix (CG to 1e-10,
docs/performance.md, Flow): θ on the first level only 0.5 / 0.8 / 0.9 / 0.95 took 14 CG
iterations each with operator complexity 3.38 / 3.03 / 2.99 / 2.99, set-up + CG 7.1 / 7.0 /
5.8 / 5.2 s of CPU at load 6 (set-up times vary by ±1 s with the load; the complexity and
the iterations do not). θ = 0.8 on every level: complexity 2.48 but 23 iterations; on the
first two levels 2.66 and 16; θ = 0.7 throughout 2.82 and 20 (coarse levels with fewer
strong connections interpolate worse)."""

STRENGTH = 0.5
"""Strength threshold θ of the classical AMG's coarser levels (see :func:`solve_spd`)."""

COARSEST = 500
"""Largest level the classical AMG solves exactly (dense pseudo-inverse)."""


def _amg_hierarchy(A: sp.csr_matrix) -> Any:
    """Classical Ruge–Stüben AMG (see :func:`solve_spd`): strength :data:`FIRST_STRENGTH`
    on the finest level and :data:`STRENGTH` below, on the negative off-diagonals; second
    splitting pass; classical interpolation; Galerkin coarse operators R A P; exact solve
    at ≤ :data:`COARSEST` unknowns; a forward Gauss–Seidel sweep before and a backward one
    after the coarse correction (the V-cycle stays symmetric, as CG needs).
    The level loop is pyamg's ``ruge_stuben_solver`` with a threshold per level (a fused
    one-pass R A P in numba was tried: 0.64 s against scipy's 0.31 s on the finest level of
    the 918 k-unknown flow matrix)."""
    from pyamg.classical.interpolate import classical_interpolation
    from pyamg.classical.split import RS
    from pyamg.multilevel import MultilevelSolver
    from pyamg.relaxation.smoothing import change_smoothers
    from pyamg.strength import classical_strength_of_connection

    levels = [MultilevelSolver.Level()]
    levels[0].A = sp.csr_matrix(A)
    while levels[-1].A.shape[0] > COARSEST and len(levels) < 30:
        level = levels[-1]
        theta = FIRST_STRENGTH if len(levels) == 1 else STRENGTH
        strong = classical_strength_of_connection(level.A, theta=theta, norm="min")
        splitting = RS(strong, second_pass=True)
        if splitting.sum() in (0, splitting.size):  # all coarse or all fine: stop here
            break
        level.P = sp.csr_matrix(classical_interpolation(level.A, strong, splitting))
        level.R = level.P.T.tocsr()
        level.splitting = splitting.astype(bool)
        levels.append(MultilevelSolver.Level())
        levels[-1].A = (level.R @ level.A @ level.P).tocsr()
    ml = MultilevelSolver(levels, coarse_solver="pinv")
    change_smoothers(ml, ("gauss_seidel", {"sweep": "forward"}),
                     ("gauss_seidel", {"sweep": "backward"}))
    return ml


def solve_spd(A: sp.csr_matrix, b: FloatArray, *, tol: float = 1e-12,
              method: str = "auto", stats: dict[str, float] | None = None,
              cycle: str = "V", preconditioner: SpdPreconditioner | None = None,
              ) -> FloatArray:
    """Solve a symmetric positive definite system (direct when small, AMG-CG otherwise).

    The iterative branch (``method="iterative"``, or ``"auto"`` above :data:`DIRECT_LIMIT`
    unknowns) is conjugate gradients preconditioned by one cycle of classical Ruge–Stüben AMG:
    strength threshold θ = 0.5 (:data:`FIRST_STRENGTH` = 0.9 on the finest level, which cuts
    the operator complexity from 3.38 to 2.99 at the same iterations on the 918 k-unknown
    benchmark) measured on the negative off-diagonals only (``norm="min"``),
    second pass of the C/F splitting, one forward Gauss–Seidel sweep before and one backward
    sweep after the coarse correction, and an exact solve
    (dense pseudo-inverse, which also survives a singular matrix and leaves the verdict to the
    residual check) once a level has at most 500 unknowns. The flat P1 tetrahedra give the flow
    matrix positive off-diagonal entries (28 % of them, up to 0.2 of a row's diagonal); with
    pyamg's default ``norm="abs"`` these counted as strong connections, got interpolated with
    negative weights, and on the 927 k-node benchmark rows of the Galerkin operators of levels
    4–8 had positive off-diagonal sums up to 21× their diagonal, and V-cycles started on levels
    4–6 reduced the error by only 0.8–0.9 per cycle (0.3–0.4 with ``norm="min"``). CG
    iterations on the flow benchmark matrices (134 k → 918 k unknowns, to 1e-10 / 1e-12):
    ``norm="abs"`` 11 → 19 / 14 → 22 (1.73× / 1.57×); ``norm="min"`` 11 → 14 / 13 → 16 (1.27× /
    1.23×); with the exact solve at ≤ 500 unknowns 11 → 13 / 13 → 16 (1.18× /
    1.23×), operator complexity 2.56 / 3.38, AMG set-up about 5 s and CG about 10 s at 918 k
    unknowns on a loaded 2-core machine (``norm="abs"``: 5 s and 15 s). Earlier measurements
    (``norm="abs"``, 174 k → 1.2 M unknowns): θ = 0.25, 30 → 63 (to 1e-12); θ = 0.5, 26 → 59;
    smoothed aggregation 97 at 174 k. ``cycle="W"`` (θ = 0.5, one pass) took 12 → 18 iterations
    but each costs several V-cycles. Smoothing: pyamg's default symmetric sweep before and
    after (four sweeps per level and cycle) took 11 / 13 CG iterations to 1e-10 at 134 k /
    918 k unknowns; one forward sweep before and one backward after, 12 / 14 iterations at
    0.62× the CG time (3.9 against 6.2 s of CPU at 918 k, docs/performance.md).

    ``preconditioner``, when given, supplies the AMG hierarchy (built from ``A`` on first use,
    reused afterwards; :class:`SpdPreconditioner`). ``stats``, when given, receives
    ``iterations`` (0 for a direct solve), ``setup_s`` and ``solve_s`` [s].
    """
    import time

    n = A.shape[0]
    t0 = time.perf_counter()
    iters: list[float] = []
    setup = 0.0
    if method == "direct" or (method == "auto" and n <= DIRECT_LIMIT):
        x = spla.spsolve(A.tocsc(), b)
    elif method in ("auto", "iterative"):
        ml = (preconditioner or SpdPreconditioner()).hierarchy(A)
        setup = time.perf_counter() - t0
        with np.errstate(divide="ignore", invalid="ignore"):  # breakdown → NaN → _check
            x, info = spla.cg(A, b, rtol=tol, atol=0.0, maxiter=2000,
                              M=ml.aspreconditioner(cycle=cycle),
                              callback=lambda _xk: iters.append(1.0))
        logger.info("flow: AMG-CG %d iterations (info=%d)", len(iters), info)
    else:
        msg = f"SPD solve method {method!r}: expected 'auto', 'direct' or 'iterative'"
        raise SolverError(msg)
    x = np.asarray(x, dtype=float)
    if stats is not None:
        stats.update(iterations=float(len(iters)), setup_s=setup,
                     solve_s=time.perf_counter() - t0 - setup)
    _check(A, x, b, tol, "steady flow solve")
    return x


TRANSPORT_METHODS = ("auto", "direct", "iterative", "gauss_seidel", "jacobi", "amg")
"""Accepted ``method`` values of :class:`LinearSolver`."""

START_WINDOW = 6
"""Number of earlier solutions a Gauss–Seidel :class:`LinearSolver` keeps to start the next
solve from their best combination (fe3d/krylov.py, :class:`SolutionWindow`): 2 × 6 vectors
of the system's size. Measured on the 223 k-node benchmark step matrices over 16 steps of a
growing plume: 4, 6 and 8 kept took the iterations from 5 to 3–4 at Courant 1 and from 15
to 13, 11–12 and 11 at Courant 10 (docs/performance.md); 0 turns it off."""

RELAXATION = 1.2
"""Relaxation factor ω of the Gauss–Seidel preconditioner (SSOR; 1 is symmetric
Gauss–Seidel). Measured on the 223 k-node benchmark step matrices, BiCGSTAB iterations to
1e-10 from a zero start for ω = 0.8, 1.0, 1.1, 1.2, 1.3, 1.4, 1.6: 8, 6, 6, 6, 7, 8, 11 at
Courant 1 and 20, 16, 15, 13, 13, 14, 21 at Courant 10 (docs/performance.md)."""

PROBE_ITERATIONS = 30
"""Largest number of BiCGSTAB iterations with the Gauss–Seidel preconditioner the automatic
choice allows on its probe solve before it builds an AMG preconditioner instead. Measured on
the 223 k-node transport benchmark (docs/performance.md) from a zero start: 6 iterations at
Courant 1 and 13 at Courant 10 for a relative 1e-10 (SSOR, ω = 1.2; 5–6 and 16 with
ω = 1), where AMG-GMRES took 7 and 17 iterations at about 14 SpMV each."""


def _krylov(A: Any, b: FloatArray, M: Any, *, tol: float, x0: FloatArray | None,
            max_iter: int, kind: str) -> tuple[FloatArray, int]:
    """Run BiCGSTAB or GMRES (restarted every 60) and return (x, iterations)."""
    count = [0]

    def tick(*_args: Any) -> None:
        count[0] += 1

    # a breakdown (division by zero inside the method) leaves NaN or a large residual,
    # which the callers' true-residual check turns into a SolverError
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        if kind == "bicgstab":
            x, _info = spla.bicgstab(A, b, x0=x0, rtol=tol, atol=0.0, maxiter=max_iter, M=M,
                                     callback=tick)
        else:
            restart = min(max_iter, 60)
            x, _info = spla.gmres(A, b, x0=x0, rtol=tol, atol=0.0, restart=restart,
                                  maxiter=-(-max_iter // restart), M=M, callback=tick,
                                  callback_type="pr_norm")
    return np.asarray(x, dtype=float), count[0]


def _relative_residual(A: Any, x: FloatArray, b: FloatArray) -> float:
    nb = float(np.linalg.norm(b))
    return float(np.linalg.norm(b - A @ x)) / nb if nb > 0 else 0.0


def solve_with_preconditioner(A: Any, b: FloatArray, M: Any, *, tol: float,
                              x0: FloatArray | None = None, max_iter: int = 200,
                              stats: dict[str, float] | None = None) -> FloatArray:
    """Solve A x = b by GMRES preconditioned with ``M`` ≈ A⁻¹ (for example
    :meth:`LinearSolver.preconditioner` of a nearby matrix, as in a Newton iteration).

    ``tol`` is the relative residual ‖b − Ax‖/‖b‖ asked for; the true residual is checked
    after the solve and :class:`SolverError` raised when it is above ``10 tol``. ``stats``,
    when given, receives ``iterations`` and ``relative_residual``.
    """
    x, its = _krylov(A, b, M, tol=tol, x0=x0, max_iter=max_iter, kind="gmres")
    if stats is not None:
        with np.errstate(invalid="ignore", over="ignore"):
            stats.update(iterations=float(its), relative_residual=_relative_residual(A, x, b))
    _check(A, x, b, tol, "preconditioned solve")
    return x


class LinearSolver:
    """Solve A x = b repeatedly for one matrix, reusing its factor or preconditioner.

    ``method`` (see :data:`TRANSPORT_METHODS`):

    - ``"direct"``: SuperLU factor, kept;
    - ``"gauss_seidel"``: BiCGSTAB preconditioned by symmetric Gauss–Seidel relaxed by
      ``omega`` (SSOR, :data:`RELAXATION`), run on the split system with Eisenstat's product
      (fe3d/sgs.py): one product of the preconditioned operator is one backward and one
      forward triangular pass (1.4–1.9 SpMV) instead of a product with A plus a two-sweep
      Gauss–Seidel (about 3.6 SpMV) (docs/performance.md). Each solve starts from the
      best combination of the last ``window`` solutions (fe3d/krylov.py), so a run of time
      steps with one matrix needs fewer iterations as it goes;
    - ``"jacobi"``: BiCGSTAB preconditioned by the inverse diagonal;
    - ``"amg"``: GMRES with one V-cycle of pyamg unsmoothed aggregation, hierarchy kept;
    - ``"iterative"``: ``"gauss_seidel"`` or ``"amg"``, chosen by a probe solve:
      Gauss–Seidel when it reaches the tolerance within :data:`PROBE_ITERATIONS`
      iterations, AMG otherwise;
    - ``"auto"``: ``"direct"`` up to :data:`DIRECT_LIMIT` unknowns, else ``"iterative"``.

    After construction ``method`` holds the resolved choice (``"direct"``,
    ``"gauss_seidel"``, ``"jacobi"`` or ``"amg"``, each valid as a ``method`` argument).
    With ``"gauss_seidel"`` the attribute ``A`` is then the matrix as an operator on its
    splitting's own arrays (:class:`fe3d.sgs.SplitMatrix`, products bit for bit those of
    the CSR matrix): the CSR copy is not kept (one value and one column index per entry).
    ``A`` may also be a step matrix's free block held on the step operators' own arrays
    (:class:`fe3d.free_block.FreeBlock`): its Gauss–Seidel splitting then reads those
    arrays too (no copy of A at all, results bit for bit those of the copy); a direct
    factor or an AMG hierarchy takes a CSR copy of it, so with ``"auto"`` or
    ``"iterative"`` such a block is solved by ``"gauss_seidel"``.
    ``iterations`` lists the Krylov iterations of every solve (0 for direct); ``stats`` sums
    them up. A BiCGSTAB solve that misses the tolerance (BiCGSTAB can stall, or report
    success above the true residual) switches the solver to AMG-GMRES for that solve,
    continued from where it stopped, and for the later ones.
    """

    def __init__(self, A: sp.csr_matrix | FreeBlock, *, method: str = "auto",
                 tol: float = 1e-10, max_iter: int = 300, window: int = START_WINDOW,
                 omega: float = RELAXATION) -> None:
        import time

        if method not in TRANSPORT_METHODS:
            msg = f"linear solver method {method!r}: expected one of {TRANSPORT_METHODS}"
            raise SolverError(msg)
        self.A: Any = A if isinstance(A, FreeBlock) else A.tocsr()
        self.tol = tol
        self.max_iter = max_iter
        self.omega = omega
        self.iterations: list[int] = []
        self.probe_iterations = 0
        self._ml: Any = None
        self._inv_diag: FloatArray | None = None
        self._split: GaussSeidelSplitting | None = None
        n = self.A.shape[0]
        t0 = time.perf_counter()
        if isinstance(A, FreeBlock) and method in ("auto", "iterative"):
            # a block read in place is there for Gauss–Seidel's sweeps: the probe could pick
            # AMG, which copies the block and builds a hierarchy beside it (a 10.5 M-node
            # run: +2 GiB); a solve Gauss–Seidel cannot finish still turns to AMG (solve)
            method = "gauss_seidel"
        if method == "direct" or (method == "auto" and n <= DIRECT_LIMIT):
            self.method = "direct"
            self.A = self.A.tocsr()  # a FreeBlock's copy: small
            self._lu = spla.splu(self.A.tocsc())
        elif method in ("gauss_seidel", "jacobi", "amg"):
            self.method = method
        else:
            self.method = self._probe()
        if self.method == "amg":
            self._build_amg()
        if self.method == "gauss_seidel":  # A from its splitting: no second copy of A held
            self.A = self._sgs().matrix()
        self._window = SolutionWindow(n, window if self.method == "gauss_seidel" else 0)
        self.setup_s = time.perf_counter() - t0

    def _diagonal_inverse(self) -> FloatArray:
        if self._inv_diag is None:
            d = self.A.diagonal()
            if np.any(d == 0.0):
                msg = "the matrix has a zero on its diagonal: no Jacobi or Gauss–Seidel"
                raise SolverError(msg)
            self._inv_diag = 1.0 / d
        return self._inv_diag

    def _jacobi(self) -> spla.LinearOperator:
        inv = self._diagonal_inverse()
        n = self.A.shape[0]
        return spla.LinearOperator((n, n), matvec=lambda v: inv * np.ravel(v), dtype=float)

    def _sgs(self) -> GaussSeidelSplitting:
        """The compiled symmetric Gauss–Seidel splitting of A, built once: on a copy of a
        CSR matrix's triangles, or on a :class:`fe3d.free_block.FreeBlock`'s operators."""
        if self._split is None:
            try:
                self._split = BlockGaussSeidel(self.A, omega=self.omega) if isinstance(
                    self.A, FreeBlock) else SymmetricGaussSeidel(self.A, omega=self.omega)
            except ValueError as exc:
                raise SolverError(str(exc)) from exc
        return self._split

    def _sgs_solve(self, b: FloatArray, x0: FloatArray | None, max_iter: int,
                   window: SolutionWindow | None = None,
                   ) -> tuple[FloatArray, FloatArray, int]:
        """BiCGSTAB (fe3d/krylov.py) on the SGS-split system Â y = M_L⁻¹ b with Eisenstat's
        product (fe3d/sgs.py), started from the window's best combination of earlier
        solutions when it holds any, else from ``x0``. Returns (x, y = M_R x, iterations);
        stops when ‖M_L⁻¹(b − A x)‖ ≤ tol ‖M_L⁻¹ b‖."""
        g = self._sgs()
        b = np.ascontiguousarray(b, dtype=float)
        if window is not None and len(window):
            y, r = window.start(b)
            b_hat, r_hat = g.left_pair(b, r)
        elif x0 is not None and np.any(x0):
            x0 = np.ascontiguousarray(x0, dtype=float)
            y = g.right(x0)
            b_hat, r_hat = g.left_pair(b, b - self.A @ x0)
        else:
            y = np.zeros_like(b)
            b_hat = g.left(b)
            r_hat = b_hat.copy()
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            its, _ = bicgstab(g.split_product, r_hat, y,
                              target=self.tol * float(np.linalg.norm(b_hat)),
                              max_iter=max_iter)
        return g.right_solve(y), y, its

    def _build_amg(self) -> None:
        import pyamg

        if not sp.issparse(self.A):  # held as its Gauss–Seidel splitting until now
            self.A = self.A.tocsr()
        if self._ml is None:
            self._ml = pyamg.smoothed_aggregation_solver(self.A, symmetry="nonsymmetric",
                                                         smooth=None)

    def _probe(self) -> str:
        """Gauss–Seidel or AMG: try BiCGSTAB on b = A x for a fixed pseudo-random x."""
        rng = np.random.default_rng(0)
        b = self.A @ rng.standard_normal(self.A.shape[0])
        x, _, its = self._sgs_solve(b, None, PROBE_ITERATIONS)
        self.probe_iterations = its
        ok = _residual(self.A, x, b, self.tol) is not None
        logger.info("linear solver probe: Gauss-Seidel-BiCGSTAB %d iterations, %s", its,
                    "kept" if ok else "AMG chosen")
        return "gauss_seidel" if ok else "amg"

    @property
    def stats(self) -> dict[str, float | str]:
        """``method``, ``solves``, ``iterations_last``, ``iterations_total``,
        ``probe_iterations`` and ``setup_s`` [s]."""
        return {"method": self.method, "solves": len(self.iterations),
                "iterations_last": self.iterations[-1] if self.iterations else 0,
                "iterations_total": sum(self.iterations),
                "probe_iterations": self.probe_iterations, "setup_s": self.setup_s}

    def preconditioner(self) -> spla.LinearOperator:
        """An operator M ≈ A⁻¹: the LU solve (direct), SSOR ((D/ω + U)⁻¹ (D/ω) (D/ω + L)⁻¹,
        one forward and one backward pass), the inverse diagonal
        (Jacobi) or one AMG V-cycle; for :func:`solve_with_preconditioner`
        on nearby matrices (Newton Jacobians of the same step)."""
        n = self.A.shape[0]
        if self.method == "direct":
            lu = self._lu
            return spla.LinearOperator((n, n), matvec=lambda v: lu.solve(np.ravel(v)),
                                       dtype=float)
        if self.method == "gauss_seidel":
            return self._sgs().preconditioner()
        if self.method == "jacobi":
            return self._jacobi()
        self._build_amg()
        return self._ml.aspreconditioner(cycle="V")

    def solve(self, b: FloatArray, x0: FloatArray | None = None) -> FloatArray:
        """Solve for one right-hand side; raises :class:`SolverError` on failure."""
        if self.method == "direct":
            x = self._lu.solve(b)
            self.iterations.append(0)
        elif self.method in ("gauss_seidel", "jacobi"):
            if self.method == "gauss_seidel":
                x, y, its = self._sgs_solve(b, x0, self.max_iter, self._window)
            else:
                x, its = _krylov(self.A, b, self.preconditioner(), tol=self.tol, x0=x0,
                                 max_iter=self.max_iter, kind="bicgstab")
            residual = _residual(self.A, x, b, self.tol)
            verified = residual is not None
            if residual is not None and self.method == "gauss_seidel":
                self._window.add(y, b - residual)
            if not verified:
                logger.info("%s-BiCGSTAB missed the tolerance after %d iterations; AMG from "
                            "now", self.method, its)
                self.method = "amg"
                self._build_amg()
                start = x if np.all(np.isfinite(x)) else x0
                x, more = _krylov(self.A, b, self.preconditioner(), tol=self.tol, x0=start,
                                  max_iter=self.max_iter, kind="gmres")
                its += more
            self.iterations.append(its)
            if verified:  # the true residual was just checked: skip a second product
                return x
        else:
            x, its = _krylov(self.A, b, self.preconditioner(), tol=self.tol, x0=x0,
                             max_iter=self.max_iter, kind="gmres")
            self.iterations.append(its)
        _check(self.A, x, b, self.tol, "transport step")
        return x


def _residual(A: Any, x: FloatArray, b: FloatArray, tol: float) -> FloatArray | None:
    """The true residual b − Ax when it is within the tolerance accepted by ``_check``
    (‖b − Ax‖ ≤ 10 tol ‖b‖), else None."""
    if not np.all(np.isfinite(x)):
        return None
    with np.errstate(invalid="ignore", over="ignore"):
        r = b - A @ x
        nb = float(np.linalg.norm(b))
        ok = nb == 0.0 or float(np.linalg.norm(r)) <= max(10.0 * tol, 1e-13) * nb
    return r if ok else None
