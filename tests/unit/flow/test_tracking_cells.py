"""Cell-by-cell particle tracking (fe3d.flow.tracking, theory.md F8): the cell adjacency,
the exit point and time of one cell, uniform flow, converging faces and pathline thinning.

References
- Adjacency: Qhull's neighbour table of a Delaunay tetrahedralisation (scipy.spatial.Delaunay,
  Barber, Dobkin & Huhdanpaa 1996, *The Quickhull algorithm for convex hulls*), and the
  former ``np.unique`` construction of fe3d itself.
- Exit of a straight motion from a tetrahedron: hand computation in the test (the faces of the
  unit corner tetrahedron are the planes x = 0, y = 0, z = 0 and x + y + z = 1).
- Uniform flow: a particle moves on the straight line x0 + v t (definition of seepage
  velocity, e.g. Freeze & Cherry 1979, *Groundwater*, ch. 2).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.spatial import Delaunay

from fe3d.flow.tracking import Pathline, Tracker, cell_neighbours, thin_pathline

EPS = np.finfo(float).eps
CORNER = np.array([[0.0, 1.0, 0.0, 0.0], [0.0, 0.0, 1.0, 0.0], [0.0, 0.0, 0.0, 1.0]])


def _neighbours_by_unique(cells: np.ndarray) -> np.ndarray:
    """The former construction: np.unique over the sorted node triples of all faces."""
    m = cells.shape[1]
    faces = np.sort(np.stack([np.delete(cells, k, axis=0) for k in range(4)], axis=1),
                    axis=0)
    _, inv = np.unique(faces.reshape(3, -1), axis=1, return_inverse=True)
    inv = inv.ravel()
    order = np.argsort(inv, kind="stable")
    same = inv[order][1:] == inv[order][:-1]
    a, b = order[:-1][same], order[1:][same]
    nb = np.full(4 * m, -1, dtype=np.int64)
    nb[a], nb[b] = b % m, a % m
    return nb.reshape(4, m)


def _random_mesh(n_points: int, seed: int) -> tuple[np.ndarray, np.ndarray, Delaunay]:
    """Delaunay tetrahedra of random points in a box, positively oriented, in random order
    with their vertices in random local order."""
    rng = np.random.default_rng(seed)
    pts = rng.uniform(0.0, 1.0, (n_points, 3)) * [10.0, 6.0, 2.0]
    tri = Delaunay(pts)
    cells = tri.simplices.T.copy()
    return pts.T.copy(), cells, tri


def test_cell_neighbours_match_qhull_and_the_former_unique_construction():
    pts, cells, tri = _random_mesh(400, seed=0)
    nb = cell_neighbours(cells, pts.shape[1])
    # Qhull's neighbors[e, k] is the cell opposite vertex k of cell e, -1 on the hull
    assert np.array_equal(nb, tri.neighbors.T)
    # shuffled cells and local vertex orders: the same faces found again
    rng = np.random.default_rng(1)
    order = rng.permutation(cells.shape[1])
    shuffled = np.take_along_axis(cells[:, order],
                                  np.argsort(rng.random(cells[:, order].shape), axis=0), axis=0)
    assert np.array_equal(cell_neighbours(shuffled), _neighbours_by_unique(shuffled))


def test_exit_point_and_time_of_one_cell_are_the_hand_computed_ones():
    """v = (1, 0.5, 0.25) m/s from (0.1, 0.1, 0.1) in the corner tetrahedron: x + y + z grows
    at 1.75 m/s from 0.3, so the particle leaves through x + y + z = 1 at t = 0.7/1.75 = 0.4 s,
    at (0.5, 0.3, 0.2) m. Backward, x reaches 0 first, at t = 0.1 s, at (0, 0.05, 0.075) m.
    Tolerance: a few round-off units of the unit coordinates (one step of a handful of
    products; factor 8 for the barycentric solve)."""
    tracker = Tracker(CORNER, np.arange(4)[:, None], np.array([[1.0], [0.5], [0.25]]))
    x0 = np.array([0.1, 0.1, 0.1])
    fwd = tracker.track(x0)
    assert fwd.end == "boundary"
    np.testing.assert_allclose(fwd.points[:, -1], [0.5, 0.3, 0.2], rtol=0, atol=8 * EPS)
    assert fwd.times[-1] == pytest.approx(0.4, rel=8 * EPS)
    back = tracker.track(x0, backward=True)
    assert back.end == "boundary"
    np.testing.assert_allclose(back.points[:, -1], [0.0, 0.05, 0.075], rtol=0, atol=8 * EPS)
    assert back.times[-1] == pytest.approx(0.1, rel=8 * EPS)
    stop = tracker.track(x0, max_time=0.25)
    assert stop.end == "max_time"
    np.testing.assert_allclose(stop.points[:, -1], x0 + 0.25 * np.array([1.0, 0.5, 0.25]),
                               rtol=0, atol=8 * EPS)


def test_uniform_flow_is_followed_exactly_across_many_cells():
    """Uniform v on a random Delaunay mesh of a 10 × 6 × 2 m box: every recorded point lies
    on x0 + v t and the particle leaves through x = 10 m at t = (10 − x0)/v_x. Round-off
    grows by a few units per cell crossed: tolerance 16 ε × scale × crossings."""
    pts, cells, _ = _random_mesh(600, seed=2)
    pts[:, :8] = np.array([[x, y, z] for x in (0, 10) for y in (0, 6) for z in (0, 2)],
                          dtype=float).T  # the box's corners, so that its hull is the box
    cells = Delaunay(pts.T).simplices.T.copy()
    v = np.array([2.0e-5, 0.3e-5, 0.1e-5])  # m/s
    tracker = Tracker(pts, cells, np.repeat(v[:, None], cells.shape[1], axis=1))
    x0 = np.array([0.5, 1.0, 0.5])
    path = tracker.track(x0)
    assert path.end == "boundary"
    assert path.cells_crossed > 20
    tol = 16 * EPS * 10.0 * path.cells_crossed
    np.testing.assert_allclose(path.points, x0[:, None] + v[:, None] * path.times, atol=tol)
    t_exit = (10.0 - x0[0]) / v[0]
    assert path.times[-1] == pytest.approx(t_exit, rel=tol / 10.0)
    back = tracker.track(np.array([9.0, 5.0, 1.5]), backward=True)
    assert back.end == "boundary"
    assert back.times[-1] == pytest.approx(9.0 / v[0], rel=16 * EPS * back.cells_crossed)


def test_each_recorded_point_names_the_cell_the_particle_moves_through_next():
    """The cells a pathline records (read by the plume corridor for each stretch's unit)
    are the cells the particle crosses: the midpoint of every stretch lies in the cell
    recorded at its start, by Qhull's point location (scipy.spatial.Delaunay.find_simplex
    on the same tetrahedra: an exact index), and the last point in the cell it ended in."""
    pts, cells, _ = _random_mesh(600, seed=2)
    pts[:, :8] = np.array([[x, y, z] for x in (0, 10) for y in (0, 6) for z in (0, 2)],
                          dtype=float).T
    tri = Delaunay(pts.T)
    cells = tri.simplices.T.copy()
    v = np.array([2.0e-5, 0.3e-5, 0.1e-5])
    path = Tracker(pts, cells, np.repeat(v[:, None], cells.shape[1], axis=1)).track(
        np.array([0.5, 1.0, 0.5]))
    assert path.cells.shape == path.times.shape and path.cells_crossed > 20
    middles = 0.5 * (path.points[:, 1:] + path.points[:, :-1])
    np.testing.assert_array_equal(path.cells[:-1], tri.find_simplex(middles.T))
    last = tri.transform[path.cells[-1]]
    lam = last[:3] @ (path.points[:, -1] - last[3])
    assert lam.min() >= -1e-9 and lam.sum() <= 1.0 + 1e-9  # barycentric, tolerance 1e-9


def test_converging_faces_do_not_stall_a_particle():
    """Two cells of equal volume, mirror images across their shared face x + y + z = 1,
    whose velocities u ± n/2 (u in the face, n its unit normal) both point into that face:
    the exact motion reaches the face and then slides on it at u, the mean of the two
    (Filippov's convex combination with no normal part; by the symmetry the weights are ½).
    The node-averaged velocity is u on the face, so the particle slides at u and leaves
    through y = 0. Hand computation: from (0.1, 0.5, 0.1), x + y + z grows at √3/2 m/s, so
    the face is reached at t₁ = 0.3/(√3/2) s with y₁ = 0.5 + t₁(−1/√2 + 1/(2√3)); then y falls
    at 1/√2 m/s: exit at t₁ + √2 y₁, at x + y + z = 1, z = 0.2. Tolerance: the last step
    ends by bisection within the point location's barycentric tolerance 1e-9 of the
    boundary (unit cells), so 1e-8 in time [s] and position [m]."""
    pts = np.array([[0.0, 1.0, 0.0, 0.0, 2 / 3], [0.0, 0.0, 1.0, 0.0, 2 / 3],
                    [0.0, 0.0, 0.0, 1.0, 2 / 3]])
    cells = np.array([[0, 1, 2, 3], [4, 3, 2, 1]]).T  # share the face (1, 2, 3)
    n = np.ones(3) / np.sqrt(3.0)  # normal of the shared face, from cell 0 to cell 1
    u = np.array([1.0, -1.0, 0.0]) / np.sqrt(2.0)  # in the face
    tracker = Tracker(pts, cells, np.stack([u + 0.5 * n, u - 0.5 * n], axis=1))
    x0 = np.array([0.1, 0.5, 0.1])
    path = tracker.track(x0, max_steps=500)
    assert path.end == "boundary", path.end
    t1 = 0.3 / (np.sqrt(3.0) / 2.0)
    y1 = 0.5 + t1 * (-1.0 / np.sqrt(2.0) + 0.5 / np.sqrt(3.0))
    assert path.times[-1] == pytest.approx(t1 + np.sqrt(2.0) * y1, abs=1e-8)
    x1 = x0 + t1 * (u + 0.5 * n)
    np.testing.assert_allclose(path.points[:, -1], x1 + np.sqrt(2.0) * y1 * u, atol=1e-8)
    np.testing.assert_allclose(path.points[:, 1:].sum(axis=0), 1.0, atol=1e-8)  # on the face


def test_thinning_keeps_the_ends_and_stays_within_the_tolerance():
    """Douglas–Peucker: every dropped point lies within the tolerance of the kept polyline,
    and points on a straight stretch are dropped."""
    s = np.linspace(0.0, 1.0, 201)
    pts = np.vstack([10.0 * s, np.where(s < 0.5, 0.0, 4.0 * (s - 0.5)), 0.01 * np.sin(40 * s)])
    line = Pathline(pts, 100.0 * s, "boundary", 200, np.arange(201))
    thin = thin_pathline(line, 0.05)
    assert 3 <= thin.times.size < 40
    assert thin.times[0] == 0.0 and thin.times[-1] == 100.0
    kept = thin.points
    for p in pts.T:  # distance of each point to the nearest kept segment
        a, b = kept[:, :-1], kept[:, 1:]
        ab = b - a
        u = np.clip(((p[:, None] - a) * ab).sum(0) / (ab * ab).sum(0), 0.0, 1.0)
        assert np.min(np.linalg.norm(a + u * ab - p[:, None], axis=0)) <= 0.05 + 1e-12


def test_cell_neighbours_of_a_kuhn_box_are_symmetric_and_count_its_boundary():
    """The unit cube in n³ sub-cubes of 6 tetrahedra: its boundary has 6 · 2n² = 12 n²
    triangles (counting), and every interior face is seen from both of its cells."""
    n = 5
    idx = np.arange((n + 1) ** 3).reshape(n + 1, n + 1, n + 1)
    corner = {(i, j, k): idx[i:n + i, j:n + j, k:n + k].ravel()
              for i in (0, 1) for j in (0, 1) for k in (0, 1)}
    middle = [((1, 0, 0), (1, 1, 0)), ((1, 0, 0), (1, 0, 1)), ((0, 1, 0), (1, 1, 0)),
              ((0, 1, 0), (0, 1, 1)), ((0, 0, 1), (1, 0, 1)), ((0, 0, 1), (0, 1, 1))]
    cells = np.hstack([np.stack([corner[0, 0, 0], corner[a], corner[b], corner[1, 1, 1]])
                       for a, b in middle])
    nb = cell_neighbours(cells)
    assert int((nb < 0).sum()) == 12 * n * n
    k, e = np.nonzero(nb >= 0)
    assert np.all((nb[:, nb[k, e]] == e).sum(axis=0) == 1)


def test_a_capture_mask_of_the_wrong_size_is_refused():
    tracker = Tracker(CORNER, np.arange(4)[:, None], np.array([[1.0], [0.5], [0.25]]))
    with pytest.raises(ValueError, match="one flag per cell"):
        tracker.track(np.array([0.1, 0.1, 0.1]), capture_cells=np.zeros(3, dtype=bool))
    whole = tracker.track(np.array([0.1, 0.1, 0.1]), capture_cells=np.ones(1, dtype=bool))
    assert whole.end == "captured"
