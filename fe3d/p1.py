"""Compiled kernels for linear (P1) tetrahedra: geometry, the sparsity pattern of a mesh and
element matrices summed straight into that pattern (numba, one thread, no GPU).

Why compiled: at 1 M nodes (5.9 M tetrahedra) numpy needs (cells × 4 × 4) temporaries for
every term and a COO → CSR conversion that sorts 95 M entries; the loops below touch each
cell once and add into the CSR values in place (docs/performance.md). The CSR pattern of a
mesh is built once and shared by every operator on it, so matrices on the same mesh combine
by adding their value arrays.

Conventions: ``cells`` is ``(4, n_cells)``; ``grads[e, i]`` is ∇φ_i on cell e [1/m];
element matrices put the test node i in the row and the trial node j in the column.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numba
import numpy as np
import scipy.sparse as sp

from fe3d._indices import ONE, unsigned
from fe3d._typing import FloatArray, IndexArray
from fe3d.sgs import split_csr

__all__ = ["CELL_BLOCK", "MASS_FRACTION", "BoundaryFacets", "CsrPattern", "cell_gradients",
           "cells_spanning_zero", "gradients", "index_array", "index_type", "length_along",
           "node_graph", "split_rows", "sum_at_corners", "tensor_gradient",
           "transpose_positions", "volumes"]

MASS_FRACTION = (np.ones((4, 4)) + np.eye(4)) / 20.0
"""∫φ_iφ_j dV / V on a tetrahedron (exact for P1)."""

CELL_BLOCK = 1 << 16
"""Cells per block where a per-cell quantity is formed block by block instead of held for
every cell (the dispersion tensor: 72 bytes per cell whole, 4.5 MiB per block)."""

_jit = numba.njit(cache=True, nogil=True)


def index_type(count: int) -> type[np.signedinteger]:
    """The integer type that holds the ids 0 … ``count`` − 1: int32 (4 bytes) below 2³¹,
    int64 beyond."""
    return np.int32 if count < 2**31 else np.int64


def index_array(ids: IndexArray) -> IndexArray:
    """``ids`` (cells, node or cell ids) as a C-contiguous int32 or int64 array: itself when
    it already is one, int64 for any other type. The compiled kernels read either type (the
    arithmetic inside them is int64), so a mesh's int32 cells reach them without a copy (an
    int64 copy of the cells is 32 bytes per cell, about 0.18 KiB per node)."""
    ids = np.asarray(ids)
    kind = ids.dtype if ids.dtype in (np.int32, np.int64) else np.int64
    return np.ascontiguousarray(ids, dtype=kind)


@numba.njit(inline="always")
def cell_gradients(points: FloatArray, cells: IndexArray, e: int, g: FloatArray) -> float:
    """Basis gradients of cell e into ``g`` ``(4, 3)``; returns the signed volume."""
    i0, i1, i2, i3 = cells[0, e], cells[1, e], cells[2, e], cells[3, e]
    ax, ay, az = points[0, i1] - points[0, i0], points[1, i1] - points[1, i0], \
        points[2, i1] - points[2, i0]
    bx, by, bz = points[0, i2] - points[0, i0], points[1, i2] - points[1, i0], \
        points[2, i2] - points[2, i0]
    cx, cy, cz = points[0, i3] - points[0, i0], points[1, i3] - points[1, i0], \
        points[2, i3] - points[2, i0]
    # rows of the inverse Jacobian: (b×c, c×a, a×b) / det, det = a·(b×c)
    r1x, r1y, r1z = by * cz - bz * cy, bz * cx - bx * cz, bx * cy - by * cx
    r2x, r2y, r2z = cy * az - cz * ay, cz * ax - cx * az, cx * ay - cy * ax
    r3x, r3y, r3z = ay * bz - az * by, az * bx - ax * bz, ax * by - ay * bx
    det = ax * r1x + ay * r1y + az * r1z
    g[1, 0], g[1, 1], g[1, 2] = r1x / det, r1y / det, r1z / det
    g[2, 0], g[2, 1], g[2, 2] = r2x / det, r2y / det, r2z / det
    g[3, 0], g[3, 1], g[3, 2] = r3x / det, r3y / det, r3z / det
    for k in range(3):
        g[0, k] = -(g[1, k] + g[2, k] + g[3, k])
    return det / 6.0


@_jit
def _gradients_kernel(points: FloatArray, cells: IndexArray, grads: FloatArray,
                      vol: FloatArray) -> None:
    for e in range(cells.shape[1]):
        vol[e] = cell_gradients(points, cells, e, grads[e])


@_jit
def _volumes_kernel(points: FloatArray, cells: IndexArray, vol: FloatArray) -> None:
    g = np.empty((4, 3))
    for e in range(cells.shape[1]):
        vol[e] = cell_gradients(points, cells, e, g)


@_jit
def _length_kernel(points: FloatArray, cells: IndexArray, a: FloatArray,
                   out: FloatArray) -> None:
    g = np.empty((4, 3))
    for e in range(cells.shape[1]):
        cell_gradients(points, cells, e, g)
        proj = 0.0
        gmax = 0.0
        for i in range(4):
            proj += abs(a[0, e] * g[i, 0] + a[1, e] * g[i, 1] + a[2, e] * g[i, 2])
            gmax = max(gmax, np.sqrt(g[i, 0] ** 2 + g[i, 1] ** 2 + g[i, 2] ** 2))
        if proj > 0.0:
            out[e] = 2.0 * np.sqrt(a[0, e] ** 2 + a[1, e] ** 2 + a[2, e] ** 2) / proj
        else:
            out[e] = 2.0 / gmax


@_jit
def _tensor_gradient_kernel(points: FloatArray, cells: IndexArray, field: FloatArray,
                            tensors: FloatArray, tensor_of: IndexArray, scale: FloatArray,
                            out: FloatArray) -> None:
    g = np.empty((4, 3))
    for e in range(cells.shape[1]):
        cell_gradients(points, cells, e, g)
        gx = gy = gz = 0.0
        for i in range(4):
            u = field[cells[i, e]]
            gx += g[i, 0] * u
            gy += g[i, 1] * u
            gz += g[i, 2] * u
        t = tensor_of[e]
        for a in range(3):
            out[a, e] = scale[e] * (tensors[a, 0, t] * gx + tensors[a, 1, t] * gy
                                    + tensors[a, 2, t] * gz)


def _pc(points: FloatArray, cells: IndexArray) -> tuple[FloatArray, IndexArray]:
    return np.ascontiguousarray(points, dtype=float), index_array(cells)


def _pc_unsigned(points: FloatArray, cells: IndexArray) -> tuple[FloatArray, IndexArray]:
    """As :func:`_pc`, the cells as an unsigned view (fe3d._indices.unsigned): for the
    kernels that walk the pattern's rows (:func:`_cell_slots`)."""
    return np.ascontiguousarray(points, dtype=float), unsigned(index_array(cells))


def gradients(points: FloatArray, cells: IndexArray) -> tuple[FloatArray, FloatArray]:
    """Basis gradients ``(n_cells, 4, 3)`` [1/m] and signed volumes ``(n_cells,)`` [m³]."""
    grads = np.empty((cells.shape[1], 4, 3))
    vol = np.empty(cells.shape[1])
    _gradients_kernel(*_pc(points, cells), grads, vol)
    return grads, vol


def tensor_gradient(points: FloatArray, cells: IndexArray, field: FloatArray,
                    tensors: FloatArray, tensor_of: IndexArray, scale: FloatArray) -> FloatArray:
    """``scale[e] * tensors[:, :, tensor_of[e]] @ ∇u`` on every cell e, shape ``(3, n_cells)``,
    for the P1 nodal field u = ``field`` ``(n,)`` (constant on each cell); ``tensors``
    ``(3, 3, k)``, ``tensor_of`` and ``scale`` ``(n_cells,)``. Gradients are formed cell by
    cell, never stored."""
    out = np.empty((3, cells.shape[1]))
    _tensor_gradient_kernel(*_pc(points, cells), np.ascontiguousarray(field, dtype=float),
                            np.asarray(tensors, dtype=float),
                            np.ascontiguousarray(tensor_of, dtype=np.int64),
                            np.ascontiguousarray(scale, dtype=float), out)
    return out


def volumes(points: FloatArray, cells: IndexArray) -> FloatArray:
    """Signed volumes ``(n_cells,)`` [m³] (without keeping the gradients)."""
    vol = np.empty(cells.shape[1])
    _volumes_kernel(*_pc(points, cells), vol)
    return vol


def length_along(points: FloatArray, cells: IndexArray, a: FloatArray) -> FloatArray:
    """Element length along the direction of ``a`` ``(3, n_cells)``, h = 2|a| / Σ_i
    |a·∇φ_i| [m], or 2 / max_i |∇φ_i| where a = 0 (theory.md T7; the same as
    :func:`fe3d.transport.stabilization.element_length_along_flow` without the
    ``(n_cells, 4, 3)`` gradients)."""
    out = np.empty(cells.shape[1])
    _length_kernel(*_pc(points, cells), np.asarray(a, dtype=float), out)
    return out


@_jit
def _corner_sum_kernel(cells: IndexArray, per_cell: FloatArray, out: FloatArray) -> None:
    for i in range(4):  # vertex 0 of every cell first: the order of cells.ravel()
        for e in range(cells.shape[1]):
            out[cells[i, e]] += per_cell[e]


def sum_at_corners(cells: IndexArray, per_cell: FloatArray, n_nodes: int) -> FloatArray:
    """Σ over the cells at each node of the cell's value ``per_cell`` ``(n_cells,)``, shape
    ``(n_nodes,)``. Added in the order of ``np.bincount(cells.ravel(), weights=np.tile(
    per_cell, 4), minlength=n_nodes)``, so equal to it bit for bit, without its two
    ``(4 n_cells)`` temporaries (the tiled values, and an int64 copy of int32 cells)."""
    out = np.zeros(n_nodes)
    _corner_sum_kernel(index_array(cells), np.ascontiguousarray(per_cell, dtype=float), out)
    return out


@_jit
def _transpose_kernel(indptr: IndexArray, indices: IndexArray, out: IndexArray) -> None:
    for i in range(indptr.size - 1):
        for p in range(indptr[i], indptr[i + 1]):
            j = indices[p]
            lo, hi = indptr[j], indptr[j + 1]
            while lo < hi:  # row j's columns are sorted: bisect for column i
                mid = (lo + hi) // 2
                if indices[mid] < i:
                    lo = mid + 1
                else:
                    hi = mid
            out[p] = lo if lo < indptr[j + 1] and indices[lo] == i else -1


def transpose_positions(A: sp.csr_matrix) -> IndexArray:
    """For each stored entry p = (i, j) of ``A``, the position of its mirror entry (j, i)
    on the same CSR arrays (int32 below 2³¹ entries): ``A.data[transpose_positions(A)]`` are
    the values of Aᵀ on A's pattern. Needs sorted columns in every row and a structurally
    symmetric pattern; raises ValueError otherwise. One bisection per entry, and no
    transposed copy (scipy's ``A.T.tocsr()`` of the positions holds about 28 bytes per
    entry at once)."""
    if not A.has_sorted_indices:
        msg = "transpose positions need sorted column indices in every row"
        raise ValueError(msg)
    out = np.empty(A.indices.size, dtype=index_type(A.indices.size))
    _transpose_kernel(index_array(A.indptr), index_array(A.indices), out)
    if out.size and out.min() < 0:
        msg = "the pattern is not structurally symmetric: an entry (i, j) without (j, i)"
        raise ValueError(msg)
    return out


@_jit
def _spanning_kernel(cells: IndexArray, distance: FloatArray, out: np.ndarray) -> None:
    for e in range(cells.shape[1]):
        low = high = distance[cells[0, e]]
        for i in range(1, 4):
            d = distance[cells[i, e]]
            low, high = min(low, d), max(high, d)
        out[e] = high >= 0.0 and low <= 0.0


def cells_spanning_zero(cells: IndexArray, distance: FloatArray) -> np.ndarray:
    """True for each cell whose nodal ``distance`` ``(n_nodes,)`` has a value at or above
    zero and one at or below it (the cells its zero level crosses or touches), shape
    ``(n_cells,)``: one pass over the cells, without the ``(4, n_cells)`` gather of
    ``distance[cells]`` and its minimum and maximum (48 bytes per cell, about 0.26 KiB per
    node, the largest transient of a run's end)."""
    out = np.empty(np.shape(cells)[1], dtype=np.bool_)
    _spanning_kernel(index_array(cells), np.ascontiguousarray(distance, dtype=float), out)
    return out


@_jit
def _incident_cells(cells: IndexArray, n: int,
                    wanted: IndexArray) -> tuple[IndexArray, IndexArray]:
    """Node → incident cells as CSR (``start``, ``incident``), for the nodes marked in
    ``wanted`` (the others get empty rows)."""
    start = np.zeros(n + 1, np.int64)
    for e in range(cells.shape[1]):
        for a in range(4):
            if wanted[cells[a, e]]:
                start[cells[a, e] + 1] += 1
    for i in range(n):
        start[i + 1] += start[i]
    fill = start[:-1].copy()
    incident = np.empty(start[n], np.int64)
    for e in range(cells.shape[1]):
        for a in range(4):
            r = cells[a, e]
            if wanted[r]:
                incident[fill[r]] = e
                fill[r] += 1
    return start, incident


@_jit
def _neighbours(r: int, start: IndexArray, incident: IndexArray, cells: IndexArray,
                mark: IndexArray, out: IndexArray) -> int:
    """Write the distinct nodes sharing a cell with node r (r included) into ``out``;
    return how many. ``mark`` remembers the last row that saw each node."""
    count = 0
    for p in range(start[r], start[r + 1]):
        e = incident[p]
        for b in range(4):
            c = cells[b, e]
            if mark[c] != r:
                mark[c] = r
                out[count] = c
                count += 1
    return count


@numba.njit(inline="always")
def _insertion_sort(row: IndexArray, count: int) -> None:
    """Sort ``row[:count]`` in place (rows of a tetrahedral mesh hold about 15 entries)."""
    for k in range(1, count):
        v = row[k]
        i = k - 1
        while i >= 0 and row[i] > v:
            row[i + 1] = row[i]
            i -= 1
        row[i + 1] = v


@_jit
def _pattern_kernel(cells: IndexArray, n: int) -> tuple[IndexArray, IndexArray]:
    """Row pointers and sorted columns of the node pairs sharing a cell, in one pass over
    the rows (the column array grows by doubling)."""
    start, incident = _incident_cells(cells, n, np.ones(n, np.bool_))
    widest = 0
    for r in range(n):
        widest = max(widest, start[r + 1] - start[r])
    row = np.empty(4 * widest, np.int64)
    mark = np.full(n, -1, np.int64)
    indptr = np.zeros(n + 1, np.int64)
    indices = np.empty(max(16 * n, 16), np.int32)
    for r in range(n):
        count = _neighbours(r, start, incident, cells, mark, row)
        _insertion_sort(row, count)
        first = indptr[r]
        if first + count > indices.size:
            grown = np.empty(2 * indices.size + count, np.int32)
            grown[:first] = indices[:first]
            indices = grown
        for k in range(count):
            indices[first + k] = row[k]
        indptr[r + 1] = first + count
    return indptr, indices[:indptr[n]].copy()


def node_graph(cells: IndexArray, n: int) -> sp.csr_matrix:
    """The node adjacency of tetrahedra ``cells`` ``(4, m)`` as an ``(n, n)`` CSR matrix of
    ones (node pairs sharing a cell, the diagonal included), without the (16 m)-entry COO
    temporaries."""
    indptr, indices = _pattern_kernel(index_array(cells), n)
    return sp.csr_matrix((np.ones(indices.size, dtype=np.int8), indices, indptr),
                         shape=(n, n))


def split_rows(A: sp.csr_matrix, free: IndexArray,
               fixed: IndexArray) -> tuple[sp.csr_matrix, sp.csr_matrix]:
    """``(A[free][:, free], A[free][:, fixed])`` in one pass (``free`` and ``fixed``
    sorted, together every row index once): the blocks of a system reduced to its free
    unknowns, without scipy's two fancy-indexing copies."""
    n = A.shape[0]
    side = np.ones(n, dtype=np.int8)
    side[free] = 0
    new_id = np.empty(n, dtype=np.int64)
    new_id[free] = np.arange(free.size)
    new_id[fixed] = np.arange(fixed.size)
    fp, fi, fv, dp, di, dv = split_csr(A, free, side, new_id)
    ff = sp.csr_matrix((fv, fi, fp), shape=(free.size, free.size))
    fd = sp.csr_matrix((dv, di, dp), shape=(free.size, fixed.size))
    if A.has_sorted_indices:  # columns keep their order within each block
        ff.has_sorted_indices = fd.has_sorted_indices = True
    return ff, fd


@_jit
def _owner_kernel(cells: IndexArray, tri: IndexArray, n: int) -> IndexArray:
    wanted = np.zeros(n, np.bool_)  # only the facets' first nodes
    for f in range(tri.shape[1]):
        wanted[tri[0, f]] = True
    start, incident = _incident_cells(cells, n, wanted)
    owner = np.full(tri.shape[1], -1, np.int64)
    for f in range(tri.shape[1]):
        for p in range(start[tri[0, f]], start[tri[0, f] + 1]):
            e = incident[p]
            hits = 0
            for a in range(4):
                c = cells[a, e]
                if c == tri[1, f] or c == tri[2, f]:
                    hits += 1
            if hits == 2:
                owner[f] = e
                break
    return owner


@dataclass(frozen=True)
class BoundaryFacets:
    """Boundary triangles ``tri`` ``(3, k)`` with the cell each belongs to, the outward
    unit normal ``(3, k)`` and the area ``(k,)`` [m²]; P1 boundary integrals of a value
    constant per facet in closed form (exact)."""

    tri: IndexArray
    cell: IndexArray
    normal: FloatArray
    area: FloatArray

    @classmethod
    def of(cls, points: FloatArray, cells: IndexArray, tri: IndexArray) -> BoundaryFacets:
        """Facets ``tri`` of the mesh (``ValueError`` if one is not a face of any cell)."""
        tri = np.ascontiguousarray(tri, dtype=np.int64)
        owner = _owner_kernel(index_array(cells), tri, points.shape[1])
        if np.any(owner < 0):
            msg = "a boundary triangle is not a face of any cell of the mesh"
            raise ValueError(msg)
        p0, p1, p2 = (points[:, tri[i]] for i in range(3))
        cross = np.cross(p1 - p0, p2 - p0, axis=0)
        area2 = np.linalg.norm(cross, axis=0)
        normal = cross / area2
        centre = points[:, cells[:, owner]].mean(axis=1)  # inside the owning cell
        normal *= np.where(np.einsum("ik,ik->k", normal, centre - p0) > 0, -1.0, 1.0)
        return cls(tri=tri, cell=owner, normal=normal, area=area2 / 2.0)

    def normal_flux(self, q: FloatArray) -> FloatArray:
        """q·n [m/s] on each facet from the per-cell flux ``q`` ``(3, n_cells)``."""
        return np.einsum("ik,ik->k", q[:, self.cell], self.normal)

    def subset(self, keep: IndexArray) -> BoundaryFacets:
        """The facets selected by a boolean mask or index array."""
        return BoundaryFacets(tri=self.tri[:, keep], cell=self.cell[keep],
                              normal=self.normal[:, keep], area=self.area[keep])

    def load(self, value: FloatArray, n: int) -> FloatArray:
        """∫ g φ_i dS per node for g constant on each facet: g A / 3 at its corners."""
        return np.bincount(self.tri.ravel(), weights=np.tile(value * self.area / 3.0, 3),
                           minlength=n)

    def mass(self, value: FloatArray, n: int) -> sp.csr_matrix:
        """∫ g φ_i φ_j dS for g constant on each facet: g A (1 + δ_ij) / 12."""
        rows = np.repeat(self.tri, 3, axis=0).ravel()
        cols = np.tile(self.tri, (3, 1)).ravel()
        local = (np.ones((3, 3)) + np.eye(3)) / 12.0
        vals = (local.ravel()[:, None] * (value * self.area)[None, :]).ravel()
        return sp.coo_matrix((vals, (rows, cols)), shape=(n, n)).tocsr()


@numba.njit(inline="always")
def _slot(indptr: IndexArray, indices: IndexArray, row: int, col: int) -> int:
    """Position of (row, col) in the CSR value array (binary search in the sorted row)."""
    lo, hi = indptr[row], indptr[row + 1]
    while lo < hi:
        mid = (lo + hi) >> 1
        if indices[mid] < col:
            lo = mid + 1
        else:
            hi = mid
    return lo


@numba.njit(inline="always")
def _cell_slots(indptr: IndexArray, indices: IndexArray, cells: IndexArray, e: int,
                pos: IndexArray) -> None:
    """Positions of cell e's 16 element-matrix entries (entry (i, j) at 4i + j) in the CSR
    value array, found by one walk along each of the cell's four sorted rows with the
    cell's nodes in increasing order (nothing is stored per cell)."""
    a, b, c, d = 0, 1, 2, 3
    # the four local indices sorted by node id (a 4-element sorting network)
    if cells[a, e] > cells[b, e]:
        a, b = b, a
    if cells[c, e] > cells[d, e]:
        c, d = d, c
    if cells[a, e] > cells[c, e]:
        a, c = c, a
    if cells[b, e] > cells[d, e]:
        b, d = d, b
    if cells[b, e] > cells[c, e]:
        b, c = c, b
    for i in range(4):
        p = indptr[cells[i, e]]
        for j in (a, b, c, d):
            col = cells[j, e]
            while indices[p] < col:
                p += ONE
            pos[4 * i + j] = p


@_jit
def _absorb_kernel(indptr: IndexArray, indices: IndexArray, a_indptr: IndexArray,
                   a_indices: IndexArray, a_data: FloatArray, data: FloatArray) -> int:
    for r in range(a_indptr.size - 1):
        for p in range(a_indptr[r], a_indptr[r + 1]):
            c = a_indices[p]
            s = _slot(indptr, indices, r, c)
            if s >= indptr[r + 1] or indices[s] != c:
                return r
            data[s] += a_data[p]
    return -1


@_jit
def _local_kernel(indptr: IndexArray, indices: IndexArray, cells: IndexArray,
                  cell_ids: IndexArray, local: FloatArray, data: FloatArray) -> None:
    pos = np.empty(16, np.int64)
    for p in range(cell_ids.size):
        e = cell_ids[p]
        _cell_slots(indptr, indices, cells, e, pos)
        for i in range(4):
            for j in range(4):
                data[pos[4 * i + j]] += local[p, i, j]


@_jit
def _stiffness_kernel(indptr: IndexArray, indices: IndexArray, cell_ids: IndexArray,
                      points: FloatArray, cells: IndexArray, tensors: FloatArray,
                      tensor_of: IndexArray, scale: FloatArray, data: FloatArray) -> None:
    """Σ over cells ``cell_ids[p]`` of scale[p] · T[tensor_of[p]] stiffness entries."""
    g = np.empty((4, 3))
    tg = np.empty((4, 3))
    pos = np.empty(16, np.int64)
    for p in range(cell_ids.size):
        e = cell_ids[p]
        _cell_slots(indptr, indices, cells, e, pos)
        t = tensor_of[p]
        v = abs(cell_gradients(points, cells, e, g)) * scale[p]
        for j in range(4):
            for a in range(3):
                tg[j, a] = (tensors[a, 0, t] * g[j, 0] + tensors[a, 1, t] * g[j, 1]
                            + tensors[a, 2, t] * g[j, 2])
        for i in range(4):
            for j in range(4):
                data[pos[4 * i + j]] += v * (g[i, 0] * tg[j, 0] + g[i, 1] * tg[j, 1]
                                             + g[i, 2] * tg[j, 2])


@_jit
def _transport_kernel(indptr: IndexArray, indices: IndexArray, points: FloatArray,
                      cells: IndexArray, m: FloatArray,
                      m_supg: FloatArray, k: FloatArray, q: FloatArray, a: FloatArray,
                      tau: FloatArray, theta_d: FloatArray, first: int, galerkin: bool,
                      supg: bool, mass: FloatArray, spatial: FloatArray) -> None:
    """Cells ``first`` to ``first + theta_d.shape[2]``; ``theta_d`` holds their tensors."""
    g = np.empty((4, 3))
    tg = np.empty((4, 3))
    ag = np.empty(4)
    qg = np.empty(4)
    pos = np.empty(16, np.int64)
    for e in range(first, first + theta_d.shape[2]):
        v = abs(cell_gradients(points, cells, e, g))
        _cell_slots(indptr, indices, cells, e, pos)
        t = e - first
        for i in range(4):
            ag[i] = a[0, e] * g[i, 0] + a[1, e] * g[i, 1] + a[2, e] * g[i, 2]
            qg[i] = q[0, e] * g[i, 0] + q[1, e] * g[i, 1] + q[2, e] * g[i, 2]
            for c in range(3):
                tg[i, c] = (theta_d[c, 0, t] * g[i, 0] + theta_d[c, 1, t] * g[i, 1]
                            + theta_d[c, 2, t] * g[i, 2])
        w = tau[e] * v
        for i in range(4):
            for j in range(4):
                mv = 0.0
                kv = 0.0
                if galerkin:  # T1 storage, T2 advection, T4 dispersion, T5 decay
                    frac = 0.1 if i == j else 0.05
                    disp = g[i, 0] * tg[j, 0] + g[i, 1] * tg[j, 1] + g[i, 2] * tg[j, 2]
                    mv += m[e] * v * frac
                    kv += -qg[i] * v * 0.25 + v * disp + k[e] * v * frac
                if supg:  # T6: τ (a·∇φ_i) × (storage, advection, decay)
                    mv += w * m_supg[e] * 0.25 * ag[i]
                    kv += w * ag[i] * qg[j] + w * k[e] * 0.25 * ag[i]
                s = pos[4 * i + j]
                mass[s] += mv
                spatial[s] += kv


@dataclass(frozen=True)
class CsrPattern:
    """Sparsity pattern of the P1 operators on one mesh: row pointers and sorted column
    indices of every node pair that shares a cell (the diagonal included), and the cells
    ``(4, n_cells)`` it was built from (the mesh's own array, not a copy). Assembly is one
    pass over the cells; each cell's 16 entry positions are searched in its four sorted
    rows as the cell is added, so nothing is stored per cell (a table of them took 64
    bytes per cell, 0.35 KiB per node; docs/performance.md)."""

    indptr: IndexArray
    indices: IndexArray
    cells: IndexArray
    n: int

    @classmethod
    def of_cells(cls, cells: IndexArray, n: int) -> CsrPattern:
        """The pattern of tetrahedra ``cells`` ``(4, m)`` on ``n`` nodes."""
        c = index_array(cells)
        indptr, indices = _pattern_kernel(c, n)
        if indptr[-1] >= 2**31:
            msg = f"{int(indptr[-1])} matrix entries: more than 32-bit indices can hold"
            raise ValueError(msg)
        indptr = indptr.astype(np.int32)
        return cls(indptr=indptr, indices=indices, cells=c, n=n)

    @property
    def nnz(self) -> int:
        """Number of stored entries."""
        return int(self.indices.size)

    def matrix(self, data: FloatArray) -> sp.csr_matrix:
        """A CSR matrix on this pattern with the given values (not copied)."""
        A = sp.csr_matrix((data, self.indices, self.indptr), shape=(self.n, self.n),
                          copy=False)
        A.has_sorted_indices = True
        return A

    def values_of(self, A: sp.spmatrix) -> FloatArray:
        """The value array, on this pattern, of a matrix whose entries all lie in it (a
        boundary or well term, a diagonal); :class:`ValueError` otherwise."""
        A = sp.csr_matrix(A)
        A.sum_duplicates()
        data = np.zeros(self.nnz)
        bad = _absorb_kernel(self.indptr, self.indices, A.indptr.astype(np.int64),
                             A.indices.astype(np.int64), A.data.astype(float), data)
        if bad >= 0:
            msg = f"row {bad} of the matrix has an entry outside the mesh's pattern"
            raise ValueError(msg)
        return data

    def _ids(self, cell_ids: IndexArray | None) -> IndexArray:
        if cell_ids is None:
            return np.arange(self.cells.shape[1], dtype=np.int64)
        return np.ascontiguousarray(cell_ids, dtype=np.int64)

    def element_sum(self, local: FloatArray,
                    cell_ids: IndexArray | None = None) -> sp.csr_matrix:
        """Σ_e of element matrices ``local[p, i, j]`` of the cells ``cell_ids`` (all cells
        when None, in order)."""
        data = np.zeros(self.nnz)
        _local_kernel(unsigned(self.indptr), unsigned(self.indices), unsigned(self.cells),
                      self._ids(cell_ids),
                      np.ascontiguousarray(local, dtype=float), data)
        return self.matrix(data)

    def stiffness(self, points: FloatArray, cells: IndexArray, tensors: FloatArray,
                  cell_ids: IndexArray | None = None, *, tensor_of: IndexArray | None = None,
                  scale: FloatArray | None = None) -> sp.csr_matrix:
        """∫ ∇φ_i · T ∇φ_j dV = |V| ∇φ_i·T∇φ_j summed over the cells ``cell_ids`` (all when
        None) of the mesh ``points``, ``cells``. Gradients are formed cell by cell, never
        stored.

        Without ``tensor_of``, ``tensors`` ``(3, 3, len(cell_ids))`` holds each cell's T.
        With it, the p-th cell's T is ``scale[p] * tensors[:, :, tensor_of[p]]`` (a few
        shared tensors, e.g. one per material, times a value per cell; ``scale`` 1 when
        None), so that no (3, 3, n_cells) array is formed.
        """
        ids = self._ids(cell_ids)
        if tensor_of is None:
            tensor_of = np.arange(ids.size)
        data = np.zeros(self.nnz)
        _stiffness_kernel(unsigned(self.indptr), unsigned(self.indices), ids,
                          *_pc_unsigned(points, cells),
                          np.asarray(tensors, dtype=float),
                          np.ascontiguousarray(tensor_of, dtype=np.int64),
                          np.ones(ids.size) if scale is None else np.asarray(scale, dtype=float),
                          data)
        return self.matrix(data)

    def transport(self, points: FloatArray, cells: IndexArray, *, m: FloatArray,
                  m_supg: FloatArray, k: FloatArray, q: FloatArray, a: FloatArray,
                  tau: FloatArray, theta_d: FloatArray | Callable[[int, int], FloatArray],
                  galerkin: bool, supg: bool) -> tuple[sp.csr_matrix, sp.csr_matrix]:
        """Mass and spatial transport operators over all cells (theory.md T1, T2, T4–T6);
        :func:`fe3d.transport.assembly.transport_operators` documents the terms. Gradients
        are formed cell by cell, never stored. ``theta_d`` is the ``(3, 3, n_cells)`` tensor
        per cell, or a function giving it for the cells ``start:stop``, called for blocks of
        :data:`CELL_BLOCK` cells in order (the sums are the same, bit for bit, as with the
        whole array: cells are added in the same order)."""
        mass, spatial = np.zeros(self.nnz), np.zeros(self.nnz)
        f = np.asarray
        n_cells = cells.shape[1]
        blocks = [(0, n_cells)] if not callable(theta_d) else [
            (s, min(s + CELL_BLOCK, n_cells)) for s in range(0, n_cells, CELL_BLOCK)]
        pc = _pc_unsigned(points, cells)
        coefficients = (f(m, dtype=float), f(m_supg, dtype=float), f(k, dtype=float),
                        f(q, dtype=float), f(a, dtype=float), f(tau, dtype=float))
        for start, stop in blocks:
            tensors = theta_d(start, stop) if callable(theta_d) else theta_d
            _transport_kernel(unsigned(self.indptr), unsigned(self.indices), *pc,
                              *coefficients,
                              f(tensors, dtype=float), start, galerkin, supg, mass, spatial)
        return self.matrix(mass), self.matrix(spatial)
