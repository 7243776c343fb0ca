"""BiCGSTAB and the starting window (fe3d/krylov.py) against general-purpose reference
libraries: scipy's sparse LU solve (SuperLU) for the solutions, scipy's own BiCGSTAB for
the iteration count of the same method (van der Vorst 1992, SIAM J. Sci. Stat. Comput.
13(2)), numpy's least squares for the projected start (Fischer 1998, Comput. Methods Appl.
Mech. Engrg. 163, in the residual norm)."""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from fe3d.krylov import SolutionWindow, bicgstab
from fe3d.linalg import LinearSolver


def _advection_diffusion(n: int = 30, peclet: float = 4.0) -> sp.csr_matrix:
    """2D upwinded advection–diffusion on an n × n grid plus a storage term: a
    nonsymmetric M-matrix of the kind a transport step gives."""
    one = np.ones(n)
    lap = sp.diags([-one[1:], 2.0 * one, -one[1:]], [-1, 0, 1])
    up = sp.diags([-one[1:], one], [-1, 0])
    eye = sp.identity(n)
    A = sp.kron(eye, lap) + sp.kron(lap, eye) + peclet * sp.kron(eye, up)
    return (A + 0.5 * sp.identity(n * n)).tocsr()


def test_bicgstab_solves_and_takes_scipys_iterations() -> None:
    A = _advection_diffusion()
    rng = np.random.default_rng(3)
    b = rng.standard_normal(A.shape[0])
    ref = spla.spsolve(A.tocsc(), b)
    y = np.zeros_like(b)
    its, r = bicgstab(lambda v: A @ v, b.copy(), y, target=1e-11 * np.linalg.norm(b),
                      max_iter=500)
    assert np.linalg.norm(y - ref) <= 1e-8 * np.linalg.norm(ref)
    assert np.linalg.norm(r) <= 1e-11 * np.linalg.norm(b)  # the recursive residual it reports
    count = [0]
    spla.bicgstab(A, b, rtol=1e-11, atol=0.0, maxiter=500,
                  callback=lambda _x: count.__setitem__(0, count[0] + 1))
    assert its > 0 and abs(its - count[0]) <= 1  # same method, same count (±1: stop test)


def test_bicgstab_from_a_converged_start_does_nothing() -> None:
    A = _advection_diffusion(10)
    x = np.linspace(0.0, 1.0, A.shape[0])
    b = A @ x
    y = x.copy()
    its, _ = bicgstab(lambda v: A @ v, b - A @ y, y, target=1e-8 * np.linalg.norm(b),
                      max_iter=50)
    assert its == 0 and np.array_equal(y, x)


def test_window_start_is_the_least_squares_combination() -> None:
    A = _advection_diffusion(12)
    n = A.shape[0]
    rng = np.random.default_rng(5)
    window = SolutionWindow(n, 4)
    xs = [rng.standard_normal(n) for _ in range(6)]
    for x in xs:
        window.add(2.0 * x, A @ x)  # stored in a transform of x (here 2x), as the solver does
    assert len(window) == 4
    kept = np.array(xs[-4:])  # the oldest two were replaced
    b = rng.standard_normal(n)
    c, *_ = np.linalg.lstsq((A @ kept.T), b, rcond=None)
    y0, r0 = window.start(b)
    assert np.allclose(y0, 2.0 * (c @ kept), rtol=0, atol=1e-9 * np.abs(y0).max())
    assert np.allclose(r0, b - A @ (c @ kept), rtol=0, atol=1e-9 * np.abs(b).max())
    # a right-hand side inside the stored span is met exactly
    y1, r1 = window.start(A @ (xs[-1] - 3.0 * xs[-2]))
    assert np.linalg.norm(r1) <= 1e-9 * np.linalg.norm(A @ xs[-1])
    assert np.allclose(y1, 2.0 * (xs[-1] - 3.0 * xs[-2]), atol=1e-8)


def test_solver_window_cuts_iterations_on_a_slowly_changing_sequence() -> None:
    """Right-hand sides of a relaxing sequence x_k = x∞ + 0.5ᵏ d (as in time steps to a
    steady state): with the window the solves after the second need far fewer iterations;
    every solution still matches SuperLU to the tolerance."""
    A = _advection_diffusion(40)
    n = A.shape[0]
    rng = np.random.default_rng(7)
    x_inf, d = rng.random(n), rng.standard_normal(n)
    lu = spla.splu(A.tocsc())
    totals = {}
    for size in (0, 6):
        solver = LinearSolver(A, method="gauss_seidel", tol=1e-10, window=size)
        x_prev = np.zeros(n)
        for k in range(8):
            b = A @ (x_inf + 0.5**k * d)
            x = solver.solve(b, x0=x_prev)
            ref = lu.solve(b)
            assert np.linalg.norm(x - ref) <= 1e-7 * np.linalg.norm(ref)
            x_prev = x
        totals[size] = solver.iterations
    assert sum(totals[6][2:]) <= 0.5 * sum(totals[0][2:]), totals
