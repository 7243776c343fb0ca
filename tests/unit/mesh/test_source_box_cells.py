"""Plan cells at a source box (theory.md M6): the box's shorter plan side divided by
``mesh.cells_across_source``, so that what the box loads or holds reaches at most one cell
beyond it and that cell is a fraction of the box.

References: the mesher's own rule (common practice, no source for the count of four) and
the size-field overshoot gmsh shows (up to about 20 %: fe3d.mesh.corridor.FINE_SIZE_MARGIN,
measured in fe3d.mesh.build). The load's spread is checked against the P1 hat's support:
exact geometry, no tolerance beyond that overshoot.
"""

from __future__ import annotations

import numpy as np

from fe3d.case.builder import Layer, Material, Source, Species, Time, box_case, with_changes
from fe3d.case.parts import TransportInputs
from fe3d.mesh.build import build_mesh
from fe3d.studies.refinement import refine_case
from fe3d.transport.sources import box_load_weights

OVERSHOOT = 1.25  # gmsh's edges exceed its size field by up to ~20 % (fe3d.mesh.build)
BOX = ((40.0, 52.0), (20.0, 30.0), (-4.0, -1.0))  # 12 m × 10 m × 3 m


def _case(**mesh: object) -> object:
    case = box_case(
        length=120.0, width=50.0, cell=15.0, dz=1.0, heads={"west": 1.0, "east": 0.0},
        layers=[Layer("sand", -6.0, Material(10.0, 1.0, porosity=0.3,
                                              longitudinal_dispersivity=2.0,
                                              transverse_dispersivity=0.2))],
        species=[Species("tracer")],
        sources=[Source("spill", kind="mass_loading", mass_rate=100.0, x=BOX[0], y=BOX[1],
                        z=BOX[2], stop=100.0)],
        time=Time(200.0, 20.0))
    return with_changes(case, mesh={"corridor": False, **mesh})


def _plan_edges_inside_box(case: object) -> np.ndarray:
    site = build_mesh(case)
    (x0, x1), (y0, y1), _ = BOX
    p = site.points
    centre = p[:, site.cells].mean(axis=1)
    inside = ((centre[0] > x0) & (centre[0] < x1) & (centre[1] > y0) & (centre[1] < y1))
    cells = site.cells[:, inside]
    lengths = [np.hypot(*(p[:2, cells[a]] - p[:2, cells[b]]))
               for a in range(4) for b in range(a + 1, 4)]
    return np.max(lengths, axis=0)


def test_cells_inside_a_source_box_are_a_quarter_of_its_shorter_side():
    """Default four cells across the 10 m side: every cell whose centre is inside the box
    has plan edges of at most 2.5 m × the overshoot; the background is 15 m."""
    edges = _plan_edges_inside_box(_case())
    assert edges.size > 0
    assert edges.max() <= 10.0 / 4.0 * OVERSHOOT, edges.max()


def test_more_cells_across_a_source_box_when_asked_and_on_refinement():
    """``cells_across_source = 8``: plan edges at most 1.25 m × the overshoot inside the box;
    a refinement study's level at ratio 1.5 asks 6 across (the count grows with the ratio,
    like every other size shrinks)."""
    edges = _plan_edges_inside_box(_case(cells_across_source=8))
    assert edges.max() <= 10.0 / 8.0 * OVERSHOOT, edges.max()
    assert refine_case(_case(), 1.5).mesh.cells_across_source == 6.0


def test_a_box_load_reaches_at_most_one_small_cell_beyond_the_box():
    """The Galerkin load weights of the box (∫_box φ_i dV) sit on nodes at most one cell
    edge outside the box in plan: with four cells across, within 2.5 m × the overshoot."""
    case = _case()
    site = build_mesh(case)
    inputs = TransportInputs.of(case)
    w = box_load_weights(site, inputs.sources[0])
    (x0, x1), (y0, y1), _ = BOX
    x, y = site.points[0, w > 0], site.points[1, w > 0]
    beyond = np.maximum.reduce([x0 - x, x - x1, y0 - y, y - y1, np.zeros_like(x)])
    assert beyond.max() <= 10.0 / 4.0 * OVERSHOOT, beyond.max()
    assert abs(w.sum() - 1.0) <= 1e-12


def _held_case(box: tuple[tuple[float, float], ...], **mesh: object) -> object:
    case = box_case(
        length=120.0, width=50.0, cell=15.0, dz=1.0, heads={"west": 1.0, "east": 0.0},
        layers=[Layer("sand", -6.0, Material(10.0, 1.0, porosity=0.3))],
        species=[Species("tracer")],
        sources=[Source("spill", concentration=5.0, x=box[0], y=box[1], z=box[2])],
        time=Time(200.0, 20.0))
    return with_changes(case, mesh={"corridor": False, **mesh})


def _held_volume(case: object) -> tuple[float, object]:
    """Volume [m³] of the cells whose four nodes the case's one source box holds, and the
    plan layout of the mesh."""
    from fe3d.flow.site_rules import source_nodes

    site = build_mesh(case)
    held = np.zeros(site.n_nodes, dtype=bool)
    held[source_nodes(site, TransportInputs.of(case).sources[0])] = True
    full = held[site.cells].all(axis=0)
    return float(site.cell_volumes()[full].sum()), site.report.plan


def test_a_held_box_is_the_size_it_is_on_every_mesh():
    """Issue 11, part 6 (theory.md M5): the box's plan sides are mesh edges and cell levels
    go through its top and base, so the cells whose four nodes are all held (the region at
    the held value) fill exactly the box: their volume equals length × width × height
    (exact geometry; 1e-9 relative, the mesher's plan tolerance) for 3, 4 and 5 cells
    across a box whose sides fall on no background cell. Before the sides were mesh
    edges that volume was 0.63, 0.73 and 0.78 of the box (measured)."""
    box = ((40.3, 51.9), (20.7, 29.4), (-4.3, -1.6))
    volume = np.prod([hi - lo for lo, hi in box])
    for across in (3.0, 4.0, 5.0):
        got, _ = _held_volume(_held_case(box, cells_across_source=across))
        assert abs(got - volume) <= 1e-9 * volume, (across, got / volume)


def test_points_on_a_box_side_and_a_box_crossing_a_lens(caplog):
    """An observation point on a box's side splits that side: it is a node and the box is
    still held whole (its volume, exact geometry, 1e-9 relative); a box whose outline
    crosses a lens outline is left to its fine cells (M6) with one warning line naming the
    source, and the mesh is still built."""
    box = ((40.3, 51.9), (20.7, 29.4), (-4.3, -1.6))
    volume = np.prod([hi - lo for lo, hi in box])
    case = _held_case(box)
    on_side = with_changes(case, observation_points=[
        {"name": "edge_well", "x": "46 m", "y": "20.7 m", "z": "-2 m"}])
    with caplog.at_level("WARNING", logger="fe3d.mesh.build"):
        got, plan = _held_volume(on_side)
    assert not caplog.records
    assert np.any(np.hypot(plan.xy[0] - 46.0, plan.xy[1] - 20.7) < 1e-9)
    assert abs(got - volume) <= 1e-9 * volume, got / volume
    crossing = with_changes(case, lenses=[{
        "name": "clay", "material": "sand", "host": "sand", "top": "-2 m", "bottom": "-3 m",
        "polygon": [["45 m", "25 m"], ["70 m", "25 m"], ["70 m", "40 m"], ["45 m", "40 m"]]}])
    with caplog.at_level("WARNING", logger="fe3d.mesh.build"):
        got, _ = _held_volume(crossing)
    assert got > 0.0
    assert [r.getMessage().split(":")[0] for r in caplog.records] == ["source spill"]
