"""Plume measures (fe3d/post/plume.py): the measuring frame of a face source, distances in it,
and the sorbed mass with a nonlinear isotherm."""

from __future__ import annotations

import numpy as np
import pytest
from skfem import MeshTet

from fe3d.case.builder import Layer, Material, Source, Species, Time, box_case
from fe3d.case.parts import FlowInputs
from fe3d.flow.solve import solve_flow
from fe3d.mesh.build import build_mesh
from fe3d.p1 import volumes
from fe3d.post.plume import MeasuringFrame, SorbedPhase, measure_plume, measuring_frames

EPS = np.finfo(float).eps


def _bar() -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    m = MeshTet.init_tensor(np.linspace(0, 4, 9), np.linspace(-1, 1, 5), np.linspace(-1, 0, 3))
    return m.p, m.t, volumes(m.p, m.t)


def test_face_source_is_measured_from_its_patch_along_the_mean_flow():
    """Flow from west to east in a box with a source on a patch of the west face (y 4–8 m,
    z −3–0 m): the origin is the patch centre in plan (0, 6) m, the direction +x; in that
    frame a field c = 1 − x/40 above 0.5 reaches 20 m downstream (exact for P1): extent =
    downstream = 20 m, upstream 0, across −6…+14 m (the box is 0–20 m wide), elevations the
    box's −5…0 m."""
    case = box_case(length=60.0, width=20.0, cell=5.0, dz=2.5,
                    heads={"west": 1.0, "east": 0.0}, time=Time(1.0, 1.0),
                    layers=[Layer("sand", -5.0, Material(10.0))],
                    species=[Species("x", limit=0.5)],
                    sources=[Source("patch", species="x", shape="face_patch", face="west",
                                    concentration=1.0, y=(4.0, 8.0), z=(-3.0, 0.0))])
    site = build_mesh(case)
    flow = solve_flow(site, FlowInputs.of(case))
    frame = measuring_frames(case, site, flow)["x"]
    assert frame.face == "west"
    assert frame.origin[0] == pytest.approx(0.0, abs=1e-12)
    assert frame.origin[1] == pytest.approx(6.0, abs=1.0)  # mean of the patch's nodes
    assert frame.along == pytest.approx((1.0, 0.0), abs=1e-9)
    n = site.n_cells
    none = SorbedPhase(np.zeros(1), np.zeros(n, dtype=int), (("linear", {"kd": 0.0}),))
    conc = 1.0 - site.points[0] / 40.0
    m = measure_plume(site.points, site.cells, site.cell_volumes(), np.full(n, 0.3), none,
                      conc, 0.5, frame)
    tol = 1e-9  # positions from coordinates of ~10 m: round-off far below
    assert m.extent == pytest.approx(20.0, abs=tol)
    assert m.downstream == pytest.approx(20.0, abs=tol)
    assert m.upstream == pytest.approx(0.0, abs=tol)
    assert m.across == pytest.approx((-frame.origin[1], 20.0 - frame.origin[1]), abs=tol)
    assert m.elevation == pytest.approx((-5.0, 0.0), abs=tol)
    assert m.volume == pytest.approx(20.0 * 20.0 * 5.0, rel=1e3 * EPS)
    assert m.centroid == pytest.approx((10.0, 10.0, -2.5), abs=tol)


def test_point_frame_distances_across_and_against_the_flow():
    """Origin (2, 0), flow along +y, c = x/4 above 0.5 (x > 2 on the 4 × 2 × 1 m bar):
    across the flow (positive to the left of +y, i.e. towards −x) the region spans −2…0 m;
    along it y runs from −1 to 1: downstream 1, upstream 1; extent hypot(2, 1) (exact)."""
    p, t, v = _bar()
    n = t.shape[1]
    none = SorbedPhase(np.zeros(1), np.zeros(n, dtype=int), (("linear", {"kd": 0.0}),))
    m = measure_plume(p, t, v, np.ones(n), none, p[0] / 4.0, 0.5,
                      MeasuringFrame((2.0, 0.0), (0.0, 1.0)))
    assert m.across == pytest.approx((-2.0, 0.0), abs=1e-12)
    assert (m.downstream, m.upstream) == pytest.approx((1.0, 1.0), abs=1e-12)
    assert m.extent == pytest.approx(np.hypot(2.0, 1.0), abs=1e-12)


def test_sorbed_mass_with_a_nonlinear_isotherm_uses_the_isotherm():
    """Freundlich with N = 2 (s = K_F c², quadratic, so the 4-point degree-2 rule is exact)
    over the whole bar: ρ_b K_F Σ_e V_e/20 (Σ c_i² + (Σ c_i)²), the closed form of ∫c² over
    a tetrahedron (Zienkiewicz & Taylor); with N = 1 the linear and quadrature paths agree.
    Round-off 1e3 ε relative."""
    p, t, v = _bar()
    n = t.shape[1]
    conc = 0.5 + p[0] / 4.0 + 0.1 * p[1]
    rho, kf = 1600.0, 2e-4
    squared = SorbedPhase(np.full(1, rho), np.zeros(n, dtype=int),
                          (("freundlich", {"k_f": kf, "n": 2.0}),))
    frame = MeasuringFrame((0.0, 0.0), (1.0, 0.0))
    m = measure_plume(p, t, v, np.ones(n), squared, conc, 0.0, frame)
    ct = conc[t]
    exact = rho * kf * float((np.abs(v) / 20 * ((ct ** 2).sum(0) + ct.sum(0) ** 2)).sum())
    assert m.sorbed_mass == pytest.approx(exact, rel=1e3 * EPS)
    linear = SorbedPhase(np.full(1, rho), np.zeros(n, dtype=int), (("linear", {"kd": kf}),))
    power_one = SorbedPhase(np.full(1, rho), np.zeros(n, dtype=int),
                            (("freundlich", {"k_f": kf, "n": 1.0}),))
    assert measure_plume(p, t, v, np.ones(n), power_one, conc, 0.6, frame).sorbed_mass == \
        pytest.approx(measure_plume(p, t, v, np.ones(n), linear, conc, 0.6, frame).sorbed_mass,
                      rel=1e3 * EPS)


def test_isosurface_from_the_cut_cells_is_vtks_contour_of_the_whole_mesh(tmp_path):
    """Handing VTK only the cells the level reaches gives the same surface as its contour
    filter on the whole mesh (reference library): the same points, triangles and area, to
    1e3 ε relative (the same triangles, summed in another order)."""
    import pyvista as pv

    from fe3d.post.plume import write_isosurface

    p, t, _ = _bar()
    conc = np.random.default_rng(0).uniform(0.0, 1.0, p.shape[1])
    grid = pv.UnstructuredGrid({pv.CellType.TETRA: np.ascontiguousarray(t.T)},
                               np.ascontiguousarray(p.T))
    grid.point_data["c"] = conc
    full = grid.contour([0.4], scalars="c")
    mine = pv.read(write_isosurface(tmp_path / "s.vtp", p, t, conc, 0.4, name="c"))
    assert (mine.n_points, mine.n_cells) == (full.n_points, full.n_cells)
    assert mine.area == pytest.approx(full.area, rel=1e3 * EPS)
