"""1D column breakthrough against the analytical solution with retardation and decay.

Reference: Ogata, A. & Banks, R.B. (1961), *A solution of the differential equation of
longitudinal dispersion in porous media*, USGS Professional Paper 411-A; extended for
retardation and first-order decay by van Genuchten, M.Th. & Alves, W.J. (1982), *Analytical
solutions of the one-dimensional convective-dispersive solute transport equation*, USDA
Technical Bulletin 1661 (constant-concentration inlet, semi-infinite column):

    c/c0 = ½ exp[(v−u)x/(2D)] erfc[(Rx − ut)/(2√(DRt))]
         + ½ exp[(v+u)x/(2D)] erfc[(Rx + ut)/(2√(DRt))],   u = v √(1 + 4μD/v²),

for R ∂c/∂t = D ∂²c/∂x² − v ∂c/∂x − μc. The formula is written from memory; the test
``test_reference_solution_satisfies_the_equation`` checks it against the PDE, the inlet
condition and the initial condition by finite differences before it is trusted.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.special import erfc, erfcx

from fe3d.case.builder import Layer, Material, Solver, Source, Species, Time, box_case
from fe3d.case.parts import TransportInputs
from fe3d.pipeline import mesh_and_flow
from fe3d.transport.run import run_transport

pytestmark = pytest.mark.verification

DAY = 86400.0
V = 1.0  # seepage velocity [m/d]
ALPHA_L = 1.0  # [m] → D = α_L v = 1 m²/d (no molecular diffusion)
D = ALPHA_L * V
POROSITY = 0.25
RHO_B = 1600.0  # [kg/m³]
KD = 6.25e-5  # [m³/kg] = 0.0625 L/kg → R = 1 + 1600 · 6.25e-5 / 0.25 = 1.4
R = 1.0 + RHO_B * KD / POROSITY
LAMBDA = 0.01  # [1/d]; both phases decay, so μ = λR
MU = LAMBDA * R
LENGTH = 100.0
T_END = 40.0  # [d]: front at vt/R ≈ 29 m, far from the outlet


def _exp_erfc(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """exp(a)·erfc(b) without overflow (erfcx for b > 0)."""
    out = np.empty_like(b)
    pos = b > 0
    out[pos] = np.exp(a[pos] - b[pos] ** 2) * erfcx(b[pos])
    out[~pos] = np.exp(a[~pos]) * erfc(b[~pos])
    return out


def reference(x: np.ndarray, t: float) -> np.ndarray:
    """c/c0 of van Genuchten & Alves (1982) for a constant-concentration inlet."""
    x = np.asarray(x, dtype=float)
    u = V * math.sqrt(1.0 + 4.0 * MU * D / V**2)
    s = 2.0 * math.sqrt(D * R * t)
    return 0.5 * _exp_erfc((V - u) * x / (2 * D), (R * x - u * t) / s) + 0.5 * _exp_erfc(
        (V + u) * x / (2 * D), (R * x + u * t) / s)


def test_reference_solution_satisfies_the_equation():
    """Finite-difference residual of the reference ≤ 1e-5 (step 1e-3: O(h²) ≈ 1e-6)."""
    x = np.linspace(0.5, 60.0, 50)
    t, hx, ht = 30.0, 1e-3, 1e-3
    c_t = (reference(x, t + ht) - reference(x, t - ht)) / (2 * ht)
    c_x = (reference(x + hx, t) - reference(x - hx, t)) / (2 * hx)
    c_xx = (reference(x + hx, t) - 2 * reference(x, t) + reference(x - hx, t)) / hx**2
    residual = R * c_t - (D * c_xx - V * c_x - MU * reference(x, t))
    assert np.max(np.abs(residual)) < 1e-5
    assert reference(np.array([0.0]), 5.0)[0] == pytest.approx(1.0, abs=1e-12)
    assert reference(np.array([20.0]), 1e-6)[0] == pytest.approx(0.0, abs=1e-12)


def _column_error(h: float, *, scheme: str, **solver: bool) -> tuple[float, float]:
    """Max |c − c_ref|/c0 over the nodes at T_END, and the grid Péclet number; ``solver``
    keys on top of fe3d's defaults."""
    dt = 0.5 * h / V  # Courant v·dt/(R·h) ≈ 0.36; dt ∝ h keeps the time error at the space order
    case = box_case(
        length=LENGTH, width=h, cell=h, dz=h, heads={"west": 2.5, "east": 0.0},
        layers=[Layer("sand", -h, Material(10.0, 10.0, porosity=POROSITY, bulk_density=RHO_B,
                                           longitudinal_dispersivity=ALPHA_L))],
        species=[Species(kd=KD * 1000, half_life=math.log(2) / LAMBDA)],
        sources=[Source("inlet", shape="face_patch", face="west", concentration="1 kg/m^3")],
        time=Time(T_END, dt, scheme=scheme), solver=Solver(**solver))
    site, flow = mesh_and_flow(case)
    # K = 10 m/d, gradient 2.5/100 → q = 0.25 m/d, v = q/θ = 1 m/d as assumed above
    np.testing.assert_allclose(flow.darcy_flux[0] * DAY / POROSITY, V, rtol=1e-9)
    *_, last = run_transport(site, flow, TransportInputs.of(case))
    c = last.concentration["tracer"]
    err = float(np.max(np.abs(c - reference(site.points[0], T_END))))
    return err, V * h / D


@pytest.mark.slow
def test_column_breakthrough_matches_analytic_and_converges():
    """fe3d's default scheme (Crank–Nicolson target, bounded, T16b): max error ≤ 1 % of c0 at
    grid Péclet ≤ 2, every pairwise observed order ≥ 1.5 and the two finest ≥ 1.8 (issue
    criteria; the order of the scheme's target is 2).

    Four meshes (three refinements) h = 1.6, 0.8, 0.4, 0.2 m (grid Péclet 1.6 … 0.2) with
    dt ∝ h. Measured when written: errors 0.51 %, 0.17 %, 0.041 %, 0.011 % of c0, orders
    1.63, 2.00, 1.88 (the limiter still acts at the front on the coarsest mesh). SUPG, the
    earlier default: 0.86 %, 0.26 %, 0.067 %, 0.017 %, orders 1.73, 1.95, 1.98 (checked
    below). At exactly Péclet 2 (h = 2 m) plain Galerkin is 0.81 % of c0.
    """
    hs = [1.6, 0.8, 0.4, 0.2]
    for solver in ({}, {"monotone": False}):  # the default, and SUPG
        results = [_column_error(h, scheme="crank_nicolson", **solver) for h in hs]
        errs = [e for e, _ in results]
        table = "\n".join(f"h={h:5.2f} m  Pe={pe:4.2f}  max err={e:.3e}"
                          for h, (e, pe) in zip(hs, results, strict=True))
        orders = [math.log2(errs[i] / errs[i + 1]) for i in range(len(errs) - 1)]
        print(solver, table, "\norders:", orders)
        assert all(e <= 0.01 for e in errs), table
        assert min(orders) >= 1.5, f"{table}\norders {orders}"
        if not solver:
            assert min(orders[1:]) >= 1.8, f"{table}\norders {orders}"


def test_column_at_grid_peclet_two_without_stabilisation():
    """At grid Péclet 2 plain Galerkin (SUPG off) is within 1 % of c0 (measured 0.81 %);
    SUPG adds about 0.45 % there, which is why the converging test above starts at 1.6."""
    err, pe = _column_error(2.0, scheme="crank_nicolson", monotone=False, supg=False)
    assert pe == pytest.approx(2.0)
    assert err <= 0.01
