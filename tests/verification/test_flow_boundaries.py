"""Head-dependent boundary on a lateral face, and wells screened in a named unit."""

from __future__ import annotations

import numpy as np
import pytest

from fe3d.case.builder import Layer, Material, Species, Time, box_case
from fe3d.case.parts import FlowInputs
from fe3d.errors import CaseError
from fe3d.flow.solve import solve_flow
from fe3d.mesh.build import build_mesh

pytestmark = pytest.mark.verification
DAY = 86400.0



def _box(length: float, width: float, *, sand_k: float = 10.0, **kwargs: object):
    """A box with sand (``sand_k`` [m/d]), clay and gravel materials, one species, 1 d."""
    materials = {"sand": Material(sand_k, porosity=0.3, bulk_density=1700.0),
                 "clay": Material(0.01, porosity=0.4),
                 "gravel": Material(50.0, porosity=0.25, bulk_density=1800.0)}
    return box_case(length=length, width=width, materials=materials, species=[Species("t")],
                    time=Time(1.0, 1.0), **kwargs)


def test_river_on_a_lateral_face_matches_the_series_resistance():
    """1D flow from a fixed head through the aquifer into a stream bed on the east face:
    K (h_w − h_e)/L = leakance · (h_e − H)·(per unit area), so
    h_e = (K/L · h_w + leakance · H)/(K/L + leakance) (Darcy's law in series; exact for P1
    with a head linear in x and a lumped, uniform face term)."""
    K, L, hw, H, leak = 10.0, 100.0, 10.0, 8.0, 0.05  # m/d, m, m, m, 1/d
    brook = {"name": "brook", "kind": "stream", "face": "east", "stage": f"{H} m",
             "leakance": f"{leak} d^-1"}
    case = _box(L, 20.0, sand_k=K, title="stream face", cell=10.0, dz=5.0,
                layers=[Layer("sand", -10.0, "sand")], heads={"west": hw},
                sections={"head_dependent": [brook]})
    site = build_mesh(case)
    flow = solve_flow(site, FlowInputs.of(case))
    h_east = (K / L * hw + leak * H) / (K / L + leak)
    east = site.face_nodes("east")
    np.testing.assert_allclose(flow.head[east], h_east, rtol=1e-9)
    brook = next(b for b in flow.budget if b.name == "brook")
    assert brook.outflow == pytest.approx(leak / DAY * (h_east - H) * 20.0 * 10.0, rel=1e-9)
    assert flow.discrepancy <= 1e-8


def _layered(well: dict[str, object]):
    """Sand over clay over gravel; the clay is absent at the two eastern boreholes."""
    boreholes = []
    for name, x, y, clay in (("B1", 0, 0, True), ("B2", 0, 50, True), ("B3", 100, 0, False),
                             ("B4", 100, 50, False), ("B5", 40, 25, True)):
        bases = {"sand": "-4 m", "clay": "-6 m", "gravel": "-12 m"} if clay else \
            {"sand": "-5 m", "gravel": "-12 m"}
        boreholes.append({"name": name, "x": f"{x} m", "y": f"{y} m", "ground": "0 m",
                          "bases": bases})
    strat = {"interpolation": "linear", "min_thickness": "0.3 m", "boreholes": boreholes}
    return _box(100.0, 50.0, title="screened unit", cell=10.0, dz=1.0, heads={"west": 1.0},
                layers=[Layer(unit, None, unit) for unit in ("sand", "clay", "gravel")],
                sections={"stratigraphy": strat, "wells": [well]})


def test_well_screened_in_a_pinched_out_unit_is_refused():
    well = {"name": "PW", "x": "95 m", "y": "25 m", "screens": [["-4.5 m", "-5.5 m"]],
            "rate": "5 m^3/d", "unit": "clay"}
    case = _layered(well)
    with pytest.raises(CaseError, match=r"wells\[PW\]\.unit = 'clay': this unit is pinched out"):
        solve_flow(build_mesh(case), FlowInputs.of(case))


def test_well_screen_must_stay_in_its_unit():
    well = {"name": "PW", "x": "20 m", "y": "25 m", "screens": [["-2 m", "-9 m"]],
            "rate": "5 m^3/d", "unit": "gravel"}
    case = _layered(well)
    with pytest.raises(CaseError, match=r"wells\[PW\]\.unit = 'gravel': the screens also reach"):
        solve_flow(build_mesh(case), FlowInputs.of(case))
    ok = _layered({**well, "screens": [["-8 m", "-11 m"]]})
    flow = solve_flow(build_mesh(ok), FlowInputs.of(ok))
    assert flow.discrepancy <= 1e-8
