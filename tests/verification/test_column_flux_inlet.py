"""1D column with a flux-type (third-type) inlet, retardation and first-order decay.

Reference: van Genuchten, M.Th. & Alves, W.J. (1982), USDA Technical Bulletin 1661, the
third-type (flux) inlet solution with decay, for v c − D ∂c/∂x = v c0 at x = 0:

    c/c0 = v/(v+u) · exp[(v−u)x/(2D)] erfc[(Rx − ut)/(2√(DRt))]
         + v/(v−u) · exp[(v+u)x/(2D)] erfc[(Rx + ut)/(2√(DRt))]
         + v²/(2μD) · exp[vx/D − μt/R] erfc[(Rx + vt)/(2√(DRt))],   u = v√(1 + 4μD/v²).

Written from memory; ``test_flux_reference_solves_the_problem`` checks the PDE, the inlet
flux condition and the initial condition by finite differences first. Criterion (issue):
max error ≤ 1 % of c0.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from test_column import DAY, KD, LAMBDA, MU, POROSITY, RHO_B, D, R, V, _exp_erfc

from fe3d.case.builder import Layer, Material, Source, Species, Time, box_case
from fe3d.case.parts import TransportInputs
from fe3d.pipeline import mesh_and_flow
from fe3d.transport.run import run_transport

pytestmark = pytest.mark.verification


def flux_reference(x: np.ndarray, t: float) -> np.ndarray:
    x = np.asarray(x, dtype=float)
    u = V * math.sqrt(1.0 + 4.0 * MU * D / V**2)
    s = 2.0 * math.sqrt(D * R * t)
    return (V / (V + u) * _exp_erfc((V - u) * x / (2 * D), (R * x - u * t) / s)
            + V / (V - u) * _exp_erfc((V + u) * x / (2 * D), (R * x + u * t) / s)
            + V**2 / (2 * MU * D) * _exp_erfc(V * x / D - MU * t / R, (R * x + V * t) / s))


def test_flux_reference_solves_the_problem():
    """PDE residual ≤ 1e-5, inlet flux v c − D c_x = v c0 to 1e-6, c(x, 0+) ≈ 0."""
    x, t, h = np.linspace(0.5, 60.0, 50), 30.0, 1e-3
    c_t = (flux_reference(x, t + h) - flux_reference(x, t - h)) / (2 * h)
    c_x = (flux_reference(x + h, t) - flux_reference(x - h, t)) / (2 * h)
    c_xx = (flux_reference(x + h, t) - 2 * flux_reference(x, t) + flux_reference(x - h, t)) \
        / h**2
    res = R * c_t - (D * c_xx - V * c_x - MU * flux_reference(x, t))
    assert np.max(np.abs(res)) < 1e-5
    x0 = np.array([0.0, 1e-3, 2e-3])
    c0 = flux_reference(x0, t)
    flux = V * c0[0] - D * (-3 * c0[0] + 4 * c0[1] - c0[2]) / (2e-3)
    assert flux == pytest.approx(V * 1.0, abs=1e-6)
    assert flux_reference(np.array([20.0]), 1e-6)[0] == pytest.approx(0.0, abs=1e-12)


@pytest.mark.slow
def test_column_with_flux_inlet_matches_analytic():
    h, t_end = 0.8, 40.0
    case = box_case(
        length=100.0, width=h, cell=h, dz=h, heads={"west": 2.5, "east": 0.0},
        layers=[Layer("sand", -h, Material(10.0, 10.0, porosity=POROSITY, bulk_density=RHO_B))],
        species=[Species(kd=KD * 1000, half_life=math.log(2) / LAMBDA)],
        sources=[Source("inlet", shape="face_patch", face="west", kind="inflow_concentration",
                        concentration="1 kg/m^3")],
        time=Time(t_end, 0.5 * h, scheme="crank_nicolson"))
    site, flow = mesh_and_flow(case)
    np.testing.assert_allclose(flow.darcy_flux[0] * DAY / POROSITY, V, rtol=1e-9)
    *_, last = run_transport(site, flow, TransportInputs.of(case))
    err = float(np.max(np.abs(last.concentration["tracer"]
                              - flux_reference(site.points[0], t_end))))
    print("flux inlet max error / c0", err)
    assert err <= 0.01
    assert last.budgets["tracer"].relative_error <= 1e-8
