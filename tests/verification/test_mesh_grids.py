"""Layer surfaces given on regular grids (grid CSV files), interpolated bilinearly.

Sources of the expected values:
- Reference interpolant: scipy ``RegularGridInterpolator(method="linear")``, which is
  bilinear on a 2D grid (general-purpose reference library), evaluated independently.
- Bilinear interpolation reproduces a plane exactly, so a unit between two planar grids has
  volume = plan area × (plane difference at the plan centroid) (Bourke 1988, "Calculating the
  area and centroid of a polygon"; the mean of a plane over a polygon is its value at the
  centroid), ≤ 1e-9 relative.
- Grid nodes are honoured: the surface equals the file's value at every grid node (1 mm,
  the issue's tolerance for picks).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from scipy.interpolate import RegularGridInterpolator

from fe3d.case.builder import Layer, Material, box_case
from fe3d.case.schema import Case
from fe3d.errors import CaseErrors
from fe3d.mesh.build import build_mesh
from fe3d.mesh.stratigraphy import grid_surface, unit_surfaces

pytestmark = pytest.mark.verification

# invented site "Hollin Brook yard": a 100 m × 60 m box
SAND = Material(porosity=0.3, name="sand")

GX = np.array([-5.0, 20.0, 55.0, 80.0, 105.0])  # uneven spacing, beyond the box
GY = np.array([-2.0, 25.0, 62.0])


def grid_text(x: np.ndarray, y: np.ndarray, z: np.ndarray, *, flip_y: bool = False) -> str:
    """A grid CSV: header 'y \\ x' then x; rows y then z (written north row first if
    flip_y)."""
    rows = [f"y \\ x,{','.join(repr(float(v)) for v in x)}"]
    order = range(len(y) - 1, -1, -1) if flip_y else range(len(y))
    rows += [f"{float(y[j])!r}," + ",".join(repr(float(v)) for v in z[j]) for j in order]
    return "# invented elevations, metres\n" + "\n".join(rows) + "\n"


def write_grids(folder: Path, ground: np.ndarray, upper: np.ndarray, *, x: np.ndarray = GX,
                y: np.ndarray = GY) -> None:
    (folder / "ground.csv").write_text(grid_text(x, y, ground, flip_y=True), encoding="utf-8")
    (folder / "upper_base.csv").write_text(grid_text(x, y, upper), encoding="utf-8")


def grid_case(folder: Path, *, cell: float = 9.0, **grid_files: str) -> Case:
    """The box with the ground and the upper unit's base from the grid files in ``folder``
    (and any further ``grid_files``)."""
    grids = {"ground": "ground.csv", "upper": "upper_base.csv", **grid_files}
    return box_case(title="grid surfaces check", length=100.0, width=60.0, top=12.0,
                    cell=cell, dz=3.0, heads={"west": 9.0},
                    layers=[Layer("upper", None, SAND), Layer("lower", -8.0, SAND)],
                    sections={"stratigraphy": {"grid_files": grids}}, base_dir=folder)


def random_grids(seed: int = 3) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    ground = 10.0 + rng.uniform(-1.5, 1.5, (GY.size, GX.size))
    upper = 3.0 + rng.uniform(-2.0, 2.0, (GY.size, GX.size))
    return ground, upper


def test_bilinear_matches_scipy_and_honours_nodes():
    """grid_surface = scipy RegularGridInterpolator (linear) at 2000 random points (1e-9 m)
    and = the grid value at every node (1 mm; exact here)."""
    ground, _ = random_grids()
    rng = np.random.default_rng(7)
    pts = np.vstack([rng.uniform(GX[0], GX[-1], 2000), rng.uniform(GY[0], GY[-1], 2000)])
    ref = RegularGridInterpolator((GY, GX), ground, method="linear")(pts[::-1].T)
    np.testing.assert_allclose(grid_surface(GX, GY, ground, pts), ref, atol=1e-9, rtol=0)
    gx, gy = np.meshgrid(GX, GY)
    at_nodes = grid_surface(GX, GY, ground, np.vstack([gx.ravel(), gy.ravel()]))
    assert np.abs(at_nodes - ground.ravel()).max() <= 1e-3


def test_mesh_surfaces_follow_the_grid_files(tmp_path):
    """Through the case files and the mesher: at every plan node the ground and the upper
    unit's base equal scipy's bilinear interpolant of the files (1e-9 m); at the grid nodes
    inside the box the case's surfaces equal the file values (1 mm)."""
    ground, upper = random_grids()
    write_grids(tmp_path, ground, upper)
    case = grid_case(tmp_path)
    site = build_mesh(case)
    xy, s = site.report.plan.xy, site.report.plan.surfaces
    for k, z in ((0, ground), (1, upper)):
        ref = RegularGridInterpolator((GY, GX), z, method="linear")(xy[::-1].T)
        np.testing.assert_allclose(s[k], ref, atol=1e-9, rtol=0)
    gx, gy = np.meshgrid(GX, GY)
    inside = (gx >= 0) & (gx <= 100) & (gy >= 0) & (gy <= 60)
    nodes = np.vstack([gx[inside], gy[inside]])
    surf, _ = unit_surfaces(case, nodes, np.ones(nodes.shape[1]))
    assert np.abs(surf[0] - ground[inside]).max() <= 1e-3
    assert np.abs(surf[1] - upper[inside]).max() <= 1e-3
    assert site.cell_volumes().min() > 0


def test_planar_grids_give_the_analytic_volume(tmp_path):
    """Grids sampled from planes: unit volume = area × plane difference at the centroid
    (50, 30) (Bourke 1988), ≤ 1e-9 relative."""
    gx, gy = np.meshgrid(GX, GY)
    ground = 10.0 + 0.01 * gx - 0.02 * gy
    upper = 2.0 + 0.005 * gx + 0.01 * gy
    write_grids(tmp_path, ground, upper)
    site = build_mesh(grid_case(tmp_path, cell=12.0))
    vol = site.cell_volumes()
    got = {n: float(vol[site.cell_layer == i].sum()) for i, n in enumerate(site.layer_names)}
    g_c, u_c = 10.0 + 0.5 - 0.6, 2.0 + 0.25 + 0.3
    assert got["upper"] == pytest.approx(6000.0 * (g_c - u_c), rel=1e-9)
    assert got["lower"] == pytest.approx(6000.0 * (u_c + 8.0), rel=1e-9)


def one_error(folder: Path, **grid_files: str) -> str:
    with pytest.raises(CaseErrors) as info:
        grid_case(folder, **grid_files)
    assert len(info.value.errors) == 1, [e.line() for e in info.value.errors]
    return info.value.errors[0].line()


def test_grid_not_covering_the_boundary(tmp_path):
    ground, upper = random_grids()
    write_grids(tmp_path, ground, upper)
    x = GX.copy()
    x[-1] = 90.0  # the upper unit's grid stops 10 m short of the east edge
    (tmp_path / "upper_base.csv").write_text(grid_text(x, GY, upper), encoding="utf-8")
    line = one_error(tmp_path)
    assert line.startswith("stratigraphy.grid_files.upper = 'x -5–90 m, y -2–62 m': the grid "
                           "must cover the model boundary (vertex x = 100 m")


def test_bad_grid_files(tmp_path):
    ground, upper = random_grids()
    write_grids(tmp_path, ground, upper)
    good = (tmp_path / "upper_base.csv").read_text(encoding="utf-8")
    lines = good.splitlines()
    cases = {
        "short row": ([*lines[:3], lines[3].rsplit(",", 1)[0], *lines[4:]],
                      "stratigraphy.grid_files.upper[line 4] = '5 columns': must have a y "
                      "coordinate and one elevation per x (6 columns"),
        "not a number": ([*lines[:2], lines[2].replace(lines[2].split(",")[2], "deep"),
                          *lines[3:]],
                         "stratigraphy.grid_files.upper[line 3] = 'deep': must be a number in "
                         "metres"),
        "x not monotonic": ([lines[0], "y \\ x,-5,20,10,80,105", *lines[2:]],
                            "the x coordinates must be strictly increasing or strictly "
                            "decreasing"),
    }
    for what, (text, expected) in cases.items():
        (tmp_path / "upper_base.csv").write_text("\n".join(text) + "\n", encoding="utf-8")
        line = one_error(tmp_path)
        assert expected in line, (what, line)
        assert line.startswith("stratigraphy.grid_files.upper"), (what, line)


def test_grid_for_a_unit_with_a_bottom_or_no_unit(tmp_path):
    ground, upper = random_grids()
    write_grids(tmp_path, ground, upper)
    assert one_error(tmp_path, lower="upper_base.csv").startswith(
        "stratigraphy.grid_files.lower = 'lower': layers[lower] has a bottom")
    assert one_error(tmp_path, gravel="upper_base.csv").startswith(
        "stratigraphy.grid_files.gravel = 'gravel': must be 'ground' or a unit")
