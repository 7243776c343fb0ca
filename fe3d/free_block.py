"""A step matrix's free block and its SSOR splitting, read off the step operators in place.

A step matrix S = ca·A + cb·B is held as a :class:`fe3d.sgs.LinearCombination` on the arrays
of its operators (B on the mesh's pattern; A on that pattern too, or a diagonal matrix of its
own). A solve needs its block S_ff on the free (not held) nodes, and the Gauss–Seidel
splitting of S_ff (fe3d/sgs.py). Copying S_ff into two CSR triangles costs a value and a
column index per entry (about 12 bytes) for every step system kept. Here the passes run
instead over S's rows r = free[i], skip held columns, and form every value as S's own CSR
copy would, ``ca * a[p] + cb * b[p]`` (A on the pattern) or ``cb * b[p]`` with
``ca * A_rr`` added at the diagonal (A diagonal). The free nodes keep their order
(``free`` sorted), so an entry below the diagonal in the free numbering is below it in S's,
and the entries of a triangle come in the same order as in the copy: with the same partial
sums (the second of two alternates over the kept entries only) every product and solve is
bit for bit that of :class:`fe3d.sgs.SymmetricGaussSeidel` on the copy.
"""

from __future__ import annotations

from typing import NamedTuple

import numba
import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from fe3d._indices import ONE, unsigned
from fe3d._typing import FloatArray, IndexArray
from fe3d.sgs import GaussSeidelSplitting, LinearCombination, rows_sorted

__all__ = ["BlockArrays", "BlockGaussSeidel", "FreeBlock"]

_jit = numba.njit(cache=True, nogil=True)

# Every kernel takes S's free block as the ten fields of a BlockArrays, in order. As in
# fe3d/sgs.py the triangular solves keep two partial sums: in pairs of entries on a row with
# no held column, and on a row with one alternately over the kept entries (the two sums
# swap after each), so that every row's sums are those of the copy.


class BlockArrays(NamedTuple):
    """What the kernels read of S_ff (S's own arrays, not copied, and the free block's
    maps)."""

    indptr: IndexArray  # S's pattern (B's): row pointers
    indices: IndexArray  # its sorted columns
    a: FloatArray  # A's values on the pattern (B's values as a stand-in when A is diagonal)
    ca: float
    b: FloatArray  # B's values
    cb: float
    on_pattern: bool  # A on the pattern (else its diagonal is in the block's main diagonal)
    rows: IndexArray  # the free rows, sorted (the caller's array)
    place: IndexArray  # each node's index among the free nodes, or −1 − among the held ones
    at: IndexArray  # each free row's diagonal position in the pattern


@_jit
def _diagonal_at(indptr: IndexArray, indices: IndexArray, rows: IndexArray) -> IndexArray:
    """Position of (r, r) in each row r of ``rows`` (−1 where it is not stored)."""
    out = np.full(rows.size, -1, indptr.dtype)
    for i in range(rows.size):
        r = rows[i]
        for p in range(indptr[r], indptr[r + 1]):
            if indices[p] == r:
                out[i] = p
    return out


@_jit
def _touches_held(indptr: IndexArray, indices: IndexArray, rows: IndexArray,
                  place: IndexArray) -> np.ndarray:
    """True for each row of ``rows`` with an entry in a held column."""
    out = np.zeros(rows.size, np.bool_)
    for i in range(rows.size):
        for p in range(indptr[rows[i]], indptr[rows[i] + 1]):
            if place[indices[p]] < 0:
                out[i] = True
    return out


@_jit
def _solve(indptr: IndexArray, indices: IndexArray, a: FloatArray, ca: float, b: FloatArray,
           cb: float, on_pattern: bool, rows: IndexArray, place: IndexArray, at: IndexArray,
           touches_held: np.ndarray, upper: bool, inv_d: FloatArray, v: FloatArray,
           out: FloatArray, f: FloatArray) -> None:
    """out = (D + U)⁻¹ v (``upper``, rows last to first) or (D + L)⁻¹ v (first to last).
    Each result is also kept by node number in ``f`` (length n, scratch), so that a row
    with no held column (all but a few) reads it without the free-index map and takes its
    entries in pairs, as on the copy; a row with one skips it."""
    n = rows.size
    for k in range(n):
        i = n - 1 - k if upper else k
        r = rows[i]
        p, q = (at[i] + ONE, indptr[r + 1]) if upper else (indptr[r], at[i])
        s1, s2 = v[i], 0.0
        if touches_held[i]:
            for m in range(p, q):
                c = indices[m]
                if place[c] >= 0:
                    x = ca * a[m] + cb * b[m] if on_pattern else cb * b[m]
                    s1, s2 = s2, s1 - x * f[c]
        else:
            while p + ONE < q:
                x1 = ca * a[p] + cb * b[p] if on_pattern else cb * b[p]
                x2 = ca * a[p + ONE] + cb * b[p + ONE] if on_pattern else cb * b[p + ONE]
                s1 -= x1 * f[indices[p]]
                s2 -= x2 * f[indices[p + ONE]]
                p += ONE + ONE
            if p < q:
                x1 = ca * a[p] + cb * b[p] if on_pattern else cb * b[p]
                s1 -= x1 * f[indices[p]]
        out[i] = f[r] = (s1 + s2) * inv_d[i]


@_jit
def _split_product(indptr: IndexArray, indices: IndexArray, a: FloatArray, ca: float,
                   b: FloatArray, cb: float, on_pattern: bool, rows: IndexArray,
                   place: IndexArray, at: IndexArray, touches_held: np.ndarray,
                   d: FloatArray, inv_d: FloatArray, e: FloatArray, v: FloatArray,
                   w: FloatArray, out: FloatArray, f: FloatArray) -> None:
    """out = Â v (fe3d/sgs.py, ``_split_product``: the same arithmetic) with d = D/ω and
    e = 2D/ω − D: w = (D/ω + U)⁻¹ v, then out = D/ω [w + (D/ω + L)⁻¹(v − e w)]."""
    _solve(indptr, indices, a, ca, b, cb, on_pattern, rows, place, at, touches_held, True,
           inv_d, v, w, f)
    for i in range(v.size):
        out[i] = v[i] - e[i] * w[i]
    # in place: row i reads out[i] before it writes it, and the others' values from f
    _solve(indptr, indices, a, ca, b, cb, on_pattern, rows, place, at, touches_held, False,
           inv_d, out, out, f)
    for i in range(v.size):
        out[i] = d[i] * (w[i] + out[i])


@_jit
def _lower_solve_pair(indptr: IndexArray, indices: IndexArray, a: FloatArray, ca: float,
                      b: FloatArray, cb: float, on_pattern: bool, rows: IndexArray,
                      place: IndexArray, at: IndexArray, inv_d: FloatArray, v1: FloatArray,
                      v2: FloatArray, out1: FloatArray, out2: FloatArray) -> None:
    """out1 = (D + L)⁻¹ v1 and out2 = (D + L)⁻¹ v2 in one pass over L."""
    for i in range(rows.size):
        s1, s2 = v1[i], v2[i]
        for p in range(indptr[rows[i]], at[i]):
            j = place[indices[p]]
            if j >= 0:
                x = ca * a[p] + cb * b[p] if on_pattern else cb * b[p]
                s1 -= x * out1[j]
                s2 -= x * out2[j]
        out1[i] = s1 * inv_d[i]
        out2[i] = s2 * inv_d[i]


@_jit
def _upper_product(indptr: IndexArray, indices: IndexArray, a: FloatArray, ca: float,
                   b: FloatArray, cb: float, on_pattern: bool, rows: IndexArray,
                   place: IndexArray, at: IndexArray, d: FloatArray, v: FloatArray,
                   out: FloatArray) -> None:
    """out = (D + U) v."""
    for i in range(rows.size):
        s = d[i] * v[i]
        for p in range(at[i] + ONE, indptr[rows[i] + 1]):
            j = place[indices[p]]
            if j >= 0:
                x = ca * a[p] + cb * b[p] if on_pattern else cb * b[p]
                s += x * v[j]
        out[i] = s


@_jit
def _full_product(indptr: IndexArray, indices: IndexArray, a: FloatArray, ca: float,
                  b: FloatArray, cb: float, on_pattern: bool, rows: IndexArray,
                  place: IndexArray, at: IndexArray, diagonal: FloatArray, v: FloatArray,
                  out: FloatArray) -> None:
    """out = S_ff v, each row summed from zero in column order: the rounding of scipy's
    CSR product of the copied block (sorted columns)."""
    for i in range(rows.size):
        r = rows[i]
        s = 0.0
        for p in range(indptr[r], at[i]):
            j = place[indices[p]]
            if j >= 0:
                x = ca * a[p] + cb * b[p] if on_pattern else cb * b[p]
                s += x * v[j]
        s += diagonal[i] * v[i]
        for p in range(at[i] + ONE, indptr[r + 1]):
            j = place[indices[p]]
            if j >= 0:
                x = ca * a[p] + cb * b[p] if on_pattern else cb * b[p]
                s += x * v[j]
        out[i] = s


@_jit
def _block(indptr: IndexArray, indices: IndexArray, a: FloatArray, ca: float,
           b: FloatArray, cb: float, on_pattern: bool, rows: IndexArray, place: IndexArray,
           at: IndexArray, diagonal: FloatArray,
           held: bool) -> tuple[IndexArray, IndexArray, FloatArray]:
    """The CSR arrays of S_ff, or with ``held`` of S_fD (columns numbered among the held
    nodes, −1 − place), in column order."""
    m = rows.size
    ptr = np.zeros(m + 1, np.int64)
    for i in range(m):
        r = rows[i]
        k = 0
        for p in range(indptr[r], indptr[r + 1]):
            if (place[indices[p]] < 0) == held:
                k += 1
        ptr[i + 1] = ptr[i] + k
    columns, values = np.empty(ptr[m], np.int32), np.empty(ptr[m])
    for i in range(m):
        r = rows[i]
        k = ptr[i]
        for p in range(indptr[r], indptr[r + 1]):
            j = place[indices[p]]
            if (j < 0) != held:
                continue
            columns[k] = -1 - j if held else j
            if p == at[i]:
                values[k] = diagonal[i]
            else:
                values[k] = ca * a[p] + cb * b[p] if on_pattern else cb * b[p]
            k += 1
    return ptr, columns, values


class FreeBlock(spla.LinearOperator):
    """S_ff = S[free][:, free] of a step matrix S held as a
    :class:`~fe3d.sgs.LinearCombination`, as an operator on S's own arrays (module
    docstring): products bit for bit those of the copied block. Holds ``arrays``
    (:class:`BlockArrays`: S's arrays and ``free`` shared, not copied; per node its place,
    4 bytes; per free node its diagonal's position, 4 bytes), ``touches_held`` (1 byte per
    free node), the block's ``main_diagonal`` (8 bytes per free node), the number of
    ``held`` nodes and of all ``nodes``. S's pattern must have sorted columns and store its
    whole diagonal (``ValueError``)."""

    def __init__(self, S: LinearCombination, free: IndexArray, fixed: IndexArray) -> None:
        B = S.B
        super().__init__(dtype=np.dtype(float), shape=(free.size, free.size))
        if not rows_sorted(B.indptr, B.indices):
            msg = "the step matrix's pattern has unsorted columns"
            raise ValueError(msg)
        n = B.shape[0]
        place = np.empty(n, np.int32 if n < 2**31 else np.int64)
        place[free] = np.arange(free.size)
        place[fixed] = -1 - np.arange(fixed.size)
        at = _diagonal_at(B.indptr, B.indices, free)
        if np.any(at < 0):
            msg = "the step matrix's pattern does not store its whole diagonal"
            raise ValueError(msg)
        lumped = S.a_diagonal
        a = B.data if lumped is not None else S.A.data  # B.data: a stand-in, never read
        # pointers, columns, rows and diagonal positions as unsigned views (fe3d._indices)
        self.arrays = BlockArrays(unsigned(B.indptr), unsigned(B.indices),
                                  np.asarray(a, dtype=float), S.ca,
                                  np.asarray(B.data, dtype=float), S.cb, lumped is None,
                                  unsigned(free), place, unsigned(at))
        self.held, self.nodes = fixed.size, n
        self.touches_held = _touches_held(B.indptr, B.indices, free, place)
        # the values S.tocsr() gives these entries (fe3d.sgs.LinearCombination.tocsr)
        self.main_diagonal = (S.ca * S.A.data[at] + S.cb * B.data[at] if lumped is None
                              else S.cb * B.data[at] + S.ca * lumped[free])

    def _matvec(self, x: FloatArray) -> FloatArray:
        out = np.empty(self.shape[0])
        _full_product(*self.arrays, self.main_diagonal,
                      np.ascontiguousarray(x, dtype=float).ravel(), out)
        return out

    def diagonal(self) -> FloatArray:
        """The diagonal of S_ff."""
        return self.main_diagonal.copy()

    def tocsr(self) -> sp.csr_matrix:
        """S_ff as a new CSR matrix (sorted columns): for a method that needs the matrix
        itself (a direct factor, an AMG hierarchy, a Newton Jacobian formed)."""
        ptr, columns, values = _block(*self.arrays, self.main_diagonal, False)
        A = sp.csr_matrix((values, columns, ptr), shape=self.shape)
        A.has_sorted_indices = True
        return A

    def held_columns(self) -> sp.csr_matrix:
        """S_fD = S[free][:, fixed] as a CSR matrix (its columns numbered as ``fixed``)."""
        ptr, columns, values = _block(*self.arrays, self.main_diagonal, True)
        A = sp.csr_matrix((values, columns, ptr), shape=(self.shape[0], self.held))
        A.has_sorted_indices = True
        return A


class BlockGaussSeidel(GaussSeidelSplitting):
    """The SSOR splitting (:class:`fe3d.sgs.GaussSeidelSplitting`) of a :class:`FreeBlock`,
    its passes over S's own arrays: holds the block and the four diagonals (no triangle
    copied); products and solves bit for bit those of
    :class:`fe3d.sgs.SymmetricGaussSeidel` on the copied block."""

    def __init__(self, block: FreeBlock, omega: float = 1.0) -> None:
        super().__init__(block.main_diagonal, omega)
        self.block = block

    def matrix(self) -> FreeBlock:
        """S_ff as an operator: the block itself."""
        return self.block

    def _solve(self, v: FloatArray, out: FloatArray, upper: bool) -> None:
        b = self.block
        _solve(*b.arrays, b.touches_held, upper, self.inv_d, v, out, np.empty(b.nodes))

    def _upper_solve(self, v: FloatArray, out: FloatArray) -> None:
        self._solve(v, out, True)

    def _lower_solve(self, v: FloatArray, out: FloatArray) -> None:
        self._solve(v, out, False)

    def _lower_solve_pair(self, v1: FloatArray, v2: FloatArray, out1: FloatArray,
                          out2: FloatArray) -> None:
        _lower_solve_pair(*self.block.arrays, self.inv_d, v1, v2, out1, out2)

    def _eisenstat(self, v: FloatArray, w: FloatArray, out: FloatArray) -> None:
        b = self.block
        _split_product(*b.arrays, b.touches_held, self.d, self.inv_d, self.e, v, w, out,
                       np.empty(b.nodes))

    def _upper_product(self, v: FloatArray, out: FloatArray) -> None:
        _upper_product(*self.block.arrays, self.d, v, out)
