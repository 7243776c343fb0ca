"""The compiled kernels of the layered mesh (fe3d/mesh/prisms.py) give the arrays of the
plain numpy formulations they replaced, entry for entry."""

from __future__ import annotations

import numpy as np
import pytest

from fe3d.mesh.build import extrude
from fe3d.mesh.prisms import (
    boundary_triangles,
    order_by_lowest_node,
    orient_positive,
    signed_volumes,
    split_prisms,
)


def _plan(n: int = 7, seed: int = 3) -> tuple[np.ndarray, np.ndarray]:
    """A jittered n × n grid of plan nodes cut into triangles (diagonals both ways), with
    the node ids shuffled so that the split rule's node order matters."""
    rng = np.random.default_rng(seed)
    x, y = np.meshgrid(np.arange(n, dtype=float), np.arange(n, dtype=float))
    xy = np.vstack([x.ravel(), y.ravel()]) + rng.uniform(-0.2, 0.2, (2, n * n))
    tri = []
    for j in range(n - 1):
        for i in range(n - 1):
            a, b, c, d = j * n + i, j * n + i + 1, (j + 1) * n + i + 1, (j + 1) * n + i
            tri += [(a, b, c), (a, c, d)] if (i + j) % 2 else [(a, b, d), (b, c, d)]
    shuffle = rng.permutation(n * n)
    return xy[:, np.argsort(shuffle)], shuffle[np.array(tri).T]


def _levels(xy: np.ndarray) -> np.ndarray:
    """Five levels; the second unit pinches out where x < 2.5 (merged nodes)."""
    top = 10.0 + 0.1 * xy[0]
    mid = 6.0 - 0.05 * xy[1]
    low = np.where(xy[0] < 2.5, mid, mid - 2.0)
    return np.array([top, 0.5 * (top + mid), mid, low, low - 3.0])


def _numpy_split(tri: np.ndarray, canon: np.ndarray, layer_unit: np.ndarray) -> tuple:
    """The split as numpy wrote it before the kernel (stack, sort, mask per split type)."""
    t = np.sort(tri, axis=0)
    cells, unit, level, ptri = [], [], [], []
    ids = np.arange(t.shape[1])
    for lv in range(canon.shape[0] - 1):
        v0, v1, v2 = t if lv % 2 == 0 else t[::-1]
        b, u = canon[lv + 1], canon[lv]
        for c in (np.stack([b[v0], b[v1], b[v2], u[v2]]), np.stack([b[v0], b[v1], u[v1], u[v2]]),
                  np.stack([b[v0], u[v0], u[v1], u[v2]])):
            s = np.sort(c, axis=0)
            keep = np.all(s[1:] != s[:-1], axis=0)
            cells.append(c[:, keep])
            ptri.append(ids[keep])
            unit.append(np.full(int(keep.sum()), layer_unit[lv]))
            level.append(np.full(int(keep.sum()), lv))
    return np.hstack(cells), np.concatenate(unit), np.concatenate(level), np.concatenate(ptri)


def test_split_prisms_matches_the_numpy_split_with_pinched_columns() -> None:
    xy, tri = _plan()
    z = _levels(xy)
    n2 = xy.shape[1]
    own = np.arange(z.shape[0] * n2).reshape(z.shape[0], n2)
    canon = own.copy()
    for lv in range(1, z.shape[0]):
        canon[lv] = np.where(z[lv] == z[lv - 1], canon[lv - 1], own[lv])
    layer_unit = np.array([0, 0, 1, 2])
    got = split_prisms(np.sort(tri, axis=0), canon, layer_unit)
    want = _numpy_split(tri, canon, layer_unit)
    assert got[0].shape[1] < 3 * tri.shape[1] * 4  # some tetrahedra collapsed
    for g, w in zip(got, want, strict=True):
        np.testing.assert_array_equal(g, w)


def _numpy_boundary(cells: np.ndarray) -> np.ndarray:
    faces = np.sort(np.hstack([cells[[0, 1, 2]], cells[[0, 1, 3]], cells[[0, 2, 3]],
                               cells[[1, 2, 3]]]), axis=0)
    key, counts = np.unique(faces, axis=1, return_counts=True)  # sorted lexicographically
    return key[:, counts == 1]


def test_boundary_order_and_orientation_match_numpy() -> None:
    xy, tri = _plan()
    points, cells, *_ = extrude(xy, tri, _levels(xy), np.array([0, 0, 1, 2]))
    rng = np.random.default_rng(5)
    perm = rng.permutation(points.shape[1])  # a renumbering, as the mesher's RCM
    inv = np.empty_like(perm)
    inv[perm] = np.arange(perm.size)
    points, cells = points[:, perm], inv[cells]
    n = points.shape[1]
    np.testing.assert_array_equal(boundary_triangles(cells, n), _numpy_boundary(cells))
    order = order_by_lowest_node(cells, n)
    np.testing.assert_array_equal(order, np.argsort(cells.min(axis=0), kind="stable"))
    oriented = orient_positive(points, cells, order)
    assert np.all(signed_volumes(points, oriented) > 0)
    # renumbering inside the kernels equals renumbering first (inverse of the permutation)
    original = perm[cells]  # the cells in the node ids before the permutation
    np.testing.assert_array_equal(order_by_lowest_node(original, n, inv), order)
    np.testing.assert_array_equal(orient_positive(points, original, order, inv), oriented)
    swapped = oriented[[0, 2, 1, 3]]  # the mirror image of every cell
    np.testing.assert_array_equal(orient_positive(points, swapped, np.arange(order.size)),
                                  oriented)


def test_signed_volumes_match_the_determinant() -> None:
    """Six times the volume is det[b − a, c − a, d − a] (numpy.linalg.det as the reference).
    Tolerance: both round a three-term sum of products of O(1) coordinates, a few eps of
    the terms' size (here O(1)), so 1e-13 absolute."""
    rng = np.random.default_rng(2)
    points = rng.uniform(0.0, 1.0, (3, 40))
    cells = np.array([rng.choice(40, 4, replace=False) for _ in range(200)]).T
    p = points[:, cells]  # (3, 4, m)
    det = np.linalg.det(np.stack([p[:, 1] - p[:, 0], p[:, 2] - p[:, 0],
                                  p[:, 3] - p[:, 0]], axis=1).transpose(2, 0, 1))
    np.testing.assert_allclose(signed_volumes(points, cells), det / 6.0, rtol=0, atol=1e-13)


@pytest.mark.parametrize("n", [2, 5])
def test_boundary_of_a_box_of_prisms_has_the_closed_surface_count(n: int) -> None:
    """A closed triangulated surface of a prism stack: top and bottom n_tri each, the sides
    two triangles per boundary edge and cell layer (Euler: each side quad is split in two)."""
    xy, tri = _plan(n + 1)
    z = np.array([np.full(xy.shape[1], 2.0), np.ones(xy.shape[1]), np.zeros(xy.shape[1])])
    points, cells, *_ = extrude(xy, tri, z, np.array([0, 0]))
    faces = boundary_triangles(cells, points.shape[1])
    n_edges = 4 * n  # boundary edges of the n × n grid
    assert faces.shape[1] == 2 * tri.shape[1] + 2 * n_edges * 2
