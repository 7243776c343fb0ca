"""Linear solvers of fe3d.linalg against a general-purpose reference library.

Reference: ``scipy.sparse.linalg.spsolve`` (SuperLU; Li 2005, "An overview of SuperLU:
algorithms, implementation, and user interface", ACM TOMS 31(3)) solves the same systems
directly. An iterative solution with relative residual ‖b − Ax‖/‖b‖ ≤ ρ is within
κ₂(A)·ρ of the exact one in the relative 2-norm (Golub & Van Loan 2013, "Matrix
Computations", 4th ed., §2.6.2, the perturbation bound, from memory); the tests compute κ₂
of their small matrices densely and assert that bound, so the tolerance follows from the
solver tolerance and nothing is tuned.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from fe3d.errors import SolverError
from fe3d.linalg import PROBE_ITERATIONS, LinearSolver, solve_spd, solve_with_preconditioner

N1 = 10  # grid points per direction: 1000 unknowns, small enough for a dense κ₂
TOL = 1e-9


def _second_difference(n: int, h: float) -> sp.csr_matrix:
    return sp.diags([-1.0, 2.0, -1.0], [-1, 0, 1], shape=(n, n)) / h**2


def diffusion_3d(n: int = N1, *, kz: float = 20.0) -> sp.csr_matrix:
    """SPD 7-point diffusion on the unit cube, Dirichlet walls, vertical conductivity ``kz``
    (anisotropic like a thin-layered aquifer)."""
    h = 1.0 / (n + 1)
    d, eye = _second_difference(n, h), sp.identity(n)
    return (sp.kron(sp.kron(d, eye), eye) + sp.kron(sp.kron(eye, d), eye)
            + kz * sp.kron(sp.kron(eye, eye), d)).tocsr()


def transport_3d(n: int = N1, *, dt: float, velocity: float = 1.0,
                 dispersion: float = 0.02) -> sp.csr_matrix:
    """Nonsymmetric implicit-Euler step of advection–dispersion on the unit cube, first-order
    upwind advection along x; ``dt`` sets the Courant number velocity·dt/h. The storage
    (retardation) is 1 in the lower half and 20 in the upper half, like two layers."""
    h = 1.0 / (n + 1)
    eye = sp.identity(n)
    storage = np.tile(np.where(np.arange(n) < n // 2, 1.0, 20.0), n * n)  # z fastest
    d = _second_difference(n, h)
    up = sp.diags([-1.0, 1.0], [-1, 0], shape=(n, n)) / h
    lap = sp.kron(sp.kron(d, eye), eye) + sp.kron(sp.kron(eye, d), eye) + \
        sp.kron(sp.kron(eye, eye), d)
    return (sp.diags(storage) / dt + dispersion * lap
            + velocity * sp.kron(sp.kron(up, eye), eye)).tocsr()


def _rhs(n: int) -> np.ndarray:
    return np.random.default_rng(0).standard_normal(n)


def _assert_close_to_reference(A: sp.csr_matrix, x: np.ndarray, b: np.ndarray,
                               tol: float) -> None:
    ref = spla.spsolve(A.tocsc(), b)
    kappa = np.linalg.cond(A.toarray())
    rel_res = np.linalg.norm(b - A @ x) / np.linalg.norm(b)
    err = np.linalg.norm(x - ref) / np.linalg.norm(ref)
    # the solvers accept a true residual up to 10·tol (fe3d.linalg._check)
    assert rel_res <= 10.0 * tol, f"relative residual {rel_res:.2e}"
    # perturbation bound plus the reference's own round-off (κ₂·n·ε, generous factor n)
    bound = kappa * (10.0 * tol + A.shape[0] * np.finfo(float).eps)
    assert err <= bound, f"error {err:.2e} > κ₂ bound {bound:.2e} (κ₂ = {kappa:.1e})"


@pytest.mark.parametrize("method", ["direct", "iterative"])
def test_solve_spd_matches_reference(method: str) -> None:
    A = diffusion_3d()
    b = _rhs(A.shape[0])
    stats: dict[str, float] = {}
    x = solve_spd(A, b, tol=TOL, method=method, stats=stats)
    _assert_close_to_reference(A, x, b, TOL)
    if method == "iterative":
        assert stats["iterations"] > 0
    else:
        assert stats["iterations"] == 0


@pytest.mark.parametrize("method", ["auto", "direct", "iterative", "gauss_seidel",
                                    "jacobi", "amg"])
@pytest.mark.parametrize("kind", ["spd", "transport"])
def test_linear_solver_matches_reference(method: str, kind: str) -> None:
    A = diffusion_3d() if kind == "spd" else transport_3d(dt=0.05)
    b = _rhs(A.shape[0])
    solver = LinearSolver(A, method=method, tol=TOL)
    x = solver.solve(b)
    _assert_close_to_reference(A, x, b, TOL)
    x2 = solver.solve(2.0 * b, x0=x)  # reuse with a warm start
    _assert_close_to_reference(A, x2, 2.0 * b, TOL)
    assert solver.method in ("direct", "gauss_seidel", "jacobi", "amg")
    assert len(solver.iterations) == 2
    assert solver.stats["solves"] == 2
    if solver.method == "direct":
        assert solver.iterations == [0, 0]
    else:
        assert solver.iterations[0] > 0
        # Gauss–Seidel starts from the best combination of its earlier solutions, and 2b is
        # in their span: no iteration; the others start from x0 = x, half the answer
        assert (solver.iterations[1] == 0) == (solver.method == "gauss_seidel")
        assert solver.stats["iterations_total"] == sum(solver.iterations)


def test_automatic_choice_follows_the_courant_number() -> None:
    """Mass-dominated steps (Courant 0.5) get Gauss–Seidel, dispersion-dominated ones AMG
    (``method="iterative"`` skips the direct branch at these small sizes)."""
    h = 1.0 / (N1 + 1)
    low = LinearSolver(transport_3d(dt=0.5 * h), method="iterative", tol=TOL)
    # 110 592 unknowns, dispersion-dominated (grid Fourier number about 10⁷): point-
    # preconditioned Krylov iterations grow with the grid (SSOR ω = 1.2 needed 37 and 36
    # from a zero start at 40 and 44 points per side), beyond the probe's limit at 48
    h2 = 1.0 / 49
    high = LinearSolver(transport_3d(48, dt=5000.0 * h2, dispersion=1.0), method="iterative",
                        tol=TOL)
    assert (low.method, high.method) == ("gauss_seidel", "amg")
    assert 0 < low.probe_iterations <= PROBE_ITERATIONS


@pytest.mark.parametrize("method", ["direct", "gauss_seidel", "jacobi", "amg"])
def test_preconditioner_approximates_the_inverse(method: str) -> None:
    """M A v ≈ v. Direct: to round-off (κ₂·1e3·ε; factor 1e3 generous for a 1000-unknown
    LU). Gauss–Seidel, Jacobi and one AMG V-cycle: ‖v − M A v‖ < ‖v‖ for a smooth v, a
    contraction, the defining property of a convergent stationary preconditioner (common
    practice, no source for the exact factor); and GMRES needs fewer iterations with M than
    without.
    """
    A = transport_3d(dt=0.05)
    n = A.shape[0]
    solver = LinearSolver(A, method=method, tol=TOL)
    M = solver.preconditioner()
    g = np.linspace(0.0, np.pi, N1)
    v = np.einsum("i,j,k->ijk", np.sin(g), np.sin(g), np.sin(g)).ravel()
    err = np.linalg.norm(v - M @ (A @ v)) / np.linalg.norm(v)
    if method == "direct":
        assert err <= np.linalg.cond(A.toarray()) * 1e3 * np.finfo(float).eps
    else:
        assert err < 1.0
    b = _rhs(n)
    with_m: dict[str, float] = {}
    solve_with_preconditioner(A, b, M, tol=TOL, stats=with_m)
    plain: dict[str, float] = {}
    solve_with_preconditioner(A, b, spla.aslinearoperator(sp.identity(n)), tol=TOL,
                              stats=plain, max_iter=2000)
    assert with_m["iterations"] < plain["iterations"]


def test_reused_preconditioner_solves_a_nearby_matrix() -> None:
    """A Newton-like use: M from the step matrix S, systems with J = S + diag(d ≥ 0)."""
    S = transport_3d(dt=0.2)
    M = LinearSolver(S, method="amg", tol=TOL).preconditioner()
    d = np.random.default_rng(1).uniform(0.0, 5.0, S.shape[0])
    J = (S + sp.diags(d)).tocsr()
    b = _rhs(S.shape[0])
    stats: dict[str, float] = {}
    x = solve_with_preconditioner(J, b, M, tol=TOL, stats=stats)
    _assert_close_to_reference(J, x, b, TOL)
    assert 0 < stats["iterations"] < 50
    assert stats["relative_residual"] <= 10.0 * TOL


def test_residual_check_raises_on_an_impossible_system() -> None:
    """A singular system (pure-Neumann diffusion, constant null space) with a right-hand side
    outside its range cannot reach the tolerance: every iterative path must raise."""
    n = 200
    d = sp.diags([-1.0, 2.0, -1.0], [-1, 0, 1], shape=(n, n)).tolil()
    d[0, 0] = d[n - 1, n - 1] = 1.0
    A = d.tocsr()
    b = np.ones(n)  # orthogonal to nothing in range(A): Σb ≠ 0
    with pytest.raises(SolverError):
        LinearSolver(A, method="jacobi", tol=TOL, max_iter=100).solve(b)
    with pytest.raises(SolverError):
        LinearSolver(A, method="gauss_seidel", tol=TOL, max_iter=100).solve(b)
    with pytest.raises(SolverError):
        LinearSolver(A, method="amg", tol=TOL, max_iter=100).solve(b)
    with pytest.raises(SolverError):
        solve_spd(A, b, tol=TOL, method="iterative")
    with pytest.raises(SolverError):
        solve_with_preconditioner(A, b, spla.aslinearoperator(sp.identity(n)), tol=TOL)


def test_bad_method_and_zero_diagonal_raise() -> None:
    A = transport_3d(n=4, dt=0.1)
    with pytest.raises(SolverError):
        LinearSolver(A, method="cholesky")
    Z = sp.csr_matrix(np.array([[0.0, 1.0], [1.0, 0.0]]))
    for method in ("jacobi", "gauss_seidel"):
        with pytest.raises(SolverError):
            LinearSolver(Z, method=method).solve(np.ones(2))
