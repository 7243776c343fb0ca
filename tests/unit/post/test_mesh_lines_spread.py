"""The mesh report names a receptor where the plume is narrower than a corridor cell.

A point source in uniform flow (α_L 5 m, α_T 0.5 m): the corridor's plan cells are 2 α_L =
10 m (theory.md M1) and the plume's transverse spread 40 m downstream is √(2 α_T s) = 6.3 m
(Bear 1972, *Dynamics of fluids in porous media*, §10.6, from memory), so the report warns
there; 200 m downstream it is 14 m and it does not. The pathline runs straight from the
source, so the arc length and spreads are exact up to the record's four significant digits
(relative 5e-4).
"""

from __future__ import annotations

import math

from fe3d.case.builder import Layer, Material, ObservationPoint, Source, Species, Time, box_case
from fe3d.pipeline import mesh_case
from fe3d.post.mesh_lines import mesh_lines


def test_report_warns_where_the_plume_is_narrower_than_a_cell(tmp_path) -> None:
    sand = Material(30.0, 30.0, porosity=0.25, longitudinal_dispersivity=5.0,
                    transverse_dispersivity=0.5, options={"vertical_dispersivity": "0.05 m"})
    case = box_case(
        length=320.0, width=100.0, cell=20.0, dz=2.0, heads={"west": 2.0, "east": 0.0},
        layers=[Layer("sand", -10.0, sand)], species=[Species("solvent", limit=1e-3)],
        sources=[Source("leak", species="solvent", shape="point", kind="mass_loading",
                        mass_rate=1.0, points=[(30.0, 50.0, -5.0)])],
        observation_points=[ObservationPoint("near", x=70.0, y=50.0, z=-5.0),
                            ObservationPoint("far", x=230.0, y=50.0, z=-5.0)],
        time=Time(3000.0, step=None, output_interval=1000.0))
    site, _, _ = mesh_case(case, tmp_path)
    spreads = {r.name: r for r in site.report.corridor.receptors}
    assert set(spreads) == {"near", "far"}
    near = spreads["near"]
    assert (near.along, near.cell_size) == (40.0, 10.0)
    assert math.isclose(near.sigma_t, math.sqrt(2 * 0.5 * 40.0), rel_tol=5e-4)
    assert math.isclose(near.sigma_v, math.sqrt(2 * 0.05 * 40.0), rel_tol=5e-4)
    warnings = [line.text for line in mesh_lines(site) if line.kind == "warning"]
    assert any(w.startswith("near: the plume there is narrower than a corridor cell")
               for w in warnings)
    assert not any(w.startswith("far:") for w in warnings)
