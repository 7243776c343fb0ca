"""Geometry behind the plan maps and sections, checked against exact references, and the
figures drawn from it.

References:
- P1 interpolation reproduces linear functions exactly (Ciarlet 1978, "The Finite Element
  Method for Elliptic Problems", §2.2): the largest value over depth, and the cuts of a
  linear field, equal the field itself to round-off (tolerance 1e-12 relative: a few
  operations on values of order 1).
- Capture zone of one well in a uniform flow (Javandel and Tsang 1986, "Capture-zone type
  curves: a tool for aquifer cleanup", Ground Water 24(5)): stream function
  ψ = q·y − Q/(2πb)·θ, stagnation point Q/(2πbq) downstream of the well, width Q/(bq) far
  upstream. The area swept between backward pathlines started at n angles must reach the
  stagnation point and, at a given distance upstream, be as wide as the two outermost
  streamlines of that stream function (tolerance: two raster steps).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from PIL import Image
from scipy.optimize import brentq

from fe3d.post.maps import (
    horizontal_section,
    plan_layout,
    plan_maximum,
    section_through,
    swept_area,
    vertical_section,
)

REL = 1e-12


def _box_mesh(nx: int, ny: int, nz: int, size=(100.0, 50.0, 10.0)):
    """A box of nx × ny × nz bricks, each split into 6 tetrahedra along its diagonal
    (Kuhn's split), so the nodes stand in vertical columns joined by vertical edges."""
    gx, gy, gz = (np.linspace(0.0, s, n + 1) for s, n in zip(size, (nx, ny, nz), strict=True))
    x, y, z = np.meshgrid(gx, gy, gz, indexing="ij")
    points = np.vstack([x.ravel(), y.ravel(), z.ravel()])

    def node(i, j, k):
        return (i * (ny + 1) + j) * (nz + 1) + k

    kuhn = [(0, 1, 3, 7), (0, 1, 5, 7), (0, 2, 3, 7), (0, 2, 6, 7), (0, 4, 5, 7), (0, 4, 6, 7)]
    i, j, k = (a.ravel() for a in np.meshgrid(np.arange(nx), np.arange(ny), np.arange(nz),
                                              indexing="ij"))
    corner = [node(i + (c >> 2 & 1), j + (c >> 1 & 1), k + (c & 1)) for c in range(8)]
    cells = np.hstack([np.vstack([corner[a] for a in t]) for t in kuhn])
    outline = np.array([[0.0, size[0], size[0], 0.0], [0.0, 0.0, size[1], size[1]]])
    return points, cells, outline


def _linear(p):
    return 0.3 + 0.01 * p[0] - 0.02 * p[1] + 0.05 * p[2]


@pytest.fixture(scope="module")
def box():
    return _box_mesh(10, 5, 4)


def test_plan_maximum_of_a_linear_field_is_its_value_at_the_top(box):
    points, _, outline = box
    plan = plan_maximum(points, _linear(points), outline)
    assert plan.x.size == 11 * 6  # one value per column
    expected = _linear(np.vstack([plan.x, plan.y, np.full(plan.x.size, 10.0)]))
    np.testing.assert_allclose(plan.values, expected, rtol=REL)
    # the plan triangles cover the site: their areas add up to the outline's
    x, y, t = plan.x, plan.y, plan.triangles
    area = 0.5 * np.abs((x[t[1]] - x[t[0]]) * (y[t[2]] - y[t[0]])
                        - (x[t[2]] - x[t[0]]) * (y[t[1]] - y[t[0]])).sum()
    assert area == pytest.approx(100.0 * 50.0, rel=REL)
    # the run makes the columns and triangles once, beside the transport: the same map
    again = plan_maximum(points, _linear(points), outline, layout=plan_layout(points, outline))
    for a, b in ((again.x, plan.x), (again.y, plan.y), (again.values, plan.values),
                 (again.triangles, plan.triangles)):
        assert np.array_equal(a, b)


def test_sections_of_a_linear_field_are_the_field(box):
    points, cells, outline = box
    c = _linear(points)
    start, end = section_through((20.0, 20.0), np.array([3.0, 1.0]) / math.sqrt(10.0),
                                 outline)
    # the line y = 20 + (x − 20)/3 leaves the box at x = 0 (y ≈ 13.3) and x = 100
    np.testing.assert_allclose(start, [0.0, 20.0 - 20.0 / 3.0], rtol=REL, atol=REL * 100.0)
    np.testing.assert_allclose(end, [100.0, 20.0 + 80.0 / 3.0], rtol=REL, atol=REL * 100.0)
    sec = vertical_section(points, cells, c, start, end)
    d = (end - start) / np.hypot(*(end - start))
    xyz = np.vstack([start[0] + sec.s * d[0], start[1] + sec.s * d[1], sec.z])
    np.testing.assert_allclose(sec.values, _linear(xyz), rtol=REL)
    assert sec.s.min() >= -1e-9 and sec.s.max() <= np.hypot(*(end - start)) + 1e-9
    flat = horizontal_section(points, cells, c, 3.7)
    np.testing.assert_allclose(flat.values, _linear(np.vstack(
        [flat.x, flat.y, np.full(flat.x.size, 3.7)])), rtol=REL)


def test_cuts_from_the_crossed_cells_are_vtks_cuts_of_the_whole_mesh(box):
    """The sections and the head plane hand VTK only the cells the plane crosses
    (fe3d.post.cut_grid): the same cut as VTK's slice of the whole mesh (reference library),
    same number of triangles and the same area to 1e3 ε relative (the same triangles summed
    in another order). A plane missing the mesh is one clear error."""
    import pyvista as pv

    points, cells, _ = box
    grid = pv.UnstructuredGrid({pv.CellType.TETRA: np.ascontiguousarray(cells.T)},
                               np.ascontiguousarray(points.T))
    eps = 1e3 * np.finfo(float).eps
    start, end = np.array([0.0, 10.0]), np.array([100.0, 40.0])
    d = (end - start) / np.hypot(*(end - start))
    full = grid.slice(normal=(-d[1], d[0], 0.0), origin=(0.0, 10.0, 0.0),
                      generate_triangles=True)
    sec = vertical_section(points, cells, _linear(points), start, end)
    assert sec.triangles.shape[1] == full.n_cells
    t, s, z = sec.triangles, sec.s, sec.z
    area = 0.5 * np.abs((s[t[1]] - s[t[0]]) * (z[t[2]] - z[t[0]])
                        - (s[t[2]] - s[t[0]]) * (z[t[1]] - z[t[0]])).sum()
    assert area == pytest.approx(full.area, rel=eps)
    flat = horizontal_section(points, cells, _linear(points), 3.7)
    full = grid.slice(normal=(0.0, 0.0, 1.0), origin=(0.0, 0.0, 3.7), generate_triangles=True)
    assert flat.triangles.shape[1] == full.n_cells
    with pytest.raises(ValueError, match="misses the mesh"):
        horizontal_section(points, cells, _linear(points), 25.0)


def _backward_lines(n: int, *, q: float, rate_per_thickness: float, step: float,
                    x_far: float) -> list[np.ndarray]:
    """Backward pathlines of the flow q·x̂ plus a sink at the origin (Javandel and Tsang
    1986), from n points at radius 0.5 m equally spaced in angle (the first downstream),
    traced by RK4 in arc length until they pass x_far upstream or stall at the stagnation
    point."""
    def back(p):
        r2 = p[0] ** 2 + p[1] ** 2
        v = np.array([q, 0.0]) - rate_per_thickness / (2.0 * math.pi * r2) * p
        speed = math.hypot(*v)
        return -v / speed if speed > 1e-9 else np.zeros(2)

    lines = []
    for k in range(n):
        a = 2.0 * math.pi * k / n
        p = 0.5 * np.array([math.cos(a), math.sin(a)])
        pts = [p]
        for _ in range(int(4 * abs(x_far) / step)):
            k1 = back(p)
            k2 = back(p + 0.5 * step * k1)
            k3 = back(p + 0.5 * step * k2)
            k4 = back(p + step * k3)
            nxt = p + step / 6.0 * (k1 + 2 * k2 + 2 * k3 + k4)
            if np.allclose(nxt, p, atol=1e-6 * step) or nxt[0] < x_far:
                break
            p = nxt
            pts.append(p)
        lines.append(np.array(pts).T)
    return lines


@pytest.mark.parametrize("n", [8, 16])
def test_swept_area_matches_the_uniform_flow_capture_zone(n):
    q, rate = 1.0, 2.0 * math.pi * 10.0  # Darcy flux [m/d]; Q/b [m²/d]: stagnation at 10 m
    stagnation = rate / (2.0 * math.pi * q)
    step = 0.5  # raster and tracing step [m]
    lines = _backward_lines(n, q=q, rate_per_thickness=rate, step=step, x_far=-120.0)
    gx = np.arange(-100.0, 20.0 + step, step)
    gy = np.arange(-40.0, 40.0 + step, step)
    inside = swept_area(lines, (0.0, 0.0), gx, gy)
    # downstream: the area reaches the stagnation point on the axis
    on_axis = gx[inside[np.argmin(np.abs(gy)), :]]
    assert on_axis.max() == pytest.approx(stagnation, abs=2 * step)
    # upstream at x = −80 m: between the streamlines of the outermost starts (angle 2π/n)
    x = -80.0
    psi = -rate / (2.0 * math.pi) * (2.0 * math.pi / n) + q * 0.5 * math.sin(2 * math.pi / n)

    def residual(y):  # ψ(x, y) − ψ_start along the vertical x = −80 m, upper half
        return q * y - rate / (2.0 * math.pi) * math.atan2(y, x) - psi

    y_edge = brentq(residual, 1e-9, 60.0)
    column = inside[:, np.argmin(np.abs(gx - x))]
    width = column.sum() * step
    assert width == pytest.approx(2.0 * y_edge, abs=2 * step)
    # far upstream (θ → π) those streamlines stand (1 − 2/n)·Q/(bq) apart, short of the
    # full width Q/(bq) by 2/n of it (docs/outputs.md); the seed radius adds q·r·sin(2π/n)
    y_far = (rate / 2.0 + psi) / q
    assert width < rate / q
    seed_term = 2.0 * q * 0.5 * math.sin(2.0 * math.pi / n) / rate
    assert 2.0 * y_far / (rate / q) == pytest.approx(1.0 - 2.0 / n + seed_term, rel=REL)


def test_figures_write_readable_pngs(box, tmp_path):
    """The plan map, section, head map, plume sizes and 3D view of a small box are written
    (behaviour test; the pictures themselves were looked at on the demo)."""
    from fe3d.post.figures import plot_plume_over_time
    from fe3d.post.map_figures import plot_head_map, plot_plan_maximum, plot_section
    from fe3d.post.maps import PlanMark, PlanShape, SiteFeatures
    from fe3d.post.render3d import render_limit_surface

    points, cells, outline = box
    c = 1e-3 * np.exp(-((points[0] - 40) / 20) ** 2 - ((points[1] - 25) / 8) ** 2)
    features = SiteFeatures("Test box (invented)", PlanShape("site outline", outline, True),
                            (PlanShape("west", outline[:, [3, 0]], False),), (), (),
                            (PlanShape("leak", np.array([[35, 45, 45, 35], [20, 20, 30, 30.]]),
                                       True),),
                            (PlanMark("W-1", 80.0, 25.0, "extraction"),
                             PlanMark("MW-1", 60.0, 25.0, "monitoring")))
    plan = plan_maximum(points, c, outline)
    start, end = section_through((40.0, 25.0), np.array([1.0, 0.0]), outline)
    written = [
        plot_plan_maximum(tmp_path / "plan.png", plan, limit=5e-6, features=features,
                          conc_unit="mg/L", species="solvent", when="2 yr",
                          section=(start, end)),
        plot_section(tmp_path / "section.png",
                     vertical_section(points, cells, c, start, end), limit=5e-6,
                     conc_unit="mg/L", species="solvent", when="2 yr", site=features.site),
        plot_head_map(tmp_path / "heads.png",
                      horizontal_section(points, cells, 10.0 - 0.01 * points[0], 5.0),
                      features=features, elevation=5.0, head_unit="ft",
                      forward=[np.array([[40.0, 80.0], [25.0, 25.0]])],
                      backward={"W-1": [p + np.array([[80.0], [25.0]]) for p in
                                        _backward_lines(8, q=1.0, rate_per_thickness=30.0,
                                                        step=1.0, x_far=-80.0)]},
                      wells={"W-1": (80.0, 25.0)}, capture_time="30 yr"),
    ]
    t = np.array([0.0, 1.0, 2.0]) * 3.15576e7
    written.append(plot_plume_over_time(
        tmp_path / "plume.png", {"solvent": (t, np.array([0.0, 5.0, 9.0]),
                                             np.array([0.0, 1e-3, 2e-3]))},
        limits={"solvent": 5e-6}, time_unit="yr", conc_unit="mg/L", site=features.site))
    surface = render_limit_surface(tmp_path / "surface.png", points, cells, c, 5e-6,
                                   features=features, label="solvent at 2 yr")
    for path in [*written, *([surface] if surface is not None else [])]:
        with Image.open(path) as image:
            assert image.format == "PNG" and min(image.size) > 300


def test_labels_stay_apart_and_inside():
    """Six labels on one point: each placed label lies inside the axes and no two overlap
    (common practice for map labelling, no source)."""
    from fe3d.post.figures import place_labels, pyplot

    plt = pyplot()
    fig, ax = plt.subplots(figsize=(6, 4))
    ax.set_xlim(0, 10)
    ax.set_ylim(0, 10)
    texts = place_labels(ax, [(f"well-{i}", 5.0, 5.0) for i in range(6)])
    renderer = fig.canvas.get_renderer()
    boxes = [t.get_window_extent(renderer) for t in texts]
    frame = ax.get_window_extent(renderer)
    for i, b in enumerate(boxes):
        assert frame.x0 <= b.x0 and b.x1 <= frame.x1 and frame.y0 <= b.y0 and b.y1 <= frame.y1
        assert not any(b.overlaps(o) for o in boxes[:i])
    plt.close(fig)


def test_breakthrough_axis_shows_negative_values():
    """A limit far below the peak gives a symmetric log axis whose range includes the
    lowest (negative) value (common practice, no source)."""
    from fe3d.post.figures import _limit_line, pyplot

    plt = pyplot()
    fig, ax = plt.subplots()
    values = np.array([-2e-3, 0.0, 1e-4, 5.0])
    ax.plot(np.arange(4), values)
    _limit_line(ax, 5e-3, 5.0, "mg/L", lowest=float(values.min()))
    assert ax.get_yscale() == "symlog"
    assert ax.get_ylim()[0] <= values.min()
    plt.close(fig)


def test_no_3d_view_when_the_whole_model_is_above_the_limit(box, tmp_path, caplog):
    """Every node above the limit: no cell is cut, so there is no surface to draw; the view
    is left out with one log line naming the cause (it used to fail the whole run with an
    AttributeError after the transport)."""
    from fe3d.post.maps import PlanShape, SiteFeatures
    from fe3d.post.render3d import render_limit_surface

    points, cells, outline = box
    features = SiteFeatures("Test box (invented)", PlanShape("site outline", outline, True),
                            (), (), (), (), ())
    with caplog.at_level("WARNING"):
        got = render_limit_surface(tmp_path / "surface.png", points, cells,
                                   np.full(points.shape[1], 1e-3), 5e-6, features=features,
                                   label="solvent at 2 yr")
    assert got is None and not (tmp_path / "surface.png").exists()
    assert "whole model is above the limit" in caplog.text
