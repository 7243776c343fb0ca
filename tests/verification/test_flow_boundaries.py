"""Head-dependent boundary on a lateral face, and wells screened in a named unit."""

from __future__ import annotations

import numpy as np
import pytest

from fe3d.case.load import parse_case
from fe3d.errors import CaseError
from fe3d.flow.solve import solve_flow
from fe3d.mesh.build import build_mesh

pytestmark = pytest.mark.verification
DAY = 86400.0

MATS = """
[materials.sand]
horizontal_conductivity = "{K} m/d"
porosity = 0.3
bulk_density = "1700 kg/m^3"
longitudinal_dispersivity = "1 m"
transverse_dispersivity = "0.1 m"
[materials.clay]
horizontal_conductivity = "0.01 m/d"
porosity = 0.4
bulk_density = "1600 kg/m^3"
longitudinal_dispersivity = "1 m"
transverse_dispersivity = "0.1 m"
[materials.gravel]
horizontal_conductivity = "50 m/d"
porosity = 0.25
bulk_density = "1800 kg/m^3"
longitudinal_dispersivity = "1 m"
transverse_dispersivity = "0.1 m"
[species.t]
limit = "1 mg/L"
[time]
end = "1 d"
step = "1 d"
"""


def test_river_on_a_lateral_face_matches_the_series_resistance():
    """1D flow from a fixed head through the aquifer into a stream bed on the east face:
    K (h_w − h_e)/L = leakance · (h_e − H)·(per unit area), so
    h_e = (K/L · h_w + leakance · H)/(K/L + leakance) (Darcy's law in series; exact for P1
    with a head linear in x and a lumped, uniform face term)."""
    K, L, hw, H, leak = 10.0, 100.0, 10.0, 8.0, 0.05  # m/d, m, m, m, 1/d
    text = (f'title = "river face"\n[box]\nx = ["0 m", "{L} m"]\ny = ["0 m", "20 m"]\n'
            'top = "0 m"\n' + MATS.format(K=K)
            + '[[layers]]\nname = "sand"\nmaterial = "sand"\nbottom = "-10 m"\n'
            f'[[fixed_heads]]\nface = "west"\nhead = "{hw} m"\n'
            f'[[head_dependent]]\nname = "brook"\nkind = "stream"\nface = "east"\n'
            f'stage = "{H} m"\nleakance = "{leak} d^-1"\n'
            '[mesh]\ncell_size = "10 m"\nlayer_cell_thickness = "5 m"\n')
    case = parse_case(text)
    site = build_mesh(case)
    flow = solve_flow(site, case)
    h_east = (K / L * hw + leak * H) / (K / L + leak)
    east = site.face_nodes("east")
    np.testing.assert_allclose(flow.head[east], h_east, rtol=1e-9)
    brook = next(b for b in flow.budget if b.name == "brook")
    assert brook.outflow == pytest.approx(leak / DAY * (h_east - H) * 20.0 * 10.0, rel=1e-9)
    assert flow.discrepancy <= 1e-8


def _layered(well: str) -> str:
    """Sand over clay over gravel; the clay is absent at the two eastern boreholes."""
    bh = ""
    for name, x, y, clay in (("B1", 0, 0, True), ("B2", 0, 50, True), ("B3", 100, 0, False),
                             ("B4", 100, 50, False), ("B5", 40, 25, True)):
        bases = '{ sand = "-4 m", clay = "-6 m", gravel = "-12 m" }' if clay else \
            '{ sand = "-5 m", gravel = "-12 m" }'
        bh += (f'[[stratigraphy.boreholes]]\nname = "{name}"\nx = "{x} m"\ny = "{y} m"\n'
               f'ground = "0 m"\nbases = {bases}\n')
    return ('title = "screened unit"\n[box]\nx = ["0 m", "100 m"]\ny = ["0 m", "50 m"]\n'
            'top = "0 m"\n' + MATS.format(K=10.0)
            + '[stratigraphy]\ninterpolation = "linear"\nmin_thickness = "0.3 m"\n' + bh
            + '[[layers]]\nname = "sand"\nmaterial = "sand"\n'
            + '[[layers]]\nname = "clay"\nmaterial = "clay"\n'
            + '[[layers]]\nname = "gravel"\nmaterial = "gravel"\n'
            + '[[fixed_heads]]\nface = "west"\nhead = "1 m"\n' + well
            + '[mesh]\ncell_size = "10 m"\nlayer_cell_thickness = "1 m"\n')


def test_well_screened_in_a_pinched_out_unit_is_refused():
    well = ('[[wells]]\nname = "PW"\nx = "95 m"\ny = "25 m"\nscreens = [["-4.5 m", "-5.5 m"]]\n'
            'rate = "5 m^3/d"\nunit = "clay"\n')
    case = parse_case(_layered(well))
    with pytest.raises(CaseError, match=r"wells\[PW\]\.unit = 'clay': this unit is pinched out"):
        solve_flow(build_mesh(case), case)


def test_well_screen_must_stay_in_its_unit():
    well = ('[[wells]]\nname = "PW"\nx = "20 m"\ny = "25 m"\nscreens = [["-2 m", "-9 m"]]\n'
            'rate = "5 m^3/d"\nunit = "gravel"\n')
    case = parse_case(_layered(well))
    with pytest.raises(CaseError, match=r"wells\[PW\]\.unit = 'gravel': the screens also reach"):
        solve_flow(build_mesh(case), case)
    ok = parse_case(_layered(well.replace('[["-2 m", "-9 m"]]', '[["-8 m", "-11 m"]]')))
    flow = solve_flow(build_mesh(ok), ok)
    assert flow.discrepancy <= 1e-8
