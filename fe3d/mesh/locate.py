"""Locate points in the mesh and build sampling operators (point values, screen averages)."""

from __future__ import annotations

import numba
import numpy as np
import scipy.sparse as sp

from fe3d._typing import FloatArray, IndexArray
from fe3d.errors import MeshError
from fe3d.mesh.geometry import p1_gradients
from fe3d.p1 import index_array

__all__ = ["CellFinder", "locate_points", "sample_operator", "screen_points"]


def screen_points(x: float, y: float, top: float, bottom: float, *, spacing: float) -> FloatArray:
    """Sample points [m] along a vertical screen, shape ``(3, k)``, k ≥ 5: the midpoints of
    k equal segments no longer than ``spacing``, so that equal weights integrate along the
    screen by the midpoint rule and every cell layer takes its share (end points sampled
    with full weight gave the top and bottom nodes 22 % too much of a well's rate)."""
    k = max(5, int(np.ceil((top - bottom) / spacing)))
    z = top + (bottom - top) * (np.arange(k) + 0.5) / k
    return np.vstack([np.full(k, x), np.full(k, y), z])


class CellFinder:
    """Finds the cell that contains a point: a k-d tree of the centres of ``cells`` (all
    of the mesh's, or the subset ``ids``), whose nearest candidates are checked by
    barycentric coordinates ≥ −tol, widening the search 16 → 128 → 1024 → 8192 (flat
    layer cells have centres far from points they contain)."""

    def __init__(self, points: FloatArray, cells: IndexArray,
                 ids: IndexArray | None = None) -> None:
        from scipy.spatial import cKDTree

        self.points = np.ascontiguousarray(points, dtype=float)  # the kernels read it so
        self.ids = np.arange(cells.shape[1]) if ids is None else np.asarray(ids)
        self.cells = cells[:, self.ids]
        # the cells' centres (m, 3), one coordinate at a time: a (4, m) temporary instead
        # of (3, 4, m) and its transposed copy (96 + 24 bytes per cell at once)
        centres = np.empty((self.cells.shape[1], 3))
        for axis in range(3):
            centres[:, axis] = self.points[axis][self.cells].mean(axis=0)
        self._tree = cKDTree(centres)

    def find(self, xs: FloatArray, *, tol: float = 1e-9) -> tuple[IndexArray, FloatArray]:
        """Containing cell (index into the mesh's cells, −1 when in none) and barycentric
        coordinates of each point ``xs`` [m] ``(3, k)``; shapes ``(k,)`` and ``(4, k)``."""
        k = xs.shape[1]
        m = self.cells.shape[1]
        found = np.full(k, -1, dtype=np.int64)
        bary = np.zeros((4, k))
        for n_cand in (16, 128, 1024, 8192):
            todo = np.nonzero(found < 0)[0]
            if todo.size == 0:
                break
            _, cand = self._tree.query(xs[:, todo].T, k=min(n_cand, m))
            cand = np.asarray(cand).reshape(todo.size, -1)
            for j, i in enumerate(todo):
                c = cand[j]
                grads, _ = p1_gradients(self.points, self.cells[:, c])
                lam = np.einsum("eik,ke->ie", grads, xs[:, [i]] - self.points[:, self.cells[0, c]])
                lam[0] = 1.0 - lam[1:].sum(axis=0)
                ok = np.nonzero(np.all(lam >= -tol, axis=0))[0]
                if ok.size:
                    found[i] = c[ok[0]]
                    bary[:, i] = lam[:, ok[0]]
            if n_cand >= m:
                break
        return np.where(found >= 0, self.ids[np.maximum(found, 0)], -1), bary


@numba.njit(cache=True, nogil=True)
def _cells_meeting_box(points: FloatArray, cells: IndexArray, lo: FloatArray,
                       hi: FloatArray) -> IndexArray:
    """Ids of the cells whose bounding box meets the box [lo, hi] ``(3,)`` [m]."""
    keep = np.empty(cells.shape[1], np.int64)
    count = 0
    for e in range(cells.shape[1]):
        meets = True
        for axis in range(3):
            low = high = points[axis, cells[0, e]]
            for a in range(1, 4):
                v = points[axis, cells[a, e]]
                low = min(low, v)
                high = max(high, v)
            if high < lo[axis] or low > hi[axis]:
                meets = False
                break
        if meets:
            keep[count] = e
            count += 1
    return keep[:count].copy()


def locate_points(points: FloatArray, cells: IndexArray, xs: FloatArray, *,
                  tol: float = 1e-9) -> tuple[IndexArray, FloatArray]:
    """Containing cell and barycentric coordinates of each point (:class:`CellFinder` over
    the cells that can hold them); a point in no cell raises :class:`MeshError`.

    Returns
    -------
    cell_ids, bary
        Shapes ``(k,)`` and ``(4, k)``.
    """
    # only cells whose bounding box meets the points' bounding box can hold them (a small
    # tree is quick to build): one compiled pass over the cells, no gather of their corners
    near = _cells_meeting_box(np.ascontiguousarray(points, dtype=float),
                              index_array(cells),
                              xs.min(axis=1) - 1e-9, xs.max(axis=1) + 1e-9)
    found = np.full(xs.shape[1], -1, dtype=np.int64)
    bary = np.zeros((4, xs.shape[1]))
    if near.size:
        found, bary = CellFinder(points, cells, near).find(xs, tol=tol)
    if np.any(found < 0):
        bad = xs[:, int(np.argmax(found < 0))]
        msg = f"a sample point near {bad.round(3).tolist()} m lies outside the mesh"
        raise MeshError(msg)
    return found, bary


def sample_operator(points: FloatArray, cells: IndexArray, xs: FloatArray, *,
                    weights_per_cell: FloatArray | None = None,
                    ) -> tuple[sp.csr_matrix, IndexArray]:
    """Sparse operator whose product with a P1 nodal field gives the (weighted) mean over points.

    Parameters
    ----------
    points, cells
        Mesh nodes [m] ``(3, n)`` and tetrahedra ``(4, m)``.
    xs
        Sample points [m], shape ``(3, k)``.
    weights_per_cell
        Optional weight of each cell (e.g. horizontal conductivity); the mean over the points
        is weighted by the weight of the cell that contains each point.

    Returns
    -------
    operator, cells
        A ``(1, n_nodes)`` matrix and the containing cell of every point.
    """
    cell_ids, bary = locate_points(points, cells, xs)
    w = np.ones(xs.shape[1]) if weights_per_cell is None else weights_per_cell[cell_ids]
    w = w / w.sum()
    cols = cells[:, cell_ids].ravel()
    vals = (bary * w).ravel()
    op = sp.csr_matrix((vals, (np.zeros(cols.size, dtype=np.int64), cols)),
                       shape=(1, points.shape[1]))
    op.sum_duplicates()
    return op, cell_ids
