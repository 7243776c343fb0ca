"""Inexact Newton (theory.md R14b): the forcing terms against Eisenstat & Walker's
formula, and a step whose corrections are solved only to those terms still meeting the run's
Newton tolerance."""

from __future__ import annotations

import logging

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from fe3d.case.schema import Species
from fe3d.linalg import LinearSolver
from fe3d.transport.model import Coefficients, SpeciesModel
from fe3d.transport.newton import Forcing, forcing_term, newton
from fe3d.transport.newton_correction import CorrectionSolver
from fe3d.transport.newton_start import StepWindow, window_start
from fe3d.transport.step import ROUND_OFF_FACTOR, nonlinear_step
from fe3d.transport.systems import StepSystem
from fe3d.transport.timeschemes import StepCoefficients

EPS = np.finfo(float).eps
BACKWARD_EULER = StepCoefficients(1.0, -1.0, 0.0, 1.0)


def _eisenstat_walker(norms: list[float], target: float) -> list[float]:
    """The forcing terms of Eisenstat & Walker 1996 ("Choosing the forcing terms in an
    inexact Newton method", SIAM J. Sci. Comput. 17(1)), choice 2 with γ = 0.9, α = 2 and
    its safeguard (raise to γη_{k−1}^α when that exceeds 0.1), η_max = 0.9, fe3d's η_0 = 0.1, and
    Kelley's floor 0.5 τ/‖R_k‖ (Kelley 1995, Iterative Methods for Linear and Nonlinear
    Equations, SIAM, §6.3; both from memory), written out here from the formulas."""
    etas = [min(0.9, max(0.1, 0.5 * target / norms[0]))]
    for k in range(1, len(norms) - 1):
        eta = 0.9 * (norms[k] / norms[k - 1]) ** 2
        if 0.9 * etas[-1] ** 2 > 0.1:
            eta = max(eta, 0.9 * etas[-1] ** 2)
        etas.append(min(0.9, max(eta, 0.5 * target / norms[k])))
    return etas


@pytest.mark.parametrize(("previous", "ratio", "want"), [
    (None, None, 0.1),            # η_0 (fe3d's choice; the paper leaves it free)
    (0.3, 0.1, 0.9 * 0.1 ** 2),   # γ(‖R_k‖/‖R_{k−1}‖)^α; safeguard 0.081 ≤ 0.1 unused
    (0.5, 0.1, 0.9 * 0.5 ** 2),   # safeguard: γη_{k−1}^α = 0.225 > 0.1 wins
    (0.5, 1.2, 0.9),              # η_max
    (None, 0.1, 0.9 * 0.1 ** 2),  # η_0 after a start that cut ‖R‖ tenfold (R14c)
])
def test_forcing_term_is_eisenstat_walker_choice_two(previous, ratio, want):
    """Single terms of Eisenstat & Walker 1996, choice 2 (γ = 0.9, α = 2), computed by
    hand; exact up to one rounding (4ε relative)."""
    r_prev = None if ratio is None else 1.0
    got = forcing_term(Forcing(), previous, 1.0 if ratio is None else ratio, r_prev, 1e-30)
    assert got == pytest.approx(want, rel=4 * EPS, abs=0.0)


def test_forcing_term_floor_does_not_over_solve_the_last_correction():
    """‖R_k‖ = 1e-8, target 1e-9: the last solve is asked for no more than 0.5 τ/‖R_k‖ =
    0.05 (Kelley 1995, §6.3, from memory), although γ(ratio)² is 9e-5."""
    assert forcing_term(Forcing(), 0.01, 1e-8, 1e-6, 1e-9) == pytest.approx(0.05, rel=4 * EPS)


def _advection_diffusion(n: int, dt: float) -> sp.csr_matrix:
    """Backward Euler matrix M/Δt + K of 1D upwind advection (speed 1) and diffusion (0.05)
    on unit cells: a nonsymmetric M-matrix like a transport step's."""
    d, v = 0.05, 1.0
    main = np.full(n, 1.0 / dt + 2 * d + v)
    return sp.diags([np.full(n - 1, -(d + v)), main, np.full(n - 1, -d)], [-1, 0, 1],
                    format="csr")


def test_inexact_newton_forcing_terms_follow_the_formula_and_the_residual_meets_tolerance():
    """R(x) = A x − b + k x|x| (second-order decay, 1500 unknowns) by Newton whose
    corrections are BiCGSTAB solves on the SSOR split to η_k only. The η_k the solver used
    equal Eisenstat & Walker's formula applied to its own residual history (4ε relative),
    the first ones are loose (η_0 = 0.1), and the final residual meets rtol ‖R(x_0)‖."""
    n, k, rtol = 1500, 50.0, 1e-10
    A = _advection_diffusion(n, dt=0.5)
    b = np.zeros(n)
    b[0] = 2.0 * 1.05  # the inflow boundary held at c = 2
    b += 0.1 / 0.5  # and an old level of 0.1 everywhere
    solves = CorrectionSolver(LinearSolver(A, method="gauss_seidel"))

    def residual(x: np.ndarray) -> np.ndarray:
        return A @ x - b + k * x * np.abs(x)

    def solve(x: np.ndarray, r: np.ndarray, eta: float) -> np.ndarray:
        return solves.solve(2.0 * k * np.abs(x), r, eta)

    x0 = np.full(n, 0.1)
    out = newton(residual, solve, x0, rtol=rtol, atol=0.0, forcing=Forcing())
    want = _eisenstat_walker(out.residual_norms, out.target)
    assert out.forcing_terms == pytest.approx(want, rel=4 * EPS, abs=0.0)
    assert out.forcing_terms[0] == 0.1
    assert min(solves.iterations) >= 1  # iterative corrections, not a factorisation
    assert np.linalg.norm(residual(out.x)) <= rtol * np.linalg.norm(residual(x0))


def _second_order_species(n: int, rate: float) -> SpeciesModel:
    """A species of second-order decay r = −k c|c| on n nodes of unit pore volume."""
    one = np.ones(n)
    coefficients = Coefficients(storage=one, decay=0 * one, darcy_flux=np.zeros((3, n)),
                                along_flow_diffusivity=0 * one, element_length=one)
    return SpeciesModel(name="s", spec=Species(limit="1 mg/L"), coefficients=coefficients,
                        courant_rate=1.0,
                        isotherms=(), reaction=("second_order", {"rate": rate}),
                        in_user_law=False, sorbed_decay=0.0, dissolved_volume=one,
                        sorbed_capacity=0 * one, decay_weight=0 * one, outflow_weights={})


def test_nonlinear_step_with_iterative_corrections_meets_the_newton_tolerance(caplog):
    """One backward Euler step of 1D advection–diffusion with second-order decay
    (k c Δt up to 50) on 800 nodes, the first held at 2, through the iterative (SSOR)
    path: the residual of the returned field, recomputed here from S, the right-hand side
    and k c|c|, meets max(tol ‖R(cⁿ)‖, 64ε s) (theory.md T13, the run's Newton tolerance);
    the error against scipy's direct Newton (spsolve, to round-off) stays within
    ‖J⁻¹‖₂ ‖R‖₂, the bound the residual gives (J at the solution, its dense inverse, with
    ‖J⁻¹‖₂ ≤ (‖J⁻¹‖₁ ‖J⁻¹‖_∞)^½, Golub & Van Loan 1996, Matrix Computations, §2.3)."""
    n, dt, k, tol = 800, 0.5, 50.0, 1e-10
    S = _advection_diffusion(n, dt)
    fixed, free = np.array([0]), np.arange(1, n)
    S_ff = S[free][:, free].tocsr()
    system = StepSystem(S=S, explicit_part=None, M=sp.identity(n, format="csr"),
                        lumped=np.ones(n), solver=LinearSolver(S_ff, method="gauss_seidel"),
                        free=free, fixed=fixed, S_fD=S[free][:, fixed].tocsr())
    old = np.full(n, 0.1)
    rhs = old / dt
    guess = old.copy()
    guess[0] = 2.0
    species = _second_order_species(n, k)
    with caplog.at_level(logging.INFO, logger="fe3d.transport.step"):
        c, _, _, iterations = nonlinear_step(species, system, rhs, old, None, guess, dt,
                                             BACKWARD_EULER, tol=tol, max_iter=30)
    krylov = [r.krylov_iterations for r in caplog.records if hasattr(r, "krylov_iterations")]
    assert krylov and min(krylov[-1]) >= 1  # the corrections were iterative

    def residual(x_free: np.ndarray) -> np.ndarray:
        x = guess.copy()
        x[free] = x_free
        return (S @ x - rhs + k * x * np.abs(x))[free]

    r_old = np.linalg.norm(residual(old[free]))
    scale = max(np.linalg.norm(rhs[free]), np.linalg.norm(S_ff @ old[free]))
    r_end = np.linalg.norm(residual(c[free]))
    assert r_end <= max(tol * r_old, ROUND_OFF_FACTOR * EPS * scale), (iterations, r_end)
    # reference: Newton with scipy's direct solves, to round-off
    x = old[free].copy()
    for _ in range(30):
        J = (S_ff + sp.diags(2.0 * k * np.abs(x))).tocsc()
        step = spla.spsolve(J, residual(x))
        x -= step
        if np.max(np.abs(step)) <= 4 * EPS * np.max(np.abs(x)):
            break
    J_inv = np.linalg.inv((S_ff + sp.diags(2.0 * k * np.abs(x))).toarray())
    bound = np.sqrt(np.linalg.norm(J_inv, 1) * np.linalg.norm(J_inv, np.inf)) * r_end
    assert np.linalg.norm(c[free] - x) <= 1.01 * bound + 16 * EPS * np.linalg.norm(x)
    assert c[0] == 2.0



@pytest.mark.parametrize("method", ["direct", "jacobi", "amg", "gauss_seidel"])
def test_each_solver_kind_solves_the_correction_to_its_forcing_term(method):
    """J δ = r with J = A + diag(d) (A the 1D step matrix, d ≥ 0) through every kind of step
    solver, η = 1e-3: the direct one to round-off (≤ 1e-12 relative), GMRES (Jacobi, AMG)
    to 10 η on the true residual (fe3d.linalg's check), BiCGSTAB on the SSOR split to η
    on the split residual ‖M_L⁻¹(r − Jδ)‖ ≤ η ‖M_L⁻¹ r‖ (theory.md R14b), with M_L that
    of J (the split's diagonal exchanged); each bound is what the method guarantees."""
    n, eta = 400, 1e-3
    A = _advection_diffusion(n, dt=0.5)
    rng = np.random.default_rng(0)
    d, r = rng.uniform(0.0, 5.0, n), rng.standard_normal(n)
    solver = LinearSolver(A, method=method)
    delta = CorrectionSolver(solver).solve(d, r, eta)
    J = (A + sp.diags(d)).tocsr()
    true = np.linalg.norm(r - J @ delta) / np.linalg.norm(r)
    if method == "direct":
        assert true <= 1e-12
    elif method == "gauss_seidel":
        from fe3d.sgs import SymmetricGaussSeidel

        split = SymmetricGaussSeidel(J, omega=solver.omega)
        assert np.linalg.norm(split.left(r - J @ delta)) <= eta * np.linalg.norm(
            split.left(r)) * (1 + 1e-8)
    else:
        assert true <= 10 * eta


def _marching_system(n: int, dt: float, window: int) -> tuple[sp.csr_matrix, StepSystem]:
    """The 1D step system of the tests above, node 0 held, solved by Gauss–Seidel, with a
    Newton start window of ``window`` solutions."""
    S = _advection_diffusion(n, dt)
    fixed, free = np.array([0]), np.arange(1, n)
    return S, StepSystem(S=S, explicit_part=None, M=sp.identity(n, format="csr"),
                         lumped=np.ones(n), free=free, fixed=fixed,
                         solver=LinearSolver(S[free][:, free].tocsr(), method="gauss_seidel"),
                         S_fD=S[free][:, fixed].tocsr(),
                         newton_window=StepWindow(n - 1, window))


def _direct_newton(S_ff: sp.csr_matrix, residual, x: np.ndarray, k: float) -> np.ndarray:
    """Newton with scipy's direct solves (spsolve) to round-off: the reference."""
    for _ in range(40):
        step = spla.spsolve((S_ff + sp.diags(2.0 * k * np.abs(x))).tocsc(), residual(x))
        x = x - step
        if np.max(np.abs(step)) <= 4 * EPS * np.max(np.abs(x)):
            break
    return x


def test_steps_started_from_earlier_solutions_meet_the_newton_tolerance(caplog):
    """Twelve backward Euler steps of the 1D advection–diffusion front with second-order
    decay (k c Δt up to 20), 600 nodes, the inflow held at 2, Newton started from the
    window of earlier steps' solutions (theory.md R14c): every step's residual, recomputed
    here from S, the right-hand side and k c|c|, meets max(tol ‖R(cⁿ)‖, 64ε s), the run's
    target measured from cⁿ and not from the better start (T13); each step's field agrees
    with scipy's direct Newton from the same cⁿ within ‖J⁻¹‖₂ ‖R‖₂ (Golub & Van Loan
    1996, Matrix Computations, §2.3, as above); and the later steps did start from the
    window (their log says so) with fewer Newton iterations than the first step."""
    n, dt, k, tol = 600, 0.5, 10.0, 1e-10
    S, system = _marching_system(n, dt, window=6)
    free = system.free
    S_ff = S[free][:, free].tocsr()
    species = _second_order_species(n, k)
    old = np.full(n, 0.1)
    old[0] = 2.0
    iterations = []
    for _ in range(12):
        rhs = old / dt

        def residual(x_free: np.ndarray, rhs: np.ndarray = rhs,
                     held: np.ndarray = old) -> np.ndarray:
            x = held.copy()
            x[free] = x_free
            return (S @ x - rhs + k * x * np.abs(x))[free]

        caplog.clear()
        with caplog.at_level(logging.INFO, logger="fe3d.transport.step"):
            c, _, _, its = nonlinear_step(species, system, rhs, old, None, old, dt,
                                          BACKWARD_EULER, tol=tol, max_iter=30)
        iterations.append(its)
        r_old = np.linalg.norm(residual(old[free]))
        scale = max(np.linalg.norm(rhs[free]), np.linalg.norm(S_ff @ old[free]))
        r_end = np.linalg.norm(residual(c[free]))
        assert r_end <= max(tol * r_old, ROUND_OFF_FACTOR * EPS * scale), (its, r_end)
        x = _direct_newton(S_ff, residual, old[free].copy(), k)
        J_inv = np.linalg.inv((S_ff + sp.diags(2.0 * k * np.abs(x))).toarray())
        bound = np.sqrt(np.linalg.norm(J_inv, 1) * np.linalg.norm(J_inv, np.inf)) * r_end
        assert np.linalg.norm(c[free] - x) <= 1.01 * bound + 16 * EPS * np.linalg.norm(x)
        old = c
    started = "started from earlier steps" in caplog.text
    assert started and max(iterations[6:]) < iterations[0], iterations


def test_window_start_recovers_a_solution_in_its_span_and_never_raises_the_residual():
    """R(x) = A x − b with b = A(0.3 x₁ − 1.2 x₂ + 2 x₃) for three stored solutions x_j
    (a linear law, d = 0): one Gauss–Newton step on the window's span is the least-squares
    solution, here exact, so the start's residual falls to round-off (1e-12 of ‖R(cⁿ)‖,
    linear algebra, no source needed); with a quadratic law k x|x| added the start's ‖R‖
    is at most ‖R(cⁿ)‖ (each step is taken only when ‖R‖ decreases)."""
    n = 300
    A = _advection_diffusion(n, dt=0.5)
    rng = np.random.default_rng(1)
    window = StepWindow(n, 3)
    for _ in range(3):
        x = rng.uniform(0.0, 1.0, n)
        window.add(x, A @ x)
    X = window.solutions
    b = A @ (0.3 * X[0] - 1.2 * X[1] + 2.0 * X[2])
    start = window_start(window, lambda x, image: image - b, lambda x: np.zeros(n))
    assert start is not None
    assert start.norm <= 1e-12 * start.reference
    k = 50.0
    start = window_start(window, lambda x, image: image - b + k * x * np.abs(x),
                         lambda x: 2.0 * k * np.abs(x))
    assert start is not None and start.norm <= start.reference
    assert window_start(StepWindow(n, 3), lambda x, image: image, lambda x: 0 * x) is None
