"""Layered-site mesher: surfaces from borehole picks, unit volumes, pinch-out and crossing
rules, refinement, tags round trip and bad input.

Sources of the expected values (each test says which it uses):
- Volume of a solid between two surfaces linear over a plan triangle = triangle area × mean of
  the three vertical thicknesses (the truncated triangular prism; e.g. Zwillinger (ed.) 2018,
  *CRC Standard Mathematical Tables and Formulas*, 33rd ed., solid geometry).
- Area and centroid of a simple polygon by the shoelace formulas (Bourke 1988, "Calculating
  the area and centroid of a polygon"); the mean of a plane over a polygon is its value at
  the centroid.
- Reference interpolants: scipy ``LinearNDInterpolator`` and ``RBFInterpolator`` (general
  reference library) evaluated independently at the plan nodes.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import meshio
import numpy as np
import pytest
from scipy.interpolate import LinearNDInterpolator, RBFInterpolator

from fe3d.case.builder import Layer, Material, Mesh, build_case
from fe3d.case.load import load_case
from fe3d.case.schema import Case
from fe3d.errors import CaseErrors, MeshError
from fe3d.mesh.build import build_mesh
from fe3d.mesh.io import mesh_inputs_hash, read_site_mesh, save_cached
from fe3d.post.vtk import write_mesh

pytestmark = pytest.mark.verification

# An invented pentagon site (metres), counter-clockwise; edge names per edge.
PENTAGON = [(0.0, 0.0), (120.0, 0.0), (150.0, 70.0), (60.0, 110.0), (-10.0, 60.0)]
EDGES = ["upgradient", "south_fence", "creek", "north_fence", "west_fence"]

SAND = Material(porosity=0.3, name="sand")


def write_case(folder: Path, rows: list[str], *, method: str = "linear", tmin: float = 0.0,
               cell: float = 12.0, vertices=PENTAGON, edges=EDGES, mesh: Mesh | None = None,
               **sections: object) -> Case:
    """Write the borehole ``rows`` to ``folder`` and build the three-unit site on them
    (``sections``: lenses, wells, refinement lines as the case file writes them)."""
    (folder / "boreholes.csv").write_text(
        "borehole,x,y,ground,upper,middle,lower\n" + "\n".join(rows) + "\n", encoding="utf-8")
    geometry = {"boundary": {"vertices": [[f"{x} m", f"{y} m"] for x, y in vertices],
                             "edge_names": list(edges)},
                "stratigraphy": {"borehole_file": "boreholes.csv", "interpolation": method,
                                 "min_thickness": f"{tmin} m"}}
    return build_case(title="stratigraphy check", heads={"upgradient": 9.0, "creek": 8.0},
                      layers=[Layer(name, None, SAND) for name in ("upper", "middle", "lower")],
                      mesh=mesh or Mesh(cell, 2.0), sections={**geometry, **sections},
                      base_dir=folder)


# boreholes at the five vertices plus three inside: the data hull is the whole boundary
BOREHOLE_XY = [*PENTAGON, (50.0, 40.0), (90.0, 60.0), (30.0, 80.0)]


def irregular_rows() -> list[str]:
    rng = np.random.default_rng(0)
    rows = []
    for i, (x, y) in enumerate(BOREHOLE_XY):
        g = 10.0 + rng.uniform(-1, 1)
        u = 5.0 + rng.uniform(-1.5, 1.5)
        m = 1.0 + rng.uniform(-1.5, 1.5)
        lo = -8.0 + rng.uniform(-1, 1)
        rows.append(f"BH-{i + 1},{x},{y},{g:.4f},{u:.4f},{m:.4f},{lo:.4f}")
    return rows


def picks(rows: list[str]) -> tuple[np.ndarray, np.ndarray]:
    arr = np.array([[float(v) if v else np.nan for v in r.split(",")[1:]] for r in rows])
    return arr[:, :2], arr[:, 2:]  # xy (k, 2); ground, upper, middle, lower (k, 4)


def unit_volumes(site) -> dict[str, float]:
    vol = site.cell_volumes()
    return {n: float(vol[site.cell_layer == i].sum()) for i, n in enumerate(site.layer_names)}


def prism_volumes(site) -> dict[str, float]:
    """Σ over plan triangles of area × mean thickness (truncated prism, CRC tables)."""
    xy, tri, s = site.report.plan.xy, site.report.plan.tri, site.report.plan.surfaces
    a, b, c = (xy[:, tri[i]] for i in range(3))
    area = 0.5 * np.abs((b[0] - a[0]) * (c[1] - a[1]) - (c[0] - a[0]) * (b[1] - a[1]))
    return {n: float(np.sum(area * (s[k] - s[k + 1])[tri].mean(axis=0)))
            for k, n in enumerate(site.layer_names)}


@pytest.mark.parametrize("method", ["linear", "thin_plate"])
def test_surfaces_honour_picks_and_reference_interpolant(tmp_path, method):
    """At every borehole the surfaces equal the picks within 1 mm; at every plan node they
    equal scipy's interpolant of the same picks (1e-6 m)."""
    rows = irregular_rows()
    site = build_mesh(write_case(tmp_path, rows, method=method))
    xy_p, z_p = picks(rows)
    s = site.report.plan.surfaces
    nodes = site.report.plan.borehole_nodes
    for i in range(len(rows)):
        j = nodes[f"BH-{i + 1}"]
        for k in range(4):
            assert abs(s[k][j] - z_p[i, k]) <= 1e-3
    xy = site.report.plan.xy.T
    for k in range(4):
        if method == "linear":
            ref = LinearNDInterpolator(xy_p, z_p[:, k])(xy)
        else:
            c = xy_p.mean(axis=0)
            sc = np.ptp(xy_p, axis=0).max()
            ref = RBFInterpolator((xy_p - c) / sc, z_p[:, k], kernel="thin_plate_spline",
                                  degree=1)((xy - c) / sc)
        ok = ~np.isnan(ref)
        assert ok.mean() > 0.99  # data hull = boundary: (almost) every node is inside it
        np.testing.assert_allclose(s[k][ok], ref[ok], atol=1e-6)



def lens_block(name: str, *, top: str | None = None, bottom: str | None = None,
               picks: list[dict[str, str]] | None = None,
               polygon: tuple[tuple[float, float], ...] = ((40, 30), (80, 30), (80, 60),
                                                           (40, 60))) -> dict[str, object]:
    """One lens in the unit 'lower' (sand), by elevations or by picks."""
    levels = {"picks": picks} if picks is not None else {"top": top, "bottom": bottom}
    return {"name": name, "material": "sand", "host": "lower",
            "polygon": [[f"{x} m", f"{y} m"] for x, y in polygon], **levels}

def test_unit_volume_equals_integral_of_thickness(tmp_path):
    """Surfaces linear on each plan triangle: cell volumes per unit = Σ area × mean thickness
    (truncated prism, CRC tables), ≤ 1e-9 relative."""
    site = build_mesh(write_case(tmp_path, irregular_rows()))
    got, ref = unit_volumes(site), prism_volumes(site)
    for name in ("upper", "middle", "lower"):
        assert got[name] == pytest.approx(ref[name], rel=1e-9)
    assert site.cell_volumes().min() > 0


def test_planar_picks_give_the_analytic_volume(tmp_path):
    """Picks on planes: linear interpolation reproduces them, so each unit's volume is
    area × (plane difference at the polygon centroid) (Bourke 1988), ≤ 1e-9 relative."""
    planes = [(10.0, 0.01, -0.005), (4.0, -0.02, 0.01), (0.0, 0.005, 0.0), (-9.0, 0.0, 0.01)]
    rows = []
    for i, (x, y) in enumerate(BOREHOLE_XY):
        z = [c + gx * x + gy * y for c, gx, gy in planes]
        rows.append(f"BH-{i + 1},{x},{y}," + ",".join(f"{v!r}" for v in z))
    site = build_mesh(write_case(tmp_path, rows))
    v = PENTAGON
    a = 0.5 * sum(v[i][0] * v[(i + 1) % 5][1] - v[(i + 1) % 5][0] * v[i][1] for i in range(5))
    cx = sum((v[i][0] + v[(i + 1) % 5][0]) * (v[i][0] * v[(i + 1) % 5][1]
             - v[(i + 1) % 5][0] * v[i][1]) for i in range(5)) / (6 * a)
    cy = sum((v[i][1] + v[(i + 1) % 5][1]) * (v[i][0] * v[(i + 1) % 5][1]
             - v[(i + 1) % 5][0] * v[i][1]) for i in range(5)) / (6 * a)
    at = [c + gx * cx + gy * cy for c, gx, gy in planes]
    got = unit_volumes(site)
    for k, name in enumerate(("upper", "middle", "lower")):
        assert got[name] == pytest.approx(a * (at[k] - at[k + 1]), rel=1e-9)


def test_pinch_out_and_crossing_are_corrected_and_reported(tmp_path):
    """'middle' is absent at BH-2 and BH-7 (pinch-out); at BH-4 its base lies above the
    upper unit's base (crossing). No cell has volume ≤ 0 and the report names the rules, the
    unit and the crossing borehole; the absent unit has zero thickness at its boreholes
    (exact by construction)."""
    rows = irregular_rows()
    cols = [r.split(",") for r in rows]
    for i in (1, 6):
        cols[i][5] = ""  # middle absent
    cols[3][5] = f"{float(cols[3][4]) + 1.0:.4f}"  # middle base 1 m above upper base
    rows = [",".join(c) for c in cols]
    site = build_mesh(write_case(tmp_path, rows, tmin=0.3))
    assert site.cell_volumes().min() > 0
    rules = [r.as_dict() for r in site.report.surface_rules]
    kinds = {(r["unit"], r["rule"]) for r in rules}
    assert ("middle", "crossing") in kinds
    assert ("middle", "pinch_out") in kinds
    crossing = next(r for r in rules if r["unit"] == "middle" and r["rule"] == "crossing")
    assert "BH-4" in crossing["boreholes"]
    s, nodes = site.report.plan.surfaces, site.report.plan.borehole_nodes
    for bh in ("BH-2", "BH-4", "BH-7"):
        assert s[1][nodes[bh]] == s[2][nodes[bh]]
    thick = s[2] - s[3]
    assert np.all((thick == 0) | (thick >= 0.3 - 1e-12))  # the minimum-thickness rule
    assert ((s[1] - s[2] == 0) | (s[1] - s[2] >= 0.3 - 1e-12)).all()


def test_refinement_near_well_and_stream_line(tmp_path):
    """The size of every plan triangle (its mean edge length) within the fine zone of a well
    and along a refinement line is at most its target; far away edges reach at least half
    the background size (gmsh sizes are targets: the 0.5× bound is common practice, no
    source)."""
    well = {"name": "PW-1", "x": "60 m", "y": "50 m", "screens": [["4 m", "-4 m"]],
            "rate": "100 m^3/d"}
    line = {"name": "creek_bank", "points": [["120 m", "0 m"], ["150 m", "70 m"]],
            "cell_size": "3 m", "radius": "4 m"}
    site = build_mesh(write_case(tmp_path, irregular_rows(), wells=[well],
                                 refinement_lines=[line],
                                 mesh=Mesh(15.0, 2.0, fine_cell_size=2.0, fine_zone_radius=6.0)))
    xy, tri = site.report.plan.xy, site.report.plan.tri
    e = np.hstack([tri[[0, 1]], tri[[1, 2]], tri[[0, 2]]])
    length = np.linalg.norm(xy[:, e[0]] - xy[:, e[1]], axis=0)
    mid = 0.5 * (xy[:, e[0]] + xy[:, e[1]])
    size = length.reshape(3, -1).mean(axis=0)  # mean edge length of each triangle
    centre = xy[:, tri].mean(axis=1)
    near_well_tri = np.hypot(centre[0] - 60, centre[1] - 50) < 6
    assert near_well_tri.any() and size[near_well_tri].max() <= 2.0
    d = np.array([30.0, 70.0]) / math.hypot(30, 70)  # along the refinement line
    rel = mid - np.array([[120.0], [0.0]])
    along = d @ rel
    across = np.abs(-d[1] * rel[0] + d[0] * rel[1])
    near_line = (across < 4) & (along > 5) & (along < math.hypot(30, 70) - 5)
    rel_t = centre - np.array([[120.0], [0.0]])
    near_line_tri = (np.abs(-d[1] * rel_t[0] + d[0] * rel_t[1]) < 4) & (d @ rel_t > 5) & (
        d @ rel_t < math.hypot(30, 70) - 5)
    assert near_line.any() and near_line_tri.any()
    assert size[near_line_tri].max() <= 3.0
    far = (np.hypot(mid[0] - 60, mid[1] - 50) > 40) & (across > 40)
    assert length[far].max() >= 0.5 * 15.0
    # nodes along the screen: the well's plan node has nodes at the screen top and bottom
    j = site.report.plan.well_nodes["PW-1"]
    col = np.isclose(site.points[0], xy[0, j]) & np.isclose(site.points[1], xy[1, j])
    zc = site.points[2, col]
    assert np.isclose(zc, 4.0, atol=1e-9).any() and np.isclose(zc, -4.0, atol=1e-9).any()
    assert np.sum((zc <= 4.0 + 1e-9) & (zc >= -4.0 - 1e-9)) >= 3


def test_msh_skfem_vtu_round_trip_keeps_named_tags(tmp_path):
    """.msh → SiteMesh → scikit-fem → .vtu: node coordinates (1e-12 m), unit tags and every
    named face survive (exact by construction)."""
    lens = lens_block("clay_lens", top="-2 m", bottom="-5 m")
    site = build_mesh(write_case(tmp_path, irregular_rows(), lenses=[lens]))
    assert "clay_lens" in site.layer_names
    assert np.any(site.cell_layer == site.layer_names.index("clay_lens"))
    write_mesh(site, tmp_path)
    back = read_site_mesh(tmp_path / "mesh.msh")
    np.testing.assert_allclose(back.points, site.points, atol=1e-12)
    used = [site.layer_names[i] for i in np.unique(site.cell_layer)]
    assert [back.layer_names[i] for i in back.cell_layer] == \
        [site.layer_names[i] for i in site.cell_layer]
    assert set(back.layer_names) == set(used)
    assert set(back.faces) == set(EDGES) | {"top", "bottom"}
    sk = back.skfem_mesh()
    for name, tri in site.faces.items():
        assert len(sk.boundaries[name]) == tri.shape[1]
        np.testing.assert_array_equal(np.sort(np.sort(sk.facets[:, sk.boundaries[name]],
                                                      axis=0), axis=1),
                                      np.sort(np.sort(tri, axis=0), axis=1))
    out = tmp_path / "again"
    out.mkdir()
    write_mesh(back, out)
    v = meshio.read(out / "mesh.vtu")
    np.testing.assert_allclose(v.points.T, site.points, atol=1e-12)
    assert [back.layer_names[i] for i in v.cell_data["unit_id"][0]] == \
        [site.layer_names[i] for i in site.cell_layer]


def test_lens_volume_is_its_prism(tmp_path):
    """A lens inside its host everywhere: its cells fill polygon area × (top − bottom)
    (exact by construction: its outline is embedded and two host levels follow it)."""
    lens = lens_block("clay_lens", top="-2 m", bottom="-5 m")
    site = build_mesh(write_case(tmp_path, irregular_rows(), lenses=[lens]))
    assert unit_volumes(site)["clay_lens"] == pytest.approx(40 * 30 * 3.0, rel=1e-9)
    assert site.cell_volumes().min() > 0


def _error_line(folder: Path, rows: list[str], **kwargs: object) -> str:
    with pytest.raises(CaseErrors) as info:
        write_case(folder, rows, **kwargs)
    assert len(info.value.errors) == 1
    return info.value.errors[0].line()


def test_borehole_outside_boundary(tmp_path):
    rows = [*irregular_rows(), "BH-far,400,400,10,5,1,-8"]
    line = _error_line(tmp_path, rows)
    assert line.startswith("stratigraphy.boreholes[BH-far] = 'x = 400 m, y = 400 m'")
    assert "outside the model boundary" in line


def test_too_few_picks_names_the_unit(tmp_path):
    rows = ["BH-1,0,0,10,5,1,-8", "BH-2,120,0,10,5,1,-8"]
    with pytest.raises(CaseErrors) as info:
        write_case(tmp_path, rows)
    lines = [e.line() for e in info.value.errors]
    assert "layers[lower] = '2 picks': linear interpolation of its base needs at least 3 " \
           "boreholes or surface points" in lines


def test_collinear_picks_name_the_surface(tmp_path):
    rows = ["BH-1,0,0,10,5,1,-8", "BH-2,50,0,10,5,1,-8", "BH-3,100,0,10,5,1,-8"]
    with pytest.raises(MeshError, match="surface 'ground': linear interpolation needs at "
                                        "least 3 data points not on one line"):
        build_mesh(write_case(tmp_path, rows))


def test_self_intersecting_boundary(tmp_path):
    bowtie = [(0.0, 0.0), (100.0, 100.0), (100.0, 0.0), (0.0, 100.0)]
    line = _error_line(tmp_path, irregular_rows()[:1], vertices=bowtie, edges=EDGES[:4])
    assert line.startswith("boundary.vertices = '4 vertices': must form a simple polygon: "
                           "edges 0 and 2 touch or cross")


def test_screen_outside_model_names_the_well(tmp_path):
    """Ground rises 0.1 m/m eastwards: a screen top of 20 m is inside the site's elevation
    range but above the ground (about 11 m) at a well at x = 10 m."""
    rows = [f"BH-{i + 1},{x},{y},{10 + 0.1 * x},{4 + 0.1 * x},0,-8"
            for i, (x, y) in enumerate(BOREHOLE_XY)]
    well = {"name": "PW-high", "x": "10 m", "y": "30 m", "screens": [["20 m", "5 m"]],
            "rate": "50 m^3/d"}
    with pytest.raises(MeshError, match=r"^wells\[PW-high\]\.screens = \[20, 5\] m lies "
                                        r"outside the model at the well \(ground 11\.000 m"):
        build_mesh(write_case(tmp_path, rows, wells=[well]))


def test_box_case_faces_unchanged():
    """A box is a 4-edge polygon with faces west/south/east/north (+ top, bottom)."""
    root = Path(__file__).parents[2]
    site = build_mesh(load_case(root / "cases" / "tiny" / "case.toml"))
    assert set(site.faces) == {"west", "east", "south", "north", "top", "bottom"}


def test_lens_sticking_out_of_its_host_is_reported(tmp_path, caplog):
    """A lens whose top (3 m) lies above its host unit's top (the base of 'middle', at most
    2.5 m here) is clipped to the host and the clipping is reported by lens name: in the mesh
    info, in mesh.json and as a logged warning (behaviour requirement, no source); the clipped
    lens still fills its outline between the host top and its bottom (truncated prisms, as
    in M1) and a lens inside its host is not reported."""
    lenses = [lens_block("peat_lens", top="3 m", bottom="-5 m"), lens_block(
        "inner_lens", top="-3 m", bottom="-5 m", polygon=((90, 20), (110, 20), (110, 35),
                                                          (90, 35)))]
    case = write_case(tmp_path, irregular_rows(), lenses=lenses)
    with caplog.at_level("WARNING", logger="fe3d.mesh.build"):
        site = build_mesh(case)
    notes = [n.as_dict() for n in site.report.lens_fits]
    assert [(n["lens"], n["side"]) for n in notes] == [("peat_lens", "top")]
    assert notes[0]["n_clipped"] == notes[0]["n_lens_nodes"] > 0
    assert notes[0]["line"].startswith("lens 'peat_lens' top (3 m): lies outside its host "
                                       "unit 'lower'")
    assert any("peat_lens" in r.getMessage() and r.levelname == "WARNING"
               for r in caplog.records)
    assert not any("inner_lens" in r.getMessage() for r in caplog.records)
    save_cached(site, tmp_path / "m", mesh_inputs_hash(case))
    meta = json.loads((tmp_path / "m" / "mesh.json").read_text())
    assert meta["lens_fit"][0]["lens"] == "peat_lens"
    # clipped lens = host top (the 'middle' base surface) down to -5 m inside the outline
    assert site.cell_volumes().min() > 0
    assert unit_volumes(site)["inner_lens"] == pytest.approx(20 * 15 * 2.0, rel=1e-9)


def lens_from_picks(borehole: str) -> dict[str, object]:
    return lens_block("clay_lens", picks=[{"borehole": borehole, "top": "-2.2 m",
                                           "bottom": "-5.1 m"}])


def test_lens_given_by_borehole_picks(tmp_path):
    """A lens whose top and bottom come from the borehole crossing it (flat lens: the mean
    of the picks): its cells fill polygon area × (top − bottom), exact by construction."""
    case = write_case(tmp_path, irregular_rows(), lenses=[lens_from_picks("BH-6")])
    lens = case.lenses[0]
    assert (lens.top, lens.bottom, lens.pick_spread) == (-2.2, -5.1, 0.0)
    site = build_mesh(case)
    assert unit_volumes(site)["clay_lens"] == pytest.approx(40 * 30 * 2.9, rel=1e-9)


def test_lens_picks_must_come_from_boreholes_inside_it(tmp_path):
    line = _error_line(tmp_path, irregular_rows(), lenses=[lens_from_picks("BH-7")])
    assert line.startswith("lenses[clay_lens].picks = 'BH-7'")
    assert "inside the lens polygon" in line
    line = _error_line(tmp_path, irregular_rows(), lenses=[lens_from_picks("BH-99")])
    assert line.startswith("lenses[clay_lens].picks = 'BH-99'")
    both = {**lens_from_picks("BH-6"), "top": "-2 m"}
    line = _error_line(tmp_path, irregular_rows(), lenses=[both])
    assert "not both" in line
