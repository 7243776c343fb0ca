"""Instantaneous release in uniform flow: moments of the plume.

Reference: Baetsle, L.H. (1969), *Migration of radionuclides in porous media*, in Progress
in Nuclear Energy Series XII, Health Physics (Pergamon): for a slug in uniform flow the
plume is Gaussian, its centroid moves at v/R and its variances grow as 2 D_i t / R along
each principal direction (D_L = α_L v, D_T = α_T v). Moments are used instead of the
Gaussian itself so that the finite initial block does not matter: the test compares the
centroid displacement and the growth of the variances between two times. Tolerances (issue
criteria): mass 1e-8 relative, centroid speed 1 %, variance growth 3 %.
"""

from __future__ import annotations

import numpy as np
import pytest
from conftest import box_case_text

from fe3d.case.load import parse_case
from fe3d.pipeline import mesh_and_flow
from fe3d.transport.run import run_transport

pytestmark = pytest.mark.verification

DAY = 86400.0
THETA, RHO_B, KD = 0.25, 1600.0, 7.8125e-5  # R = 1 + ρ_b K_d/θ = 1.5
R = 1 + RHO_B * KD / THETA
ALPHA_L, ALPHA_T = 1.0, 0.1


@pytest.mark.slow
def test_slug_moments_follow_the_analytical_growth():
    species = ('[species.slug]\nlimit = "1 mg/L"\n'
               f'kd = "{KD * 1000} L/kg"\n'
               '[[sources]]\nname = "slug"\nspecies = "slug"\nshape = "box"\n'
               'kind = "initial_plume"\nconcentration = "1 kg/m^3"\n'
               'x = ["14 m", "18 m"]\ny = ["13 m", "17 m"]\nz = ["-12 m", "-8 m"]\n')
    # K 10 m/d, heads 3 → 0.5 m over 100 m: q = 0.25 m/d, v = q/θ = 1 m/d
    text = box_case_text(length=100.0, width=30.0, layers=[("sand", -20.0, 10.0, 10.0)],
                         heads={"west": 3.0, "east": 0.5}, cell=1.0, dz=1.0,
                         porosity=THETA, bulk_density=RHO_B, alpha_l=ALPHA_L,
                         alpha_t=ALPHA_T, end="40 d", step="0.5 d", species=species)
    text = text.replace('step = "0.5 d"', 'step = "0.5 d"\nscheme = "crank_nicolson"\n'
                        'output_times = ["10 d", "40 d"]')
    case = parse_case(text)
    site, flow = mesh_and_flow(case)
    v = float(flow.darcy_flux[0].mean()) * DAY / THETA
    assert v == pytest.approx(1.0, rel=1e-9)
    snaps = {round(s.time / DAY): s for s in run_transport(site, flow, case)}
    cells, vol = site.cells, np.abs(site.cell_volumes())
    w = np.bincount(cells.ravel(), weights=np.tile(vol / 4.0, 4), minlength=site.n_nodes)

    def moments(c: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        m = w * c
        centre = (site.points * m).sum(axis=1) / m.sum()
        var = ((site.points - centre[:, None]) ** 2 * m).sum(axis=1) / m.sum()
        return centre, var

    c10, v10 = moments(snaps[10].concentration["slug"])
    c40, v40 = moments(snaps[40].concentration["slug"])
    speed = (c40[0] - c10[0]) / 30.0
    growth = v40 - v10
    expected = 2 * np.array([ALPHA_L, ALPHA_T, ALPHA_T]) * v * 30.0 / R
    print("speed", speed, v / R, "variance growth", growth, expected)
    assert speed == pytest.approx(v / R, rel=0.01)
    np.testing.assert_allclose(growth, expected, rtol=0.03)
    for snap in snaps.values():
        assert snap.budgets["slug"].relative_error <= 1e-8
    # no mass left the model yet: stored mass equals the initial mass
    b = snaps[40].budgets["slug"]
    assert b.stored == pytest.approx(b.initial, rel=1e-8)
