"""The tracker built lean (issue 16 part 5): what it holds, what it shares with its inputs,
and that the lean forms change no result.

References
- Seepage velocity v = q / θ (definition, e.g. Freeze & Cherry 1979, *Groundwater*, ch. 2).
  IEEE 754 division is correctly rounded (IEEE 754-2008, §5.4.1), so q / θ formed cell by
  cell in the compiled loop is the same double as in a numpy array: the pathlines must be
  equal bit for bit, no tolerance.
- Adjacency: Qhull's neighbour table of a Delaunay tetrahedralisation (scipy.spatial.Delaunay,
  Barber, Dobkin & Huhdanpaa 1996, *The Quickhull algorithm for convex hulls*).
- Memory budget: 16 bytes per cell (four int32 neighbours) and 24 bytes per node (the
  node-averaged velocity, three float64) is the design of this module (issue 16), not a
  published figure.
"""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest
from scipy.spatial import Delaunay

import fe3d.flow.paths as paths
from fe3d.flow.tracking import Tracker, cell_neighbours
from fe3d.mesh.site_mesh import SiteMesh


def _random_mesh(n_points: int, seed: int) -> tuple[np.ndarray, np.ndarray, Delaunay]:
    """Delaunay tetrahedra of random points in a 10 × 6 × 2 m box."""
    rng = np.random.default_rng(seed)
    pts = rng.uniform(0.0, 1.0, (n_points, 3)) * [10.0, 6.0, 2.0]
    tri = Delaunay(pts)
    return pts.T.copy(), tri.simplices.T.copy(), tri


def _own_bytes(tracker: Tracker, *inputs: np.ndarray) -> int:
    """Bytes of the arrays the tracker holds that are not views of ``inputs``."""
    held = [a for a in vars(tracker).values() if isinstance(a, np.ndarray)]
    return sum(a.nbytes for a in held
               if not any(np.shares_memory(a, given) for given in inputs))


def test_tracker_on_darcy_flux_and_porosity_equals_it_on_seepage_velocity():
    """A random velocity per cell (so that faces converge and the midpoint steps on the
    node-averaged velocity run too) and a random porosity: the same pathlines bit for bit."""
    pts, cells, _ = _random_mesh(500, seed=3)
    rng = np.random.default_rng(4)
    flux = rng.normal(size=(3, cells.shape[1])) * 1e-5 + np.array([[2e-5], [0.0], [0.0]])
    porosity = rng.uniform(0.1, 0.4, cells.shape[1])
    on_velocity = Tracker(pts, cells, flux / porosity)
    on_flux = Tracker(pts, cells, flux, porosity=porosity)
    steps = 0
    for x0 in rng.uniform(0.5, 1.5, (12, 3)) * [4.0, 2.5, 0.8]:
        for backward in (False, True):
            a = on_velocity.track(x0, backward=backward, max_steps=2000)
            b = on_flux.track(x0, backward=backward, max_steps=2000)
            assert a.end == b.end
            assert a.cells_crossed == b.cells_crossed
            np.testing.assert_array_equal(a.points, b.points)
            np.testing.assert_array_equal(a.times, b.times)
            steps += a.times.size
    assert steps > 100  # the particles did cross cells


def test_tracker_holds_the_adjacency_and_nodal_velocity_only():
    """No per-cell floats (basis gradients, a seepage velocity copy), no copy of the inputs
    (int32 cells stay int32): at most 16 bytes per cell and 24 per node of its own."""
    pts, cells, _ = _random_mesh(300, seed=5)
    cells32 = cells.astype(np.int32)
    flux = np.ones((3, cells.shape[1])) * 1e-5
    porosity = np.full(cells.shape[1], 0.3)
    tracker = Tracker(pts, cells32, flux, porosity=porosity)
    assert np.shares_memory(tracker.cells, cells32)
    assert np.shares_memory(tracker.velocity, flux)
    assert tracker.neighbour.dtype == np.int32
    budget = 16 * cells.shape[1] + 24 * pts.shape[1]
    assert _own_bytes(tracker, pts, cells32, flux, porosity) <= budget


def test_cell_neighbours_of_int32_and_int64_cells_match_qhull():
    pts, cells, tri = _random_mesh(250, seed=6)
    for kind in (np.int32, np.int64):
        nb = cell_neighbours(cells.astype(kind), pts.shape[1])
        assert nb.dtype == np.int32
        assert np.array_equal(nb, tri.neighbors.T)


@pytest.mark.parametrize("block", [7, 1 << 18])
def test_capture_cells_found_block_by_block_are_those_of_all_centres(monkeypatch, block):
    """Cells within half the reach of a well's screen, from cell centres formed a block at a
    time, against the same test on every centre at once (centre = mean of the 4 nodes)."""
    pts, cells, _ = _random_mesh(400, seed=7)
    site = SiteMesh(pts, cells, np.zeros(cells.shape[1], dtype=np.int64), ("all",), {})
    screens = [(1.9, 1.7), (0.4, 0.3)]  # (top, bottom) [m]
    well = SimpleNamespace(kind="extraction", x=6.0, y=3.0, screens=screens)
    inputs = SimpleNamespace(wells=[well, SimpleNamespace(kind="injection")], reach=1.0)
    monkeypatch.setattr(paths, "_BLOCK", block)
    mask = paths._capture_mask(site, inputs)
    centres = pts[:, cells].mean(axis=1)
    half = 0.5
    expected = np.zeros(cells.shape[1], dtype=bool)
    for top, bottom in screens:
        expected |= ((centres[2] <= top + half) & (centres[2] >= bottom - half))
    expected &= np.hypot(centres[0] - 6.0, centres[1] - 3.0) <= half
    between = (centres[2] > 0.4 + half) & (centres[2] < 1.7 - half)
    assert not expected[between].any()
    assert expected.any()
    assert mask is not None
    np.testing.assert_array_equal(mask, expected)
    inputs_without = SimpleNamespace(wells=[SimpleNamespace(kind="injection")], reach=2.0)
    assert paths._capture_mask(site, inputs_without) is None
