"""Compiled kernels of the layered mesh (numba, one thread): the prisms of a plan
triangulation split into tetrahedra, the cells ordered by their lowest node, their
orientation, and the boundary triangles.

Why compiled: at 927 k nodes (5.3 M tetrahedra) the numpy versions stacked, sorted and
hashed arrays of (cells × 4) entries and took 9.0 s (extrusion), 5.2 s (orientation), 2.7 s
(boundary triangles) and 0.5 s (cell order) of a 37 s mesh; each kernel below passes over the
cells once or twice and gives the same arrays, entry for entry (docs/performance.md, Mesh).
"""

from __future__ import annotations

import numba
import numpy as np

from fe3d._typing import IndexArray
from fe3d.p1 import index_array, index_type

__all__ = ["boundary_triangles", "order_by_lowest_node", "orient_positive", "signed_volumes",
           "split_prisms"]

_jit = numba.njit(cache=True, nogil=True)


@_jit
def _prism_kernel(t: IndexArray, canon: IndexArray, layer_unit: IndexArray,
                  cells: IndexArray, unit: IndexArray, level: IndexArray,
                  plan_tri: IndexArray) -> int:
    """Write the tetrahedra that do not collapse (four distinct nodes) into the outputs, in
    the order cell layer → split type → plan triangle, when they have room; return how many
    there are (a first call with empty outputs counts them)."""
    room = cells.shape[1]
    count = 0
    node = np.empty(4, np.int64)
    for lv in range(canon.shape[0] - 1):
        first, last = (0, 2) if lv % 2 == 0 else (2, 0)  # odd layers: the mirror image
        for kind in range(3):
            for e in range(t.shape[1]):
                v0, v1, v2 = t[first, e], t[1, e], t[last, e]
                b0, b1, b2 = canon[lv + 1, v0], canon[lv + 1, v1], canon[lv + 1, v2]
                u0, u1, u2 = canon[lv, v0], canon[lv, v1], canon[lv, v2]
                if kind == 0:
                    node[0], node[1], node[2], node[3] = b0, b1, b2, u2
                elif kind == 1:
                    node[0], node[1], node[2], node[3] = b0, b1, u1, u2
                else:
                    node[0], node[1], node[2], node[3] = b0, u0, u1, u2
                if (node[0] == node[1] or node[0] == node[2] or node[0] == node[3]
                        or node[1] == node[2] or node[1] == node[3] or node[2] == node[3]):
                    continue  # collapsed where a unit has zero thickness
                if count < room:
                    for i in range(4):
                        cells[i, count] = node[i]
                    unit[count] = layer_unit[lv]
                    level[count] = lv
                    plan_tri[count] = e
                count += 1
    return count


def split_prisms(tri: IndexArray, canon: IndexArray, layer_unit: IndexArray,
                 ) -> tuple[IndexArray, IndexArray, IndexArray, IndexArray]:
    """Tetrahedra of the prisms between consecutive levels (the split rule of
    :func:`fe3d.mesh.build.extrude`).

    Parameters
    ----------
    tri
        Plan triangles with their nodes in increasing order, shape ``(3, m2)``.
    canon
        Node id of every level at every plan node, shape ``(L, n2)`` (equal ids where a
        column's nodes were merged).
    layer_unit
        Unit index of each cell layer, shape ``(L - 1,)``.

    Returns
    -------
    cells, unit, level, plan_tri
        Tetrahedra ``(4, m)`` (node ids of ``canon``; int32 unless ``canon`` has 2³¹ entries
        or more) and each one's unit, upper level and plan triangle ``(m,)``.
    """
    t = np.ascontiguousarray(tri, dtype=np.int64)
    canon = np.ascontiguousarray(canon, dtype=np.int64)
    layer_unit = np.ascontiguousarray(layer_unit, dtype=np.int64)
    none = np.empty((4, 0), np.int64)
    m = _prism_kernel(t, canon, layer_unit, none, none[0], none[0], none[0])
    cells = np.empty((4, m), index_type(canon.size))  # ids of canon: below its size
    unit, level, plan_tri = (np.empty(m, np.int64) for _ in range(3))
    _prism_kernel(t, canon, layer_unit, cells, unit, level, plan_tri)
    return cells, unit, level, plan_tri


@_jit
def _order_kernel(cells: IndexArray, new_id: IndexArray) -> IndexArray:
    n = new_id.size
    start = np.zeros(n + 1, np.int64)
    lowest = np.empty(cells.shape[1], np.int64)
    for e in range(cells.shape[1]):
        lowest[e] = min(min(new_id[cells[0, e]], new_id[cells[1, e]]),
                        min(new_id[cells[2, e]], new_id[cells[3, e]]))
        start[lowest[e] + 1] += 1
    for i in range(n):
        start[i + 1] += start[i]
    order = np.empty(cells.shape[1], np.int64)
    for e in range(cells.shape[1]):  # a counting sort: stable
        order[start[lowest[e]]] = e
        start[lowest[e]] += 1
    return order


def _ids(new_id: IndexArray | None, n: int) -> IndexArray:
    return np.arange(n, dtype=np.int64) if new_id is None else \
        np.ascontiguousarray(new_id, dtype=np.int64)


def order_by_lowest_node(cells: IndexArray, n: int, new_id: IndexArray | None = None,
                         ) -> IndexArray:
    """The cell order by lowest node id, ties in their given order (the same as
    ``np.argsort(new_id[cells].min(axis=0), kind="stable")``, in linear time and without
    the renumbered copy), shape ``(m,)``. ``new_id`` ``(n,)``: a renumbering of the nodes
    (none when not given)."""
    return _order_kernel(index_array(cells), _ids(new_id, n))


@numba.njit(inline="always")
def _six_volume(points: np.ndarray, a: int, b: int, c: int, d: int) -> float:
    """(b − a)·((c − a) × (d − a)), six times the signed volume, in numpy's order of
    operations (``np.cross`` then a three-term sum), so that it rounds the same."""
    bx, by, bz = (points[0, b] - points[0, a], points[1, b] - points[1, a],
                  points[2, b] - points[2, a])
    cx, cy, cz = (points[0, c] - points[0, a], points[1, c] - points[1, a],
                  points[2, c] - points[2, a])
    dx, dy, dz = (points[0, d] - points[0, a], points[1, d] - points[1, a],
                  points[2, d] - points[2, a])
    return bx * (cy * dz - cz * dy) + by * (cz * dx - cx * dz) + bz * (cx * dy - cy * dx)


@_jit
def _orient_kernel(points: np.ndarray, cells: IndexArray) -> None:
    for e in range(cells.shape[1]):
        b, c = cells[1, e], cells[2, e]
        if _six_volume(points, cells[0, e], b, c, cells[3, e]) < 0.0:
            cells[1, e], cells[2, e] = c, b


@_jit
def _volume_kernel(points: np.ndarray, cells: IndexArray, out: np.ndarray) -> None:
    for e in range(cells.shape[1]):
        out[e] = _six_volume(points, cells[0, e], cells[1, e], cells[2, e], cells[3, e]) / 6.0


def signed_volumes(points: np.ndarray, cells: IndexArray) -> np.ndarray:
    """Signed volume of every tetrahedron [m³], shape ``(m,)``, rounded as numpy's
    ``einsum(b − a, cross(c − a, d − a)) / 6`` rounds it."""
    out = np.empty(cells.shape[1])
    _volume_kernel(np.ascontiguousarray(points, dtype=float),
                   index_array(cells), out)
    return out


@_jit
def _take_columns(cells: IndexArray, order: IndexArray, new_id: IndexArray,
                  out: IndexArray) -> None:
    for e in range(order.size):
        for i in range(4):
            out[i, e] = new_id[cells[i, order[e]]]


def orient_positive(points: np.ndarray, cells: IndexArray, order: IndexArray,
                    new_id: IndexArray | None = None) -> IndexArray:
    """``new_id[cells[:, order]]`` ``(4, m)`` (``cells[:, order]`` without ``new_id``) with
    nodes 1 and 2 swapped where the signed volume is negative, so that every cell of nonzero
    volume is positively oriented (a new array, int32 below 2³¹ nodes; ``points`` are those
    of the new ids)."""
    out = np.empty((4, order.size), index_type(points.shape[1]))
    _take_columns(index_array(cells), order,
                  _ids(new_id, points.shape[1]), out)
    _orient_kernel(np.ascontiguousarray(points, dtype=float), out)
    return out


@numba.njit(inline="always")
def _sorted3(x: int, y: int, z: int) -> tuple[int, int, int]:
    if x > y:
        x, y = y, x
    if y > z:
        y, z = z, y
    if x > y:
        x, y = y, x
    return x, y, z


@numba.njit(inline="always")
def _insertion_sort(a: IndexArray, lo: int, hi: int) -> None:
    """Sort ``a[lo:hi]`` in place (the few faces filed under one node)."""
    for p in range(lo + 1, hi):
        v = a[p]
        q = p - 1
        while q >= lo and a[q] > v:
            a[q + 1] = a[q]
            q -= 1
        a[q + 1] = v


@numba.njit(inline="always")
def _alone(a: IndexArray, lo: int, hi: int, p: int) -> bool:
    return (p == lo or a[p] != a[p - 1]) and (p == hi - 1 or a[p] != a[p + 1])


@_jit
def _boundary_kernel(cells: IndexArray, n: int) -> IndexArray:
    """Triangles that belong to exactly one cell, their nodes increasing, in increasing
    order of (first, second, third) node: every face is filed under its lowest node, and the
    faces of one node are sorted by their other two."""
    m = cells.shape[1]
    start = np.zeros(n + 1, np.int64)
    for e in range(m):
        for skip in range(4):
            low = min(min(cells[(skip + 1) % 4, e], cells[(skip + 2) % 4, e]),
                      cells[(skip + 3) % 4, e])
            start[low + 1] += 1
    for i in range(n):
        start[i + 1] += start[i]
    fill = start[:-1].copy()
    rest = np.empty(4 * m, np.int64)  # the other two nodes as one code: second * n + third
    for e in range(m):
        for skip in range(4):
            x, y, z = _sorted3(cells[(skip + 1) % 4, e], cells[(skip + 2) % 4, e],
                               cells[(skip + 3) % 4, e])
            rest[fill[x]] = y * n + z
            fill[x] += 1
    single = 0
    for a in range(n):
        _insertion_sort(rest, start[a], start[a + 1])
        for p in range(start[a], start[a + 1]):
            if _alone(rest, start[a], start[a + 1], p):
                single += 1
    out = np.empty((3, single), np.int64)
    k = 0
    for a in range(n):
        for p in range(start[a], start[a + 1]):
            if _alone(rest, start[a], start[a + 1], p):
                out[0, k], out[1, k], out[2, k] = a, rest[p] // n, rest[p] % n
                k += 1
    return out


def boundary_triangles(cells: IndexArray, n: int) -> IndexArray:
    """Faces of exactly one tetrahedron, shape ``(3, k)``: each triangle's nodes increasing,
    the triangles in increasing (first, second, third) order (linear time)."""
    return _boundary_kernel(index_array(cells), n)
