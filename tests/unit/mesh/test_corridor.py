"""The plume corridor's geometry (fe3d.mesh.corridor), without a mesh.

The rules checked are fe3d's own (docs/theory.md M1–M4): the plan cell size keeps the grid
Péclet number h/α_L at its target (the Péclet ≤ 2 rule for central schemes is common
practice; Zheng & Bennett 2002, *Applied contaminant transport modeling*, 2nd ed., ch. 7, from
memory), and the corridor widens with the transverse spread √(2 α_T s) of a point-source plume
(Bear 1972, *Dynamics of fluids in porous media*, §10.6, from memory). Tolerances: the record
rounds its numbers to four significant digits (a stable cache key), so equalities hold to a
relative 5e-4.
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest

from fe3d.case.schema import Case
from fe3d.mesh.corridor import (
    CELLS_PER_SPREAD,
    SPREAD,
    Corridor,
    CorridorPiece,
    PathSample,
    UnitColumn,
    corridor_gap,
    plan_corridor,
)

ROUNDING = 5e-4  # four significant digits


def straight_path(length: float = 400.0, *, speed: float = 1.0, alpha_l: float = 1.0,
                  alpha_t: float = 0.1, alpha_tv: float = 0.01, unit: np.ndarray | None = None,
                  half_width: float = 0.0, n: int = 401) -> PathSample:
    """A pathline along y = 50 m from x = 0 with a constant speed [m/s]."""
    x = np.linspace(0.0, length, n)
    pts = np.vstack([x, np.full(n, 50.0), np.full(n, -5.0)])
    ones = np.ones(n)
    return PathSample(points=pts, times=x / speed, alpha_l=alpha_l * ones,
                      alpha_t=alpha_t * ones, alpha_tv=alpha_tv * ones,
                      unit=np.zeros(n, dtype=np.int64) if unit is None else unit,
                      half_width=half_width)


BOX = np.array([[0.0, 500.0, 500.0, 0.0], [0.0, 0.0, 100.0, 100.0]])
UNITS = [UnitColumn("sand", thickness=10.0, cell_thickness=2.0)]


def corridor(paths: list[PathSample], **kw: object) -> Corridor:
    args: dict[str, object] = {"peclet": 2.0, "end_time": math.inf, "outline": BOX,
                               "background_size": 20.0, "plan_nodes": 200, "units": UNITS,
                               "max_nodes": 10**8}
    args.update(kw)
    c = plan_corridor(paths, **args)  # type: ignore[arg-type]
    assert c is not None
    return c


def test_corridor_width_grows_like_the_root_of_the_distance() -> None:
    c = corridor([straight_path(half_width=3.0)])
    for p in c.pieces:
        s = max(x for x, _ in p.points)  # a piece's radius is the one at its far end
        expected = max(3.0 + SPREAD * math.sqrt(2 * 0.1 * s), 2 * p.cell_size)
        assert p.radius == pytest.approx(expected, rel=ROUNDING)
    far = [p for p in c.pieces if max(x for x, _ in p.points) in (100.0, 400.0)]
    ratio = (far[1].radius - 3.0) / (far[0].radius - 3.0)
    assert ratio == pytest.approx(2.0, rel=ROUNDING)  # 4x the distance, 2x the spread


def test_corridor_cell_size_keeps_the_grid_peclet_number() -> None:
    unit = (np.linspace(0, 400, 401) >= 200).astype(np.int64)
    alpha_l = np.where(unit == 0, 1.0, 3.0)
    path = straight_path(unit=unit)
    path = PathSample(points=path.points, times=path.times, alpha_l=alpha_l,
                      alpha_t=path.alpha_t, alpha_tv=path.alpha_tv, unit=unit, half_width=0.0)
    units = [*UNITS, UnitColumn("gravel", thickness=5.0, cell_thickness=5.0)]
    c = corridor([path], peclet=2.0, units=units)
    for p in c.pieces:
        x_end = max(x for x, _ in p.points)
        assert p.cell_size == pytest.approx(2.0 if x_end <= 200.0 else 6.0, rel=ROUNDING)
    assert c.peclet_reached == 2.0
    assert c.note == ""


def test_corridor_ends_where_the_water_is_at_the_end_time() -> None:
    c = corridor([straight_path(speed=1.0)], end_time=100.0)
    spread = SPREAD * math.sqrt(2 * 1.0 * 100.0)  # σ_L ahead of the water at 100 m
    assert c.length == pytest.approx(100.0 + spread, rel=ROUNDING)


def test_corridor_layers_resolve_the_vertical_spread() -> None:
    c = corridor([straight_path(alpha_tv=0.01)])
    sigma_v = math.sqrt(2 * 0.01 * 200.0)  # at half the corridor length
    assert c.layer_thickness["sand"] == pytest.approx(sigma_v / CELLS_PER_SPREAD, rel=ROUNDING)


def test_corridor_layers_resolve_the_spread_at_the_nearest_receptor_inside_it() -> None:
    """M4: a receptor inside the corridor 50 m down the path sizes the layers by σ_V there,
    and the record gives the plume's spread there (σ = √(2αs), Bear 1972 as above); one off
    to the side (outside the corridor's half-width) is left out, and one within a cell of
    the source is reported but does not size the layers."""
    c = corridor([straight_path(alpha_tv=0.01)], receptors=[("MW", 50.0, 52.0)])  # 2 m off
    sigma_v = math.sqrt(2 * 0.01 * 50.0)
    assert c.layer_thickness["sand"] == pytest.approx(sigma_v / CELLS_PER_SPREAD, rel=ROUNDING)
    (spread,) = c.receptors
    assert (spread.name, spread.along, spread.cell_size) == ("MW", 50.0, 2.0)
    assert spread.sigma_t == pytest.approx(math.sqrt(2 * 0.1 * 50.0), rel=ROUNDING)
    assert spread.sigma_v == pytest.approx(sigma_v, rel=ROUNDING)
    assert not spread.thin  # σ_T 3.2 m against 2 m cells
    assert "plume corridor at MW: 50 m down the path" in "\n".join(c.lines())
    c = corridor([straight_path(alpha_tv=0.01)],
                 receptors=[("side", 50.0, 1.0), ("at source", 1.0, 50.0)])
    sigma_v = math.sqrt(2 * 0.01 * 200.0)  # at half the corridor length, as without them
    assert c.layer_thickness["sand"] == pytest.approx(sigma_v / CELLS_PER_SPREAD, rel=ROUNDING)
    assert [r.name for r in c.receptors] == ["at source"]
    assert c.receptors[0].thin  # σ_T 0.45 m at 1 m against 2 m cells
    assert Corridor.from_dict(c.as_dict()) == c


def test_corridor_keeps_finer_case_layers_and_fixed_sublayers() -> None:
    fine = [UnitColumn("sand", thickness=10.0, cell_thickness=0.5)]
    assert corridor([straight_path()], units=fine).layer_thickness == {}
    fixed = [UnitColumn("sand", thickness=10.0, cell_thickness=2.0, fixed=True)]
    assert corridor([straight_path()], units=fixed).layer_thickness == {}


def test_corridor_node_guard_coarsens_and_says_so() -> None:
    free = corridor([straight_path()])
    budget = free.expected_nodes // 3
    c = corridor([straight_path()], max_nodes=budget)
    assert c.expected_nodes <= budget
    assert c.peclet_reached > c.peclet_target
    assert "max_nodes" in c.note
    assert f"{c.peclet_reached:g}" in c.note
    assert min(p.cell_size for p in c.pieces) > min(p.cell_size for p in free.pieces)


def test_corridor_none_when_the_mesh_is_already_fine() -> None:
    got = plan_corridor([straight_path()], peclet=2.0, end_time=math.inf, outline=BOX,
                        background_size=1.0, plan_nodes=200, units=UNITS, max_nodes=10**8)
    assert got is None


def test_corridor_record_round_trip() -> None:
    c = corridor([straight_path(half_width=2.0)])
    assert Corridor.from_dict(c.as_dict()) == c
    assert len(c.lines()) == 2


def test_corridor_follows_the_fastest_species_of_a_source() -> None:
    """M3: the corridor ends where the fastest species a source makes can be, so it reads
    the smallest linear retardation R = 1 + ρ_b K_d/θ over the source's species and its
    decay chain (by hand: ρ_b = 1600 kg/m³, θ = 0.25, K_d = 0.25 L/kg → R = 2.6; the
    daughter's K_d = 0.0625 L/kg → R = 1.4); a nonlinear isotherm counts as R = 1."""
    from fe3d.case.builder import Layer, Material, Source, Species, Time, box_case, with_changes
    from fe3d.case.parts import Ground
    from fe3d.mesh.build import build_mesh
    from fe3d.mesh.corridor import _fastest_retardation
    from fe3d.mesh.materials import unit_materials

    sand = Material(10.0, 10.0, porosity=0.25, bulk_density=1600.0)
    case = box_case(length=40.0, width=20.0, cell=10.0, dz=2.0, heads={"west": 0.1, "east": 0.0},
                    layers=[Layer("sand", -4.0, sand)],
                    species=[Species("parent_sp", kd=0.25, half_life=100.0),
                             Species("daughter_sp", kd=0.0625, parent="parent_sp")],
                    sources=[Source("spill", species="parent_sp", concentration=1.0,
                                    x=(5.0, 15.0), y=(5.0, 15.0), z=(-3.0, -1.0))],
                    time=Time("10 d", "1 d"))
    site = build_mesh(case)
    mats, keys = unit_materials(Ground.of(case), site)
    r = _fastest_retardation(case, "spill", mats, keys)
    assert r == pytest.approx([1.0 + 1600.0 * 0.0625e-3 / 0.25], rel=1e-12)
    alone = with_changes(case, species={"daughter_sp": {"parent": None}})
    assert _fastest_retardation(alone, "spill", mats, keys) == pytest.approx(
        [1.0 + 1600.0 * 0.25e-3 / 0.25], rel=1e-12)
    curved = with_changes(alone, species={"parent_sp": {"sorption": "freundlich",
                                                        "freundlich_kf": "0.25 L/kg"}})
    assert _fastest_retardation(curved, "spill", mats, keys) == pytest.approx([1.0])


def _segment_distance(px: np.ndarray, py: np.ndarray, a: tuple[float, float],
                      b: tuple[float, float]) -> np.ndarray:
    """Distance from points to the segment a–b (elementary geometry: the foot of the
    perpendicular clamped to the segment's ends)."""
    (ax, ay), (bx, by) = a, b
    t = np.clip(((px - ax) * (bx - ax) + (py - ay) * (by - ay))
                / ((bx - ax) ** 2 + (by - ay) ** 2), 0.0, 1.0)
    return np.hypot(px - ax - t * (bx - ax), py - ay - t * (by - ay))


def test_corridor_gap_near_the_edge_is_the_exact_distance() -> None:
    """The outline drawn on the head figure is the zero level of ``corridor_gap`` on a
    raster. Measured only near the pieces (``within``), the gap must equal the distance to
    the union of discs swept along the pieces wherever it lies within ±``within`` (where
    the zero contour is traced) and keep its sign elsewhere. Reference: the distance to a
    segment, min over segments, minus the radius (elementary geometry). Tolerance: 1e-12 of
    the 500 m box, round-off of a few operations on coordinates of that size."""
    long_line = tuple((float(x), 50.0) for x in np.linspace(0.0, 400.0, 41))
    pieces = (CorridorPiece(long_line, radius=6.0, cell_size=2.0),
              CorridorPiece(((100.0, 20.0), (300.0, 80.0)), radius=3.0, cell_size=1.0))
    c = Corridor(pieces=pieces, layer_thickness={}, peclet_target=2.0, peclet_reached=2.0,
                 length=400.0, width_range=(6.0, 12.0), cell_size_range=(1.0, 2.0),
                 expected_nodes=0)
    rng = np.random.default_rng(0)
    px, py = rng.uniform(-20.0, 520.0, 20_000), rng.uniform(0.0, 100.0, 20_000)
    exact = np.minimum(
        np.min([_segment_distance(px, py, a, b) for a, b in itertools.pairwise(long_line)],
               axis=0)
        - 6.0, _segment_distance(px, py, (100.0, 20.0), (300.0, 80.0)) - 3.0)
    within = 1.5
    gap = corridor_gap(c, px, py, within=within)
    near = np.abs(exact) <= within
    assert near.sum() > 1000  # the test samples the edge
    assert np.abs(gap[near] - exact[near]).max() <= 1e-12 * 500.0
    assert np.all(gap[exact > within] > within)
    assert np.all(gap[exact < -within] < -within)
    assert np.abs(corridor_gap(c, px, py) - exact).max() <= 1e-12 * 500.0  # measured all


def _coarse_enough_case() -> Case:
    """A 40 m × 20 m sand box, 4 m cells, one source, longitudinal dispersivity 10 m: grid
    Péclet h/α_L = 0.4, below the target 2, so the first pass finds nothing to refine."""
    from fe3d.case.builder import Layer, Material, Source, Species, Time, box_case

    sand = Material(10.0, 10.0, longitudinal_dispersivity=10.0, transverse_dispersivity=1.0)
    return box_case(length=40.0, width=20.0, cell=4.0, dz=1.0, heads={"west": 0.1, "east": 0.0},
                    layers=[Layer("sand", -2.0, sand)], species=[Species("tracer")],
                    sources=[Source("spill", species="tracer", x=(4.0, 8.0), y=(8.0, 12.0),
                                    z=(-1.0, 0.0), concentration=1.0)],
                    time=Time("100 d", "10 d"))


def test_run_keeps_the_first_pass_mesh_and_flow_when_nothing_needs_refining(tmp_path) -> None:
    """When the corridor's first pass finds nothing to refine, the run meshes and solves
    the flow once: its mesh and flow are the first pass's (so they equal a fresh build of
    the case as written and its flow, to the flow solver's tolerance), the mesh is saved in
    the run folder, and a second run takes that saved mesh (a rerun or a resumed run keeps
    its mesh) and solves its own flow. Tolerance of the head: 1e-6 of the 0.1 m head drop,
    well above the flow solver's relative residual tolerance (fe3d.linalg.FLOW_TOLERANCE)
    times the matrix's conditioning on a 11 × 6 × 3-node box (common practice, no
    source)."""
    from fe3d.case.parts import FlowInputs
    from fe3d.flow.solve import solve_flow
    from fe3d.mesh.build import build_mesh
    from fe3d.mesh.io import load_cached, mesh_inputs_hash
    from fe3d.pipeline import first_pass, run_mesh

    case = _coarse_enough_case()
    done = first_pass(case)
    assert done is not None
    assert done.corridor is None
    site, flow = run_mesh(case, [tmp_path], tmp_path)
    assert flow is not None  # solved once, by the first pass
    plain = build_mesh(case)
    assert np.array_equal(site.points, plain.points)
    assert np.array_equal(site.cells, plain.cells)
    head = solve_flow(plain, FlowInputs.of(case)).head
    assert np.abs(flow.head - head).max() <= 1e-6 * 0.1
    saved = load_cached(tmp_path, mesh_inputs_hash(case))
    assert saved is not None
    assert np.array_equal(saved.points, site.points)
    again, no_flow = run_mesh(case, [tmp_path], tmp_path)
    assert no_flow is None  # the saved mesh is taken and its flow solved by the run
    assert np.array_equal(again.cells, site.cells)
