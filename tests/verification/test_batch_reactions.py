"""Batch (no flow) checks of the reaction building blocks against published solutions.

Sorption partitioning in a closed batch, second-order decay, a three-member decay chain
(Bateman 1910), observed orders of the time schemes and quadratic convergence of Newton.
No mesh: each point is an independent well-mixed volume.
"""

from __future__ import annotations

import functools
import itertools
import math

import numpy as np
import pytest
import scipy.linalg
import scipy.optimize
from hypothesis import given, settings
from hypothesis import strategies as st

from fe3d.reactions.kinetics import second_order
from fe3d.reactions.sorption import freundlich, langmuir, linear
from fe3d.transport.newton import newton
from fe3d.transport.timeschemes import step_coefficients

pytestmark = pytest.mark.verification

YEAR = 365.25 * 86400.0
SCHEMES = ("backward_euler", "crank_nicolson", "bdf2")
EXPECTED_ORDER = {"backward_euler": 1.0, "crank_nicolson": 2.0, "bdf2": 2.0}
ORDER_BAND = 0.1
"""Pairwise observed orders log₂(e(Δt)/e(Δt/2)) must lie within ±0.1 of the theoretical
order (chosen bound: the step sequences below are in the asymptotic range)."""


# --- batch driver ---------------------------------------------------------------------------


def _solve(jac, r):
    jac = np.asarray(jac)
    return r / jac if jac.ndim == 1 else np.linalg.solve(jac, r)


def linear_storage(m):
    """S(c) = M c with constant M (matrix, or 1-D array for a diagonal) and its Jacobian."""
    if m.ndim == 1:
        return lambda c: (m * c, m)
    return lambda c: (m @ c, m)


def step_equations(scheme, storage, rhs, c_n, c_nm1, dt):
    """Residual and Jacobian of one step of d S(c)/dt = f(c) with the coefficients the
    transport uses (``step_coefficients``, theory.md T13, R17–R19):
    R = [a0 S(c) + a1 S(c^n) + a2 S(c^{n−1})]/Δt − θ f(c) − (1 − θ) f(c^n)."""
    formula = step_coefficients(scheme, dt, None if c_nm1 is None else dt)
    known = formula.a1 * storage(c_n)[0] - dt * (1.0 - formula.theta) * rhs(c_n)[0]
    if formula.a2:
        known = known + formula.a2 * storage(c_nm1)[0]

    def residual(c):
        return (formula.a0 * storage(c)[0] + known) / dt - formula.theta * rhs(c)[0]

    def jacobian(c):
        return storage(c)[1] * (formula.a0 / dt) - rhs(c)[1] * formula.theta

    return residual, jacobian


def integrate(scheme, storage, rhs, c0, t_end, n_steps, *, record=()):
    """March n_steps equal steps with one scheme; Newton to 1e-13 relative at each step.

    BDF2 takes its first step with backward Euler. Returns c(t_end) and the states at the
    step indices in ``record``.
    """
    dt = t_end / n_steps
    prev, cur = None, np.asarray(c0, dtype=float)
    kept = {}
    for k in range(n_steps):
        residual, jacobian = step_equations(scheme, storage, rhs, cur, prev, dt)
        out = newton(residual, lambda x, r, jacobian=jacobian: _solve(jacobian(x), r), cur,
                     rtol=1e-13, atol=1e-300, max_iter=30)
        prev, cur = cur, out.x
        if k + 1 in record:
            kept[k + 1] = cur
    return cur, kept


def observed_orders(errors):
    return [math.log2(a / b) for a, b in itertools.pairwise(errors)]


def order_table(steps, errors, orders):
    lines = ["  steps  max rel. error   order"]
    for i, (n, e) in enumerate(zip(steps, errors, strict=True)):
        o = f"{orders[i - 1]:.3f}" if i else "  -"
        lines.append(f"  {n:5d}  {e:14.3e}   {o}")
    return "\n".join(lines)


# --- sorption: closed batch partitioning --------------------------------------------------

THETA = 0.3
RHO_B = 1700.0  # kg/m³, a sandy aquifer (typical value, common practice, no source)


def _partition(isotherm, total, theta, rho_b):
    """Solve θ c + ρ_b s(c) = M for c with fe3d's Newton (start: all mass dissolved) to a
    residual of 8ε M, the round-off of the balance itself (a residual 1e-15 of the first
    one left c 1.5e-12 off when nearly all the mass is sorbed, found by hypothesis at
    M = 0.00195, θ = 0.125, S = 0.00995, K = 14)."""
    res = lambda c: theta * c + rho_b * isotherm(c)[0] - total  # noqa: E731
    solve = lambda c, r: r / (theta + rho_b * isotherm(c)[1])  # noqa: E731
    atol = 8.0 * np.finfo(float).eps * float(np.max(total))
    return newton(res, solve, total / theta, rtol=0.0, atol=atol, max_iter=60).x


def _round_off_bound(total: float, c: float, slope: float) -> float:
    """Relative accuracy c can have: 1e-12, or the balance's round-off 8ε M carried to c
    by the slope dM/dc = θ + ρ_b s'(c) (forward error ≤ condition × backward error), with
    a factor 10 for the reference formula's own rounding."""
    return max(1e-12, 80.0 * np.finfo(float).eps * total / (c * slope))


@settings(max_examples=100, deadline=None)
@given(total=st.floats(min_value=1e-6, max_value=50.0),
       theta=st.floats(min_value=0.05, max_value=0.5),
       s_max=st.floats(min_value=1e-5, max_value=1e-2),
       k_l=st.floats(min_value=1e-2, max_value=1e3))
def test_langmuir_batch_partitioning_is_exact(total, theta, s_max, k_l):
    """Closed batch with Langmuir sorption (Langmuir 1918, J. Am. Chem. Soc. 40, 1361; mass
    balance of a batch test as in Fetter 1999, Contaminant Hydrogeology, ch. 3, from memory):
    θc + ρ_b S K c/(1 + K c) = M is the quadratic θK c² + (θ + ρ_b S K − M K) c − M = 0 whose
    positive root is c = 2M/(b + √(b² + 4θKM)) for b ≥ 0 and (√(b² + 4θKM) − b)/(2θK) for
    b < 0 (the forms without cancellation). Newton's answer within 1e-12 relative, or
    within what the balance's round-off allows where c is ill-conditioned (nearly all the
    mass sorbed at saturation; ``_round_off_bound``)."""
    iso = functools.partial(langmuir, s_max=s_max, k_l=k_l)
    m = np.array([total])
    c = _partition(iso, m, theta, RHO_B)
    b = theta + RHO_B * s_max * k_l - total * k_l
    root = math.sqrt(b * b + 4.0 * theta * k_l * total)
    exact = 2.0 * total / (b + root) if b >= 0.0 else (root - b) / (2.0 * theta * k_l)
    slope = theta + RHO_B * float(iso(np.array([exact]))[1][0])
    np.testing.assert_allclose(c, exact, rtol=_round_off_bound(total, exact, slope))


@settings(max_examples=100, deadline=None)
@given(total=st.floats(min_value=1e-3, max_value=50.0),
       theta=st.floats(min_value=0.05, max_value=0.5),
       k_f=st.floats(min_value=1e-6, max_value=1e-3))
def test_freundlich_half_batch_partitioning_is_exact(total, theta, k_f):
    """Closed batch with Freundlich sorption, N = 1/2 (Freundlich 1909, Kapillarchemie; form
    s = K_F c^N as in Fetter 1999, ch. 3, from memory): with u = √c the balance
    θu² + ρ_b K_F u − M = 0 gives u = 2M/(ρ_b K_F + √((ρ_b K_F)² + 4θM)), c = u². Newton's
    answer within 1e-12 relative (c stays far above the regularisation c_eps = 1e-12)."""
    iso = functools.partial(freundlich, k_f=k_f, n=0.5)
    c = _partition(iso, np.array([total]), theta, RHO_B)
    a = RHO_B * k_f
    u = 2.0 * total / (a + math.sqrt(a * a + 4.0 * theta * total))
    assert u * u > 1e5 * 1e-12
    np.testing.assert_allclose(c, u * u, rtol=1e-12)


@pytest.mark.parametrize("n", [0.7, 0.9, 1.3])
def test_freundlich_batch_matches_a_bracketing_root_finder(n):
    """Freundlich without a closed form (N = 0.7, 0.9, 1.3): Newton against scipy's brentq
    (general-purpose reference library, Brent 1973) to 1e-12 relative; linear (Kd) against
    c = M/(θ + ρ_b K_d)."""
    k_f = 2e-4
    iso = functools.partial(freundlich, k_f=k_f, n=n)
    for total in (1e-5, 0.01, 3.0):
        c = _partition(iso, np.array([total]), THETA, RHO_B)[0]
        ref = scipy.optimize.brentq(lambda x, t=total: THETA * x + RHO_B * k_f * x**n - t,
                                    0.0, total / THETA, xtol=1e-300, rtol=1e-15)
        assert c == pytest.approx(ref, rel=1e-12)
    c = _partition(functools.partial(linear, kd=3e-4), np.array([2.0]), THETA, RHO_B)
    np.testing.assert_allclose(c, 2.0 / (THETA + RHO_B * 3e-4), rtol=1e-14)


# --- second-order decay -------------------------------------------------------------------

C0 = np.array([1.0, 0.5, 0.2])  # kg/m³
T_END = 2.0 * YEAR
K2 = np.array([1.0, 2.0, 10.0]) / (C0 * T_END)  # k c0 T = 1, 2, 10


def _second_order_problem():
    storage = linear_storage(np.full(C0.size, THETA))

    def rhs(c):
        r, dr = second_order(c, K2)
        return THETA * r, THETA * dr

    return storage, rhs


def _second_order_exact(t):
    """c0/(1 + k c0 t): the solution of dc/dt = −k c² (separation of variables; e.g.
    Levenspiel 1999, Chemical Reaction Engineering, 3rd ed., ch. 3, from memory)."""
    return C0 / (1.0 + K2 * C0 * t)


@pytest.mark.parametrize("scheme", SCHEMES)
def test_second_order_decay_observed_order(scheme):
    """Batch second-order decay against c0/(1 + k c0 t) at t = T and T/2 (three points,
    k c0 T = 1, 2, 10); steps 320, 640, 1280, 2560: observed order within ±0.1 of 1 (backward
    Euler) or 2 (Crank–Nicolson, BDF2)."""
    storage, rhs = _second_order_problem()
    steps = [320, 640, 1280, 2560]
    errors = []
    for n in steps:
        c_end, kept = integrate(scheme, storage, rhs, C0, T_END, n, record=(n // 2,))
        e = max(np.max(np.abs(c_end / _second_order_exact(T_END) - 1.0)),
                np.max(np.abs(kept[n // 2] / _second_order_exact(T_END / 2) - 1.0)))
        errors.append(e)
    orders = observed_orders(errors)
    table = order_table(steps, errors, orders)
    print(f"\n{scheme}, second-order decay\n{table}")
    want = EXPECTED_ORDER[scheme]
    assert all(abs(o - want) <= ORDER_BAND for o in orders), f"{scheme}\n{table}"


@pytest.mark.parametrize(("scheme", "n_steps"), [("crank_nicolson", 4000), ("bdf2", 4000)])
def test_second_order_decay_small_steps_within_1e6(scheme, n_steps):
    """Same problem at small steps: relative error ≤ 1e-6 at t = T for the second-order
    schemes (issue 5 target; reference c0/(1 + k c0 t))."""
    storage, rhs = _second_order_problem()
    c_end, _ = integrate(scheme, storage, rhs, C0, T_END, n_steps)
    err = float(np.max(np.abs(c_end / _second_order_exact(T_END) - 1.0)))
    print(f"\n{scheme}: {n_steps} steps, max relative error {err:.3e}")
    assert err <= 1e-6, err


# --- three-member decay chain -------------------------------------------------------------

CHAIN_K = np.log(2.0) / (np.array([3.0, 8.0, 20.0]) * YEAR)  # half-lives 3, 8, 20 yr
CHAIN_Y = np.array([0.74, 0.65])  # mass yields (invented, of the order of dechlorination steps)
CHAIN_C0 = np.array([1.0, 0.2, 0.0])  # kg/m³; the daughter is present from the start
CHAIN_T = 12.0 * YEAR


def chain_matrix(rates, yields):
    """Rate matrix A of a sequential first-order chain, dc/dt = A c (theory.md R13): lower
    bidiagonal, A[i, i] = −k_i, A[i+1, i] = y_i k_i."""
    a = np.diag(-np.asarray(rates, dtype=float))
    idx = np.arange(len(rates) - 1)
    a[idx + 1, idx] = np.asarray(yields) * np.asarray(rates)[:-1]
    return a


def bateman(t):
    """Bateman (1910), Proc. Cambridge Phil. Soc. 15, 423 (solution as usually quoted, from
    memory), with yields and every member's initial amount superposed:
    c_n(t) = Σ_{i≤n} c_i(0) (Π_{j=i}^{n−1} y_j k_j) Σ_{j=i}^{n} e^{−k_j t}/Π_{p≠j}(k_p − k_j)
    (p from i to n).
    Needs distinct rates."""
    k, y, out = CHAIN_K, CHAIN_Y, np.zeros(3)
    for n in range(3):
        for i in range(n + 1):
            coef = CHAIN_C0[i] * np.prod([y[j] * k[j] for j in range(i, n)])
            total = 0.0
            for j in range(i, n + 1):
                denom = np.prod([k[p] - k[j] for p in range(i, n + 1) if p != j])
                total += np.exp(-k[j] * t) / denom
            out[n] += coef * total
    return out


def test_bateman_reference_agrees_with_the_matrix_exponential():
    """The Bateman formula above against scipy.linalg.expm of the chain matrix (Al-Mohy &
    Higham 2009 algorithm in a general-purpose library): 1e-12 relative. Guards the
    reference itself before it is used to judge the time schemes."""
    a = chain_matrix(CHAIN_K, CHAIN_Y)
    for t in (0.5 * YEAR, CHAIN_T):
        np.testing.assert_allclose(scipy.linalg.expm(a * t) @ CHAIN_C0, bateman(t), rtol=1e-12)


def _chain_problem():
    a = chain_matrix(CHAIN_K, CHAIN_Y)
    storage = linear_storage(THETA * np.eye(3))
    return storage, lambda c: (THETA * (a @ c), THETA * a)


@pytest.mark.parametrize("scheme", SCHEMES)
def test_three_member_chain_observed_order(scheme):
    """Parent → daughter → granddaughter with yields against Bateman (1910) at t = T and T/2;
    steps 40, 80, 160, 320: observed order within ±0.1 of 1 (backward Euler) or 2
    (Crank–Nicolson, BDF2). The error is the largest relative error over the members."""
    storage, rhs = _chain_problem()
    steps = [40, 80, 160, 320]
    errors = []
    for n in steps:
        c_end, kept = integrate(scheme, storage, rhs, CHAIN_C0, CHAIN_T, n, record=(n // 2,))
        errors.append(max(np.max(np.abs(c_end / bateman(CHAIN_T) - 1.0)),
                          np.max(np.abs(kept[n // 2] / bateman(CHAIN_T / 2) - 1.0))))
    orders = observed_orders(errors)
    table = order_table(steps, errors, orders)
    print(f"\n{scheme}, three-member chain\n{table}")
    want = EXPECTED_ORDER[scheme]
    assert all(abs(o - want) <= ORDER_BAND for o in orders), f"{scheme}\n{table}"


@pytest.mark.parametrize(("scheme", "n_steps"), [("crank_nicolson", 2000), ("bdf2", 2000)])
def test_three_member_chain_small_steps_within_1e6(scheme, n_steps):
    """Same chain at small steps: every member within 1e-6 relative of Bateman (1910) at
    t = T (issue 5 target)."""
    storage, rhs = _chain_problem()
    c_end, _ = integrate(scheme, storage, rhs, CHAIN_C0, CHAIN_T, n_steps)
    err = float(np.max(np.abs(c_end / bateman(CHAIN_T) - 1.0)))
    print(f"\n{scheme}: {n_steps} steps, chain max relative error {err:.3e}")
    assert err <= 1e-6, err


# --- Newton: quadratic convergence on the second-order case -------------------------------


def test_newton_converges_quadratically_on_second_order_decay():
    """One backward-Euler step of batch second-order decay with a long step (k c0 Δt = 200):
    R(c) = θ(c − c_n)/Δt + θ k c². Newton's theorem (Dennis & Schnabel 1983, Numerical
    Methods for Unconstrained Optimization and Nonlinear Equations, Thm 5.2.1, from memory)
    gives r_{k+1}/r_k² → R''/(2R'(c*)²); since R is quadratic, r_{k+1} = (R''/2)(r_k/R'(c_k))²
    exactly and R' ≥ R'(c*) along the monotone iterates, so every ratio must stay below
    the bound (1 % slack for rounding) and the last ones must approach it (≥ 0.5 × bound)."""
    c_n, k, dt = 1.0, 2e-7, 1e9  # k c0 Δt = 200
    res = lambda c: THETA * (c - c_n) / dt + THETA * k * c * c  # noqa: E731
    solve = lambda c, r: r / (THETA / dt + 2.0 * THETA * k * c)  # noqa: E731
    out = newton(res, solve, np.array([c_n]), rtol=1e-14, atol=1e-300)
    c_star = (-1.0 + math.sqrt(1.0 + 4.0 * k * dt * c_n)) / (2.0 * k * dt)
    assert out.x[0] == pytest.approx(c_star, rel=1e-12)
    bound = (2.0 * THETA * k) / (2.0 * (THETA / dt + 2.0 * THETA * k * c_star) ** 2)
    norms = out.residual_norms
    ratios = [b / (a * a) for a, b in itertools.pairwise(norms) if b > 1e-15]
    log = "\n".join(out.log_lines()) + "\nratios r_{k+1}/r_k²: " + ", ".join(
        f"{q:.4g}" for q in ratios) + f"\nbound R''/(2R'(c*)²) = {bound:.4g}"
    print("\n" + log)
    assert out.iterations >= 5, log
    assert all(q <= 1.01 * bound for q in ratios), log
    assert ratios[-1] >= 0.5 * bound, log
    assert all(a == 1.0 for a in out.step_lengths), log
