"""Face patches the size they are (theory.md T3a, issue 11 part 6).

The clipping is checked against areas worked out by hand (elementary geometry), the nodal
shares against the patch's area and first moment (P1 functions sum to one and reproduce
linear functions, so Σ_i x_i ∫_P φ_i dA = ∫_P x dA exactly: round-off tolerance), and the
mass a fixed-concentration patch lets into a slab against the net inflow of the exact
problem.

That reference: in uniform flow along x the integral of c over a plane x = const is the
patch area A times the 1D value (transverse dispersion keeps the transverse integral;
Wexler 1992, USGS TWRI 3-B7, finite patch source), so the net inflow is A times the 1D
inlet flux of Ogata & Banks (1961), whose time integral (derived in
tests/verification/_patch_source.py, ``entered_mass``) is c0 θ A (v t + α_L R) once
v t/(4 α_L R) ≫ 1 (here 10: the neglected erfc terms are below 1e-5 of the total).
"""

from __future__ import annotations

import numpy as np
import pytest

from fe3d.case.builder import Layer, Material, Solver, Source, Species, Time, box_case
from fe3d.case.parts import FlowInputs, TransportInputs
from fe3d.case.schema import Case
from fe3d.errors import MeshError
from fe3d.mesh.build import build_mesh
from fe3d.transport.sources import (
    _held_nodes,
    box_load_weights,
    clip_polygon,
    patch_integrals,
    patch_shares,
)

ROUND_OFF = 1e-12  # relative: sums of a few hundred areas in double precision

# ------------------------------------------------------------------------- clipping


def _area(poly: np.ndarray) -> float:
    """Area of a planar polygon (3, k) by the vector (shoelace) formula."""
    if poly.shape[1] < 3:
        return 0.0
    total = sum(np.cross(poly[:, i], poly[:, (i + 1) % poly.shape[1]])
                for i in range(poly.shape[1]))
    return 0.5 * float(np.linalg.norm(total))


INF = np.inf
TRIANGLE = np.array([[0.0, 2.0, 0.0], [0.0, 0.0, 2.0], [0.0, 0.0, 0.0]])  # legs 2, area 2


@pytest.mark.parametrize(("lo", "hi", "area"), [
    # the unit square lies inside x + y ≤ 2
    ((0.0, 0.0, -INF), (1.0, 1.0, INF), 1.0),
    # x ≤ 1 cuts off the corner triangle x > 1 (legs 1): 2 − 1/2
    ((-INF, -INF, -INF), (1.0, INF, INF), 1.5),
    # the square [0.5, 1.5]² less its corner above x + y = 2 (legs 1): 1 − 1/2
    ((0.5, 0.5, -INF), (1.5, 1.5, INF), 0.5),
    # a band 0.5 ≤ y ≤ 1 of the triangle: a trapezoid with sides 1.5 and 1, height 1/2
    ((-INF, 0.5, -INF), (INF, 1.0, INF), 0.625),
    # the whole triangle, and nothing of it
    ((-1.0, -1.0, -1.0), (3.0, 3.0, 1.0), 2.0),
    ((2.5, -INF, -INF), (INF, INF, INF), 0.0),
    # a box that only touches the hypotenuse at (1, 1): a point, no area
    ((1.0, 1.0, -INF), (2.0, 2.0, INF), 0.0),
])
def test_clipping_gives_hand_computed_areas(lo: tuple, hi: tuple, area: float) -> None:
    out = clip_polygon(TRIANGLE, np.array(lo), np.array(hi))
    assert _area(out) == pytest.approx(area, rel=ROUND_OFF, abs=ROUND_OFF)
    assert np.all(out >= np.array(lo)[:, None] - ROUND_OFF)
    assert np.all(out <= np.array(hi)[:, None] + ROUND_OFF)


def test_clipping_a_triangle_on_a_vertical_face() -> None:
    """A triangle in the plane x = 0 (a west face): corners (y, z) = (0, 0), (4, 0), (0, −4),
    clipped to y ≤ 1, z ≥ −1: the unit square (it lies under the hypotenuse y − z = 4)."""
    tri = np.array([[0.0, 0.0, 0.0], [0.0, 4.0, 0.0], [0.0, 0.0, -4.0]])
    out = clip_polygon(tri, np.array([-INF, -INF, -1.0]), np.array([INF, 1.0, INF]))
    assert _area(out) == pytest.approx(1.0, rel=ROUND_OFF)
    assert np.allclose(out[0], 0.0)


# ----------------------------------------------------------- shares on a structured face


def _structured_face(nx: int, ny: int, h: float) -> tuple[np.ndarray, np.ndarray]:
    """Points (3, n) of a face z = 0 on [0, nx h] × [0, ny h], split into right triangles
    along alternating diagonals, and its triangles (3, k)."""
    x, y = np.meshgrid(np.arange(nx + 1) * h, np.arange(ny + 1) * h, indexing="ij")
    points = np.vstack([x.ravel(), y.ravel(), np.zeros(x.size)])
    tri = []
    for i in range(nx):
        for j in range(ny):
            a, b, c, d = (i * (ny + 1) + j, (i + 1) * (ny + 1) + j,
                          (i + 1) * (ny + 1) + j + 1, i * (ny + 1) + j + 1)
            tri += [(a, b, c), (a, c, d)] if (i + j) % 2 == 0 else [(a, b, d), (b, c, d)]
    return points, np.array(tri).T


@pytest.mark.parametrize(("lo", "hi"), [
    ((1.3, 0.7), (4.1, 3.35)),  # outline across the cells
    ((1.0, 1.0), (3.0, 4.0)),  # outline on mesh lines
    ((2.2, 2.4), (2.6, 2.7)),  # inside one cell
])
def test_shares_sum_to_the_patch_area_and_keep_its_centroid(lo: tuple, hi: tuple) -> None:
    points, tri = _structured_face(6, 5, 1.0)
    n = points.shape[1]
    box = (np.array([*lo, -INF]), np.array([*hi, INF]))
    weights = patch_integrals(points, tri, box, n=n)
    area = (hi[0] - lo[0]) * (hi[1] - lo[1])
    assert weights.sum() == pytest.approx(area, rel=ROUND_OFF)
    centroid = points[:2] @ weights / weights.sum()
    assert np.allclose(centroid, 0.5 * (np.array(lo) + np.array(hi)), rtol=0, atol=ROUND_OFF)
    share = patch_shares(points, tri, box, n=n)
    lumped = np.bincount(tri.ravel(), minlength=n) / 6.0  # six right triangles of area 1/2
    assert np.all((share >= 0.0) & (share <= 1.0))
    assert share @ lumped == pytest.approx(area, rel=ROUND_OFF)


def test_nodes_on_a_straight_outline_get_half_and_outside_nodes_none() -> None:
    """Outline on mesh lines: inner nodes 1, edge nodes 1/2 (half of their triangles
    inside), corners 1/4 (one or two triangles in each quadrant around a node on this mesh of
    alternating diagonals), and the nodes outside get nothing."""
    points, tri = _structured_face(6, 5, 1.0)
    box = (np.array([1.0, 1.0, -INF]), np.array([3.0, 4.0, INF]))
    share = patch_shares(points, tri, box, n=points.shape[1])
    x, y = points[0], points[1]
    inner = (x > 1) & (x < 3) & (y > 1) & (y < 4)
    edge = ((np.isin(x, [1.0, 3.0]) & (y > 1) & (y < 4))
            | (np.isin(y, [1.0, 4.0]) & (x > 1) & (x < 3)))
    corner = np.isin(x, [1.0, 3.0]) & np.isin(y, [1.0, 4.0])
    assert np.allclose(share[inner], 1.0, atol=ROUND_OFF)
    assert np.allclose(share[edge], 0.5, atol=ROUND_OFF)
    assert np.allclose(share[corner], 0.25, atol=ROUND_OFF)
    assert np.all(share[~(inner | edge | corner)] == 0.0)


# -------------------------------------------------------- the mass through a patch


def _slab(patch_y: tuple[float, float], patch_z: tuple[float, float], *, solver: Solver,
          scheme: str) -> Case:
    """A 30 m × 10 m × 4 m sand slab, q = 0.25 m/d along x (v = 1 m/d), α_L = 0.5 m,
    α_T = 0.05 m, R = 1, 1 m plan cells and 0.5 m cell layers; a patch on the west face
    held at 10 mg/L for 20 d, 0.1 d steps (Courant 0.1)."""
    sand = Material(25.0, 25.0, porosity=0.25, longitudinal_dispersivity=0.5,
                    transverse_dispersivity=0.05)
    return box_case(length=30.0, width=10.0, cell=1.0, dz=0.5, heads={"west": 0.3, "east": 0.0},
                    layers=[Layer("sand", -4.0, sand)], species=[Species("solvent")],
                    sources=[Source("patch", species="solvent", shape="face_patch", face="west",
                                    concentration=10.0, y=patch_y, z=patch_z)],
                    time=Time("20 d", "0.1 d", scheme=scheme), solver=solver)


def test_a_patch_lets_in_the_mass_of_its_real_area() -> None:
    """Patch y ∈ [0, 3.3] m, z ∈ [−2.25, 0] m (A = 7.425 m²), its outline across the cells
    in z (0.5 m layers); grid Péclet 2 (the corridor's target); the bounded scheme
    (``monotone`` + ``flux_limiting``, Crank–Nicolson). Tolerance 2 % (issue 11's
    criterion): the advective part is exact by construction (Σ share_i A_i = A), what is
    left is the discrete dispersive flux at the patch edge.

    Measured, entered against exact 0.38053 kg: +0.47 % (holding every node in the ranges
    at c0, as before: +14.7 %). SUPG with Crank–Nicolson, for contrast: −1.90 % (before:
    +9.7 %); its negative halo beside the patch (down to −0.11 c0) holds less mass, which the
    bounded scheme does not, so SUPG is not asserted here."""
    from fe3d.flow.solve import solve_flow
    from fe3d.transport.run import run_transport

    case = _slab((0.0, 3.3), (-2.25, 0.0), solver=Solver(monotone=True, flux_limiting=True),
                 scheme="crank_nicolson")
    site = build_mesh(case)
    flow = solve_flow(site, FlowInputs.of(case))
    *_, last = run_transport(site, flow, TransportInputs.of(case))
    theta, v, t, alpha, c0 = 0.25, 1.0 / 86400.0, 20 * 86400.0, 0.5, 0.01
    exact = c0 * theta * 3.3 * 2.25 * (v * t + alpha)
    entered = last.budgets["solvent"].source_input
    assert entered == pytest.approx(exact, rel=0.02)
    assert abs(last.budgets["solvent"].relative_error) <= 1e-8


def test_a_patch_without_a_node_is_refused() -> None:
    """A patch between the nodes of the face is smaller than its cells: one-line MeshError
    (the rule ``fe3d check`` applies too)."""
    case = _slab((4.2, 4.4), (-2.35, -2.15), solver=Solver(), scheme="backward_euler")
    site = build_mesh(case)
    with pytest.raises(MeshError, match="contains no mesh node"):
        _held_nodes(site, case.sources[0])


# ------------------------------------------------------------ a mass spread over a box


def _loaded_box_site(box_x: tuple[float, float]) -> tuple[object, Case]:
    """A 20 m × 10 m × 4 m sand block, 2 m plan cells and 1 m cell layers, with 5 g/d
    spread over the box x ∈ ``box_x``, y ∈ [3.3, 6.1], z ∈ [−2.7, −0.9] m (not on nodes)."""
    sand = Material(10.0, 10.0, porosity=0.3)
    case = box_case(length=20.0, width=10.0, cell=2.0, dz=1.0, heads={"west": 0.1, "east": 0.0},
                    layers=[Layer("sand", -4.0, sand)], species=[Species("solvent")],
                    sources=[Source("spill", species="solvent", kind="mass_loading",
                                    mass_rate=5.0, x=box_x, y=(3.3, 6.1), z=(-2.7, -0.9))],
                    time=Time("1 d", "1 d"))
    return build_mesh(case), case


def test_a_box_load_sums_to_one_and_is_centred_on_the_box() -> None:
    """The Galerkin load of a uniform box source (theory.md T3, mass_loading): Σ_j w_j = 1
    (partition of unity) and Σ_j w_j x_j = the box's centroid, because P1 reproduces linear
    functions and the midpoint rule integrates them exactly over the box; both to round-off
    (1e-12 relative, 1e-9 m). The nodes that hold load reach beyond the box by at most one
    cell."""
    site, case = _loaded_box_site((7.1, 11.9))
    w = box_load_weights(site, case.sources[0])
    assert np.all(w >= 0.0)
    assert w.sum() == pytest.approx(1.0, rel=ROUND_OFF)
    centroid = site.points @ w
    assert np.allclose(centroid, [9.5, 4.7, -1.8], rtol=0.0, atol=1e-9)
    loaded = site.points[:, w > 0]
    assert loaded[0].min() >= 7.1 - 2.0 * 1.5 and loaded[0].max() <= 11.9 + 2.0 * 1.5


def test_a_box_load_moves_smoothly_with_the_box() -> None:
    """Shifting the box by δ = 1 mm changes the weights continuously: every sample moves by
    δ, so Σ_j |Δw_j| ≤ δ · max Σ_j |∂φ_j/∂x|, a few times δ/h (h ≈ 1–2 m here: measured
    4e-3); bound 0.01. Counting the nodes inside the box instead moves a whole nodal share
    (about 1/12 of the load here, 12 nodes in the box) when a node crosses the outline."""
    a_site, a = _loaded_box_site((7.1, 11.9))
    _, b = _loaded_box_site((7.101, 11.901))
    moved = np.abs(box_load_weights(a_site, a.sources[0])
                   - box_load_weights(a_site, b.sources[0])).sum()
    assert moved <= 0.01


# ------------------------------------------------------------ an initial plume in a box


def test_an_initial_plume_box_starts_with_the_mass_of_its_volume() -> None:
    """An initial plume at c0 in the box x ∈ [7.1, 11.9], y ∈ [3.3, 6.1], z ∈ [−2.7, −0.9] m
    (24.192 m³, its faces across the 2 m × 1 m cells) starts with θ R c0 |box| in the run's
    own budget (θ = 0.3, R = 1): each node takes its share of the box (theory.md T3,
    ``initial_plume``). Tolerance 2 %, issue 11's criterion for sources the size they are;
    the part left is the lattice's sampling of the cut cells (measured +0.06 %; +0.35 % with
    3 points per edge, −0.02 % with 11). Holding every node inside the box at c0, as before,
    started with +75 % (the nodes' control volumes reach half a cell past the box's faces).
    Values stay within [0, c0]; a node whose cells all lie inside starts at exactly c0."""
    from fe3d.flow.solve import solve_flow
    from fe3d.transport.run import run_transport
    from fe3d.transport.sources import box_shares

    c0 = 0.01  # kg/m³
    sand = Material(10.0, 10.0, porosity=0.3)
    case = box_case(length=20.0, width=10.0, cell=2.0, dz=1.0, heads={"west": 0.1, "east": 0.0},
                    layers=[Layer("sand", -4.0, sand)], species=[Species("solvent")],
                    sources=[Source("old_spill", species="solvent", kind="initial_plume",
                                    concentration="10 mg/L", x=(7.1, 11.9), y=(3.3, 6.1),
                                    z=(-2.7, -0.9))],
                    time=Time("1 d", "1 d"))
    site = build_mesh(case)
    share = box_shares(site, case.sources[0])
    assert np.all((share >= 0.0) & (share <= 1.0))
    cells_in = np.all((site.points[:, site.cells] >= np.array([7.1, 3.3, -2.7])[:, None, None])
                      & (site.points[:, site.cells] <= np.array([11.9, 6.1, -0.9])[:, None, None]),
                      axis=(0, 1))
    wholly = np.setdiff1d(np.unique(site.cells[:, cells_in]),
                          np.unique(site.cells[:, ~cells_in]))
    assert wholly.size > 0 and np.all(share[wholly] == 1.0)
    flow = solve_flow(site, FlowInputs.of(case))
    *_, last = run_transport(site, flow, TransportInputs.of(case))
    exact = 0.3 * c0 * 4.8 * 2.8 * 1.8
    assert last.budgets["solvent"].initial == pytest.approx(exact, rel=0.02)
    held = _held_nodes(site, case.sources[0])[0]
    before = 0.3 * c0 * site.lumped(np.ones(site.n_cells))[held].sum()
    assert before > 1.2 * exact  # the former rule's excess, which this replaces
