"""Nonlinear reactions inside the transport solver, in a batch (no flow) setting.

References: second-order decay dc/dt = −k c² has c = c0/(1 + k c0 t) (any kinetics text,
e.g. Atkins, *Physical Chemistry*; formula from memory, elementary to integrate); Monod
(1949, Annu. Rev. Microbiol. 3) kinetics dc/dt = −μ c/(K_s + c) integrates to
K_s ln(c/c0) + (c − c0) = −μ t, solved here with scipy's brentq (reference library).
Uniform initial field, equal fixed heads (no flow): every node follows the ODE, so the
observed time order is that of the scheme — 1 for backward Euler, 2 for Crank–Nicolson and
BDF2 (bands ±0.15) — and the mass budget closes (≤ 1e-6, nonlinear target of the issue).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.optimize import brentq
from test_time_loop import batch_case

from fe3d.case.builder import Solver, Species, Time, with_changes
from fe3d.case.load import load_case
from fe3d.case.parts import TransportInputs
from fe3d.pipeline import mesh_and_flow
from fe3d.transport.run import run_transport

pytestmark = pytest.mark.verification

DAY = 86400.0
C0 = 2.0  # kg/m³ = 2 g/L


def _run(reaction: dict[str, str], scheme: str, steps: int) -> tuple[float, float]:
    species = Species("s", initial_concentration=f"{C0} kg/m^3", options=reaction)
    # BDF2 cannot be bounded: it runs with SUPG (solver.monotone = false)
    case = batch_case([species], time=Time(10.0, 10.0 / steps, scheme=scheme),
                      solver=Solver(linear_solver="direct", monotone=scheme != "bdf2"))
    site, flow = mesh_and_flow(case)
    *_, last = run_transport(site, flow, TransportInputs.of(case))
    c = last.concentration["s"]
    assert np.ptp(c) <= 1e-9 * C0  # stays uniform
    return float(c.mean()), last.budgets["s"].relative_error


@pytest.mark.parametrize(("scheme", "order"), [("backward_euler", 1.0),
                                               ("crank_nicolson", 2.0), ("bdf2", 2.0)])
def test_second_order_decay_in_transport(scheme, order):
    k = 0.05  # L/g/d = 0.05 m³/kg/d
    exact = C0 / (1 + k * C0 * 10.0)
    errs = []
    for steps in (10, 20, 40):
        c, budget = _run({"second_order_rate": f"{k} m^3/kg/d"}, scheme, steps)
        errs.append(abs(c - exact) / exact)
        assert budget <= 1e-6
    orders = [math.log2(errs[i] / errs[i + 1]) for i in range(2)]
    assert all(abs(p - order) <= 0.15 for p in orders), (errs, orders)


def test_monod_decay_in_transport():
    mu, ks = 0.1, 0.5  # kg/m³/d, kg/m³
    exact = brentq(lambda c: ks * math.log(c / C0) + (c - C0) + mu * 10.0, 1e-9, C0)
    c, budget = _run({"monod_max_rate": f"{mu} kg/m^3/d", "monod_half_saturation": f"{ks} kg/m^3"},
                     "crank_nicolson", 80)
    assert c == pytest.approx(exact, rel=1e-4)
    assert budget <= 1e-6


def test_langmuir_with_decay_of_both_phases_in_a_batch():
    """Total mass θc + ρ_b s(c) decays as M0 e^(−λt) when both phases decay at λ (first-order
    decay, exact); c follows from inverting the Langmuir isotherm (brentq, reference
    library). Crank–Nicolson with 80 steps: 1e-4 relative; budget ≤ 1e-6."""
    theta, rho_b, s_max, k_l, half_life = 0.25, 1600.0, 1e-4, 5.0, 4.0
    lam = math.log(2) / half_life
    reaction = {"half_life": f"{half_life} d", "sorption": "langmuir",
                "langmuir_capacity": f"{s_max * 1e6} mg/kg", "langmuir_affinity": f"{k_l} m^3/kg"}

    def total(c: float) -> float:
        return theta * c + rho_b * s_max * k_l * c / (1 + k_l * c)

    target = total(C0) * math.exp(-lam * 10.0)
    exact = brentq(lambda c: total(c) - target, 0.0, C0)
    c, budget = _run(reaction, "crank_nicolson", 80)
    assert c == pytest.approx(exact, rel=1e-4)
    assert budget <= 1e-6


@pytest.mark.parametrize("method", ["amg", "gauss_seidel"])
def test_newton_with_the_reused_step_preconditioner_matches_the_direct_solve(method):
    """Second-order decay with flow (the tiny case, 2 yr): Newton iterations solved by GMRES
    preconditioned with the step matrix's own solver (no new factor or hierarchy per
    iteration, theory.md T10) give the direct solution to 1e-6 of the peak, and the
    budget closes ≤ 1e-6 (nonlinear target of the issue)."""
    from pathlib import Path

    tiny = load_case(Path(__file__).parents[2] / "cases" / "tiny" / "case.toml")
    results = {}
    for solver in ("direct", method):
        case = with_changes(tiny, species={"tracer": {"second_order_rate": "50 m^3/kg/d"}},
                            solver={"linear_solver": solver})
        site, flow = mesh_and_flow(case)
        *_, last = run_transport(site, flow, TransportInputs.of(case))
        assert last.budgets["tracer"].relative_error <= 1e-6
        assert last.diagnostics.max_newton_iterations >= 2
        results[solver] = last.concentration["tracer"]
    peak = float(np.max(np.abs(results["direct"])))
    assert np.max(np.abs(results[method] - results["direct"])) <= 1e-6 * peak


def test_second_order_decay_with_linear_sorption_is_slowed_by_retardation():
    """Linear sorption (K_d) with second-order loss of the dissolved phase, batch:
    θR dc/dt = −θ k c², so c = c0/(1 + k c0 t/R) (separation of variables, as above).
    Crank–Nicolson, 80 steps: 1e-4 relative; budget ≤ 1e-6. (A past bug counted the sorbed
    storage twice on this path.)"""
    k, kd, rho, theta = 0.05, 1e-4, 1600.0, 0.25  # m³/kg/d, m³/kg, kg/m³, -
    R = 1.0 + rho * kd / theta
    c, budget = _run({"kd": f"{kd * 1000} L/kg", "decay_in_sorbed_phase": False,
                      "second_order_rate": f"{k} m^3/kg/d"}, "crank_nicolson", 80)
    assert c == pytest.approx(C0 / (1 + k * C0 * 10.0 / R), rel=1e-4)
    assert budget <= 1e-6
