"""Flow with wells, recharge and head-dependent boundaries against closed-form solutions.

References
----------
- Thiem, G. (1906), *Hydrologische Methoden*, Gebhardt, Leipzig: steady confined flow to a
  fully penetrating well, h(r) = H + Q/(2πT) ln(r/R), T = K b.
- Freeze, R.A. & Cherry, J.A. (1979), *Groundwater*, Prentice-Hall: the strip aquifer between
  two fixed heads with uniform recharge W (per unit area) in a confined layer of
  transmissivity T: h(x) = h1 + (h2 − h1) x/L + W x (L − x)/(2T).
- Bear, J. (1972), *Dynamics of Fluids in Porous Media*, Elsevier, ch. 5: the conductivity
  tensor of a layered medium with bedding normal n is K_h I + (K_v − K_h) n nᵀ.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from fe3d.case.builder import Layer, Material, ObservationPoint, Time, box_case
from fe3d.case.parts import FlowInputs
from fe3d.errors import CaseErrors
from fe3d.flow.solve import solve_flow
from fe3d.mesh.build import build_mesh

pytestmark = pytest.mark.verification

DAY = 86400.0


def _case(*, L=200, W=200, K=10.0, b=10.0, h=10.0, hf=10.0, rf=0.0, dz=None, heads=None,
          material=None, observation_points=(), **sections):
    """One aquifer of conductivity ``K`` [m/d] and thickness ``b`` [m] under a top at 0 m in
    an ``L`` × ``W`` box; plan cells ``h`` (``hf`` within ``rf`` of features) and cell layers
    ``dz`` (default: one cell layer) [m]; ``sections`` as the case file writes them."""
    aquifer = Material(K, porosity=0.3, bulk_density=1700.0, **(material or {}))
    return box_case(title="flow check", length=L, width=W, cell=h, dz=b if dz is None else dz,
                    fine_cell=hf, fine_radius=rf, heads=heads, time=Time(1.0, 1.0),
                    layers=[Layer("aquifer", -b, aquifer)],
                    observation_points=observation_points, sections=sections)


@pytest.mark.slow
def test_thiem_drawdown_around_a_pumping_well():
    """Head vs ln r within 1 % of the exact drawdown for r > two fine cell sizes from the well
    (Thiem 1906); the fixed-head outer boundary carries the exact head on the box sides.

    Fine plan cell 1 m at the well and ten 1 m cell layers (cells as tall as they are wide).
    The 1 % bound is the issue's target (common practice, no source); it is relative to the
    largest exact drawdown in the compared region (r from 2 m to 90 m).
    """
    q, K, b, hf = 500.0, 10.0, 10.0, 1.0
    well = {"name": "PW", "x": "100 m", "y": "100 m", "screens": [["0 m", "-10 m"]],
            "rate": f"{q} m^3/d"}
    # one-metre cell layers
    case = _case(K=K, b=b, h=6.0, hf=hf, rf=15.0, dz=1.0, heads={"west": 20.0}, wells=[well],
                 observation_points=[ObservationPoint("PW_loc", 100.0, 100.0, z=-5.0)])
    site = build_mesh(case)
    assert site.report.sublayers == {"aquifer": 10}
    T = K * b / DAY
    Q = q / DAY
    H, R = 20.0, 100.0

    def exact(x, y):
        r = np.hypot(x - 100.0, y - 100.0)
        return H + Q / (2 * math.pi * T) * np.log(r / R)

    lateral = np.unique(np.hstack([site.face_nodes(f) for f in ("west", "east", "south",
                                                                 "north")]))
    flow = solve_flow(site, FlowInputs.of(case), extra_fixed={
        "ring": (lateral, exact(site.points[0, lateral], site.points[1, lateral]))})
    x, y = site.points[0], site.points[1]
    r = np.hypot(x - 100.0, y - 100.0)
    # Measured when written (max error / max drawdown, every node, r > 2 fine cells):
    #   fine cell / cell layer   1 m / 10 m   1 m / 2 m   1 m / 1 m   2 m / 2 m
    #   one split rule           1.12 %       1.76 %      1.09 %      1.01 %
    #   mirrored alternately     (one layer)  1.76 %      0.67 %      0.75 %
    # The plan mesh is not the cause: heads averaged over each column are within 0.15-0.26 %
    # from two cells out in every row, and a 2D P1 solve on the same plan meshes is within
    # 0.01 Q/(2πT). The excess is a top-to-bottom head difference that the prism-to-tetrahedra
    # split creates where the head curves strongly (next to the well); mirroring the split in
    # alternate cell layers (fe3d/mesh/build.py) and cells about as tall as wide keep it small.
    # From three cells out this case gives 0.36 %, from four 0.26 %. Sampling the screen at
    # segment midpoints (fe3d/mesh/locate.screen_points; the end points used to take 22 % too
    # much of the rate) brings the two-cell error from 0.67 % to 0.38 % (printed by this test).
    sel = (r > 2.0 * hf) & (r < 90.0)
    drawdown_exact = H - exact(x[sel], y[sel])  # relative to H at r = R
    drawdown_num = H - flow.head[sel]
    rel = np.abs(drawdown_num - drawdown_exact) / np.abs(drawdown_exact).max()
    print(f"Thiem: max relative drawdown error beyond 2 cells {rel.max():.3e}")
    assert rel.max() <= 0.01, f"max relative drawdown error {rel.max():.3e}"
    well = next(i for i in flow.budget if i.name == "PW")
    assert well.outflow == pytest.approx(Q, rel=1e-12)
    assert flow.discrepancy <= 1e-8
    assert flow.well_heads["PW"] < exact(np.array([104.0]), np.array([100.0]))[0]


def test_strip_aquifer_with_recharge_is_parabolic():
    """h(x) = h1 + (h2 − h1)x/L + W x(L − x)/(2T) within 0.5 % of the head rise above the
    linear profile plus the range (Freeze & Cherry 1979)."""
    L, K, b, W = 500.0, 5.0, 20.0, 300.0  # W in mm/yr
    case = _case(L=L, W=50, K=K, b=b, h=10.0, hf=10.0, heads={"west": 30.0, "east": 28.0},
                 recharge=[{"name": "rain", "rate": f"{W} mm/yr"}])
    site = build_mesh(case)
    flow = solve_flow(site, FlowInputs.of(case))
    w = W / 1000.0 / (365.25 * DAY)
    T = K * b / DAY
    x = site.points[0]
    exact = 30.0 + (28.0 - 30.0) * x / L + w * x * (L - x) / (2 * T)
    mound = w * L * L / (8 * T)
    err = np.max(np.abs(flow.head - exact))
    assert err <= 0.005 * (mound + 2.0), f"max head error {err:.3e} m, mound {mound:.3f} m"
    rain = next(i for i in flow.budget if i.name == "rain")
    assert rain.inflow == pytest.approx(w * L * 50.0, rel=1e-10)
    assert flow.discrepancy <= 1e-8


def test_dipping_bedding_rotates_the_conductivity_tensor():
    """With strike 0° and dip 30° (beds dip east), K = K_h I + (K_v − K_h) n nᵀ, n =
    (sin 30°, 0, cos 30°) (Bear 1972); a head gradient along x then drives a vertical flux."""
    mat = {"vertical_conductivity": 1.0, "conductivity_strike": 0.0, "conductivity_dip": 30.0}
    case = _case(L=100, W=20, K=10.0, h=10.0, heads={"west": 10.0, "east": 9.0}, material=mat)
    site = build_mesh(case)
    flow = solve_flow(site, FlowInputs.of(case))
    n = np.array([math.sin(math.pi / 6), 0.0, math.cos(math.pi / 6)])
    Kt = (10.0 * np.eye(3) + (1.0 - 10.0) * np.outer(n, n)) / DAY
    assert np.all(np.abs(flow.darcy_flux[2]) > 0)
    # the fixed-head faces and no-flow top/bottom make the field 2D; check the tensor through
    # the flux of each cell against -K grad h computed from the same head
    from fe3d.mesh.geometry import p1_gradients

    g, _ = p1_gradients(site.points, site.cells)
    grad_h = np.einsum("eik,ie->ke", g, flow.head[site.cells])
    np.testing.assert_allclose(flow.darcy_flux, -Kt @ grad_h, rtol=1e-10, atol=1e-16)
    assert flow.discrepancy <= 1e-8


def test_drain_only_removes_water_and_river_both_ways():
    """A drain above the water table carries no flow; a stream below it gains water; the
    budget closes (design target ≤ 1e-8, common practice, no source)."""
    drain = {"name": "ditch", "kind": "drain", "stage": "-0.5 m", "leakance": "1 d^-1",
             "zone": [["40 m", "0 m"], ["60 m", "0 m"], ["60 m", "50 m"], ["40 m", "50 m"]]}
    heads = {"west": -1.0, "east": -1.0}
    case = _case(L=100, W=50, heads=heads, head_dependent=[drain])
    flow = solve_flow(build_mesh(case), FlowInputs.of(case))
    ditch = next(i for i in flow.budget if i.name == "ditch")
    assert ditch.inflow == 0.0
    assert ditch.outflow == 0.0
    np.testing.assert_allclose(flow.head, -1.0, atol=1e-12)
    stream = _case(L=100, W=50, heads=heads, head_dependent=[{**drain, "kind": "stream"}])
    flow = solve_flow(build_mesh(stream), FlowInputs.of(stream))
    r = next(i for i in flow.budget if i.name == "ditch")
    assert r.inflow > 0
    assert flow.discrepancy <= 1e-8
    assert flow.head.max() < -0.5


def test_bad_flow_inputs_name_the_field():
    """No fixed head (singular), K ≤ 0, a well screen outside the model, a stage below the
    top cells: one line each naming the field."""
    with pytest.raises(CaseErrors, match=r"fixed_heads = '\(none\)': give at least one"):
        _case()
    west = {"west": 1.0}
    with pytest.raises(CaseErrors) as e:
        _case(K=-1.0, heads=west)
    assert "materials.aquifer.horizontal_conductivity" in str(e.value)
    brook = {"name": "brook", "kind": "stream", "stage": "-10.5 m", "leakance": "1 d^-1",
             "zone": [["0 m", "0 m"], ["50 m", "0 m"], ["50 m", "50 m"]]}
    case = _case(heads=west, head_dependent=[brook], b=10.0)
    with pytest.raises(Exception, match=r"head_dependent\[brook\]\.stage"):
        solve_flow(build_mesh(case), FlowInputs.of(case))
    well = {"name": "PW", "x": "50 m", "y": "50 m", "screens": [["-2 m", "-14 m"]],
            "rate": "10 m^3/d"}
    with pytest.raises(CaseErrors, match=r"wells\[PW\]\.screens\[0\]"):
        _case(heads=west, wells=[well])
    with pytest.raises(CaseErrors, match=r"wells\[PW\]"):
        _case(heads=west, wells=[{**well, "x": "500 m"}])
