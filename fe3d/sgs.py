"""Symmetric Gauss–Seidel (SGS) for nonsymmetric sparse systems, compiled (numba).

With A = L + D + U (strictly lower, diagonal, strictly upper) the SGS preconditioner is
M = (D + L) D⁻¹ (D + U). Split as M_L = (D + L) D⁻¹ and M_R = D + U, the preconditioned
operator is Â = M_L⁻¹ A M_R⁻¹, and since A = (D + L) + (D + U) − D,

    Â v = D [w + (D + L)⁻¹ (v − D w)],   w = (D + U)⁻¹ v

(Eisenstat 1981, "Efficient implementation of a class of preconditioned conjugate gradient
methods", SIAM J. Sci. Stat. Comput. 2(1)). One product with Â costs one backward and one
forward triangular pass, about the work of one product with A, where an explicit product
plus an SGS sweep costs about three. The Krylov method runs on Â y = M_L⁻¹ b, and
x = M_R⁻¹ y.

With a relaxation factor ω (symmetric successive over-relaxation, SSOR) D is replaced by
D/ω in M_L and M_R, and A = (D/ω + L) + (D/ω + U) − (2D/ω − D) gives the same product with
v − (2D/ω − D) w in the forward pass; ω = 1 is SGS. The constant factor ω(2 − ω) of the
usual SSOR matrix changes no Krylov iterate and is left out.
"""

from __future__ import annotations

from abc import ABC, abstractmethod

import numba
import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from fe3d._indices import ONE, unsigned
from fe3d._typing import FloatArray, IndexArray

__all__ = ["GaussSeidelSplitting", "LinearCombination", "ScaledMatrix", "SplitMatrix",
           "SymmetricGaussSeidel", "plus_diagonal", "rows_sorted", "split_csr"]

_jit = numba.njit(cache=True, nogil=True)


@_jit
def _diagonal_positions(indptr: IndexArray, indices: IndexArray) -> IndexArray:
    n = indptr.size - 1
    out = np.full(n, -1, np.int64)
    for i in range(n):
        for p in range(indptr[i], indptr[i + 1]):
            if indices[p] == i:
                out[i] = p
    return out


@_jit
def rows_sorted(indptr: IndexArray, indices: IndexArray) -> bool:
    """True when every row of the CSR arrays lists its columns in strictly increasing order
    (what the splittings' sweeps rely on); one compiled pass, no temporary."""
    for i in range(indptr.size - 1):
        for p in range(indptr[i] + 1, indptr[i + 1]):
            if indices[p] <= indices[p - 1]:
                return False
    return True


@_jit
def _split_kernel(indptr: IndexArray, indices: IndexArray, data: FloatArray,
                  rows: IndexArray, column_side: IndexArray, new_column: IndexArray,
                  by_triangle: bool) -> tuple[IndexArray, IndexArray, FloatArray, IndexArray,
                                              IndexArray, FloatArray]:
    """The rows ``rows`` of a CSR matrix split in two CSR blocks (pointers, columns, values
    of each) by the side of every entry: 0 first block, 1 second, anything else dropped.
    The side is ``column_side[c]``, or with ``by_triangle`` 0 below the diagonal, 1 above
    it, the diagonal dropped. Columns are renumbered by ``new_column``; order is kept."""
    m = rows.size
    ptr0 = np.zeros(m + 1, np.int64)
    ptr1 = np.zeros(m + 1, np.int64)
    for a in range(m):
        r = rows[a]
        n0 = n1 = 0
        for p in range(indptr[r], indptr[r + 1]):
            c = indices[p]
            side = (0 if c < r else (1 if c > r else 2)) if by_triangle else column_side[c]
            if side == 0:
                n0 += 1
            elif side == 1:
                n1 += 1
        ptr0[a + 1] = ptr0[a] + n0
        ptr1[a + 1] = ptr1[a] + n1
    idx0, val0 = np.empty(ptr0[m], np.int32), np.empty(ptr0[m])
    idx1, val1 = np.empty(ptr1[m], np.int32), np.empty(ptr1[m])
    for a in range(m):
        r = rows[a]
        k0, k1 = ptr0[a], ptr1[a]
        for p in range(indptr[r], indptr[r + 1]):
            c = indices[p]
            side = (0 if c < r else (1 if c > r else 2)) if by_triangle else column_side[c]
            if side == 0:
                idx0[k0], val0[k0] = new_column[c], data[p]
                k0 += 1
            elif side == 1:
                idx1[k1], val1[k1] = new_column[c], data[p]
                k1 += 1
    return ptr0, idx0, val0, ptr1, idx1, val1


def split_csr(A: sp.csr_matrix, rows: IndexArray, column_side: IndexArray | None,
              new_column: IndexArray) -> tuple[IndexArray, IndexArray, FloatArray,
                                               IndexArray, IndexArray, FloatArray]:
    """Rows ``rows`` of ``A`` split in two CSR blocks in one compiled pass: by
    ``column_side`` (0 or 1 per column, other values dropped), or, when it is None, into
    the strictly lower and strictly upper triangles. Columns renumbered by ``new_column``.
    Returns (pointers, columns, values) of the first block, then of the second."""
    A = A.tocsr()
    by_triangle = column_side is None
    side = np.zeros(1, np.int8) if column_side is None else np.asarray(column_side, np.int8)
    return _split_kernel(A.indptr, A.indices, np.asarray(A.data, dtype=float),
                         np.asarray(rows, dtype=np.int64), side,
                         np.asarray(new_column, dtype=np.int64), by_triangle)


# The triangular passes below keep two partial sums per row: the rows of a pass depend on
# each other, and one running sum chains every entry's latency. Written out in each kernel:
# a shared inlined helper compiled to code 1.6x slower (measured on the 223 k-node step
# matrix: 1.5-1.7 against 2.5-2.8 SpMV per split product).


@_jit
def _upper_solve(up: IndexArray, ui: IndexArray, ud: FloatArray, inv_d: FloatArray,
                 v: FloatArray, out: FloatArray) -> None:
    """out = (D + U)⁻¹ v."""
    for i in range(v.size - 1, -1, -1):
        s1, s2 = v[i], 0.0
        p, b = up[i], up[i + 1]
        while p + ONE < b:
            s1 -= ud[p] * out[ui[p]]
            s2 -= ud[p + ONE] * out[ui[p + ONE]]
            p += ONE + ONE
        if p < b:
            s1 -= ud[p] * out[ui[p]]
        out[i] = (s1 + s2) * inv_d[i]


@_jit
def _lower_solve(lp: IndexArray, li: IndexArray, ld: FloatArray, inv_d: FloatArray,
                 v: FloatArray, out: FloatArray) -> None:
    """out = (D + L)⁻¹ v."""
    for i in range(v.size):
        s1, s2 = v[i], 0.0
        p, b = lp[i], lp[i + 1]
        while p + ONE < b:
            s1 -= ld[p] * out[li[p]]
            s2 -= ld[p + ONE] * out[li[p + ONE]]
            p += ONE + ONE
        if p < b:
            s1 -= ld[p] * out[li[p]]
        out[i] = (s1 + s2) * inv_d[i]


@_jit
def _lower_solve_pair(lp: IndexArray, li: IndexArray, ld: FloatArray, inv_d: FloatArray,
                      v1: FloatArray, v2: FloatArray, out1: FloatArray,
                      out2: FloatArray) -> None:
    """out1 = (D + L)⁻¹ v1 and out2 = (D + L)⁻¹ v2 in one pass over L."""
    for i in range(v1.size):
        s1, s2 = v1[i], v2[i]
        for p in range(lp[i], lp[i + 1]):
            c, a = li[p], ld[p]
            s1 -= a * out1[c]
            s2 -= a * out2[c]
        out1[i] = s1 * inv_d[i]
        out2[i] = s2 * inv_d[i]


@_jit
def _split_product(lp: IndexArray, li: IndexArray, ld: FloatArray, up: IndexArray,
                   ui: IndexArray, ud: FloatArray, d: FloatArray, inv_d: FloatArray,
                   e: FloatArray, v: FloatArray, w: FloatArray, out: FloatArray) -> None:
    """out = Â v (module docstring) with d the relaxed diagonal D/ω and e = 2D/ω − D:
    w = (D/ω + U)⁻¹ v, then out = D/ω [w + (D/ω + L)⁻¹(v − e w)]."""
    n = v.size
    for i in range(n - 1, -1, -1):
        s1, s2 = v[i], 0.0
        p, b = up[i], up[i + 1]
        while p + ONE < b:
            s1 -= ud[p] * w[ui[p]]
            s2 -= ud[p + ONE] * w[ui[p + ONE]]
            p += ONE + ONE
        if p < b:
            s1 -= ud[p] * w[ui[p]]
        w[i] = (s1 + s2) * inv_d[i]
    for i in range(n):
        s1, s2 = v[i] - e[i] * w[i], 0.0
        p, b = lp[i], lp[i + 1]
        while p + ONE < b:
            s1 -= ld[p] * out[li[p]]
            s2 -= ld[p + ONE] * out[li[p + ONE]]
            p += ONE + ONE
        if p < b:
            s1 -= ld[p] * out[li[p]]
        out[i] = (s1 + s2) * inv_d[i]
    for i in range(n):
        out[i] = d[i] * (w[i] + out[i])


@_jit
def _upper_product(up: IndexArray, ui: IndexArray, ud: FloatArray, d: FloatArray,
                   v: FloatArray, out: FloatArray) -> None:
    """out = (D + U) v."""
    for i in range(v.size):
        s = d[i] * v[i]
        for p in range(up[i], up[i + 1]):
            s += ud[p] * v[ui[p]]
        out[i] = s


@_jit
def _full_product(lp: IndexArray, li: IndexArray, ld: FloatArray, up: IndexArray,
                  ui: IndexArray, ud: FloatArray, diagonal: FloatArray, v: FloatArray,
                  out: FloatArray) -> None:
    """out = (L + D + U) v, each row summed from zero in column order (lower part, the
    diagonal, upper part): the order, and so the rounding, of scipy's CSR product of the
    whole matrix with sorted columns."""
    for i in range(v.size):
        s = 0.0
        for p in range(lp[i], lp[i + 1]):
            s += ld[p] * v[li[p]]
        s += diagonal[i] * v[i]
        for p in range(up[i], up[i + 1]):
            s += ud[p] * v[ui[p]]
        out[i] = s


@_jit
def _joined(lp: IndexArray, li: IndexArray, ld: FloatArray, up: IndexArray, ui: IndexArray,
            ud: FloatArray, diagonal: FloatArray) -> tuple[IndexArray, IndexArray, FloatArray]:
    """The CSR arrays of L + D + U (sorted columns)."""
    n = diagonal.size
    indptr = np.empty(n + 1, np.int64)
    indptr[0] = 0
    for i in range(n):
        below, above = np.int64(lp[i + 1] - lp[i]), np.int64(up[i + 1] - up[i])
        indptr[i + 1] = indptr[i] + below + 1 + above
    indices = np.empty(indptr[n], np.int32)
    data = np.empty(indptr[n])
    for i in range(n):
        k = indptr[i]
        for p in range(lp[i], lp[i + 1]):
            indices[k], data[k] = li[p], ld[p]
            k += 1
        indices[k], data[k] = i, diagonal[i]
        k += 1
        for p in range(up[i], up[i + 1]):
            indices[k], data[k] = ui[p], ud[p]
            k += 1
    return indptr, indices, data


class SplitMatrix(spla.LinearOperator):
    """The matrix A = L + D + U that a :class:`SymmetricGaussSeidel` was built from, as an
    operator on the splitting's own arrays (no copy of A kept). Its product has the
    rounding of scipy's CSR product of A, bit for bit; :meth:`tocsr` rebuilds A (rare:
    a method that needs the matrix itself, such as an AMG fallback)."""

    def __init__(self, split: SymmetricGaussSeidel) -> None:
        super().__init__(dtype=np.dtype(float), shape=(split.n, split.n))
        self.split = split

    def _matvec(self, x: FloatArray) -> FloatArray:
        g = self.split
        out = np.empty(g.n)
        _full_product(*g.lower, *g.upper, g.diagonal,
                      np.ascontiguousarray(x, dtype=float).ravel(), out)
        return out

    def diagonal(self) -> FloatArray:
        """The diagonal of A."""
        return self.split.diagonal.copy()

    def tocsr(self) -> sp.csr_matrix:
        """A as a new CSR matrix (sorted columns)."""
        indptr, indices, data = _joined(*self.split.lower, *self.split.upper,
                                        self.split.diagonal)
        A = sp.csr_matrix((data, indices, indptr), shape=self.shape)
        A.has_sorted_indices = True
        return A


@_jit
def _scaled_product(indptr: IndexArray, indices: IndexArray, data: FloatArray, factor: float,
                    v: FloatArray, out: FloatArray) -> None:
    """out = (factor A) v, each entry scaled before its product: the rounding of scipy's
    CSR product of a matrix holding the scaled values."""
    for i in range(indptr.size - 1):
        s = 0.0
        for p in range(indptr[i], indptr[i + 1]):
            s += (factor * data[p]) * v[indices[p]]
        out[i] = s


class ScaledMatrix(spla.LinearOperator):
    """``factor`` × a CSR matrix ``A`` as an operator on A's own arrays (no scaled copy):
    products bit for bit those of the CSR matrix with values ``factor * A.data``."""

    def __init__(self, A: sp.csr_matrix, factor: float) -> None:
        super().__init__(dtype=np.dtype(float), shape=A.shape)
        self.A, self.factor = A.tocsr(), float(factor)

    def _matvec(self, x: FloatArray) -> FloatArray:
        out = np.empty(self.shape[0])
        _scaled_product(unsigned(self.A.indptr), unsigned(self.A.indices),
                        np.asarray(self.A.data, dtype=float),
                        self.factor, np.ascontiguousarray(x, dtype=float).ravel(), out)
        return out


@_jit
def _sum_product(indptr: IndexArray, indices: IndexArray, a: FloatArray, ca: float,
                 b: FloatArray, cb: float, v: FloatArray, out: FloatArray) -> None:
    """out = (ca A + cb B) v for A, B on one pattern, each entry ca a + cb b formed first."""
    for i in range(indptr.size - 1):
        s = 0.0
        for p in range(indptr[i], indptr[i + 1]):
            s += (ca * a[p] + cb * b[p]) * v[indices[p]]
        out[i] = s


@_jit
def _diagonal_sum_product(indptr: IndexArray, indices: IndexArray, b: FloatArray, cb: float,
                          positions: IndexArray, d: FloatArray, cd: float, v: FloatArray,
                          out: FloatArray) -> None:
    """out = (cb B + cd diag(d)) v, the diagonal entry formed as cb b + cd d."""
    for i in range(indptr.size - 1):
        s = 0.0
        for p in range(indptr[i], indptr[i + 1]):
            x = cb * b[p]
            if p == positions[i]:
                x = x + cd * d[i]
            s += x * v[indices[p]]
        out[i] = s


class LinearCombination(spla.LinearOperator):
    """``cb`` B + ``ca`` A as an operator on the matrices' own arrays (no combined copy),
    B a CSR matrix with its whole diagonal stored and A either a CSR matrix on B's pattern
    or a diagonal matrix (its diagonal added at B's diagonal positions). Products are bit
    for bit those of the CSR matrix of values ``ca * A.data + cb * B.data`` (A on B's
    pattern) or ``cb * B.data`` with ``ca`` × A's diagonal added to its diagonal entries."""

    def __init__(self, A: sp.csr_matrix, ca: float, B: sp.csr_matrix, cb: float) -> None:
        super().__init__(dtype=np.dtype(float), shape=B.shape)
        self.A, self.B = A.tocsr(), B.tocsr()
        self.ca, self.cb = float(ca), float(cb)
        same = self.A.indices is self.B.indices or (
            np.array_equal(self.A.indptr, self.B.indptr)
            and np.array_equal(self.A.indices, self.B.indices))
        self._diagonal: FloatArray | None = None if same else self.A.diagonal()
        self._positions = None if same else _diagonal_positions(self.B.indptr, self.B.indices)
        if self._positions is not None and np.any(self._positions < 0):
            msg = "B does not store its whole diagonal"
            raise ValueError(msg)

    @property
    def a_diagonal(self) -> FloatArray | None:
        """A's diagonal when A is a diagonal matrix of its own, None when A is on B's
        pattern."""
        return self._diagonal

    def _matvec(self, x: FloatArray) -> FloatArray:
        out = np.empty(self.shape[0])
        v = np.ascontiguousarray(x, dtype=float).ravel()
        B = self.B
        if self._diagonal is None:
            _sum_product(unsigned(B.indptr), unsigned(B.indices), self.A.data, self.ca,
                         B.data, self.cb, v, out)
        else:
            _diagonal_sum_product(unsigned(B.indptr), unsigned(B.indices), B.data, self.cb,
                                  unsigned(self._positions),
                                  self._diagonal, self.ca, v, out)
        return out

    def tocsr(self) -> sp.csr_matrix:
        """The combination as a new CSR matrix on B's pattern (the same values)."""
        if self._diagonal is None:
            data = self.ca * self.A.data + self.cb * self.B.data
        else:
            data = self.cb * self.B.data
            data[self._positions] += self.ca * self._diagonal
        return sp.csr_matrix((data, self.B.indices, self.B.indptr), shape=self.shape)


def plus_diagonal(A: sp.csr_matrix, d: FloatArray) -> sp.csr_matrix:
    """A + diag(d) on A's own pattern when A stores its whole diagonal (index arrays shared,
    only the values new: a Newton Jacobian J = S + diag without scipy's merge); otherwise by
    scipy's addition."""
    A = A.tocsr()
    pos = _diagonal_positions(A.indptr, A.indices)
    if np.any(pos < 0):
        return (A + sp.diags(d)).tocsr()
    data = A.data.copy()
    data[pos] += d
    return sp.csr_matrix((data, A.indices, A.indptr), shape=A.shape, copy=False)


class GaussSeidelSplitting(ABC):
    """SGS (``omega`` = 1) or SSOR (0 < ``omega`` < 2) splitting A = L + D + U of a square
    matrix with a nonzero diagonal (``ValueError`` otherwise), and the products and solves
    built on it (module docstring). Holds D (``diagonal``), the relaxed diagonal ``d`` =
    D/ω, its inverse ``inv_d`` and ``e`` = 2D/ω − D; a Newton step exchanges these four for
    those of A + diag (fe3d/transport/newton_correction.py). How L and U are held, and so
    the passes over them, is the subclass's: :class:`SymmetricGaussSeidel` copies them,
    ``fe3d.free_block.BlockGaussSeidel`` reads the step operators themselves."""

    def __init__(self, diagonal: FloatArray, omega: float) -> None:
        if np.any(diagonal == 0.0):
            msg = "the matrix has a zero on its diagonal: no Gauss–Seidel"
            raise ValueError(msg)
        if not 0.0 < omega < 2.0:
            msg = f"relaxation factor omega = {omega!r}: expected 0 < omega < 2"
            raise ValueError(msg)
        self.omega = float(omega)
        self.n = diagonal.size
        self.diagonal = diagonal  # D itself
        self.d = diagonal / self.omega  # the relaxed diagonal D/ω
        self.inv_d = 1.0 / self.d
        self.e = 2.0 * self.d - diagonal

    @abstractmethod
    def matrix(self) -> spla.LinearOperator:
        """A as an operator on the arrays the splitting reads, so that A need not be kept;
        its product has the rounding of scipy's CSR product of A, and ``tocsr()`` rebuilds
        A."""

    # the passes over L and U, each written into ``out`` (``v`` contiguous float64)
    @abstractmethod
    def _upper_solve(self, v: FloatArray, out: FloatArray) -> None:
        """out = (D/ω + U)⁻¹ v (with ``inv_d``)."""

    @abstractmethod
    def _lower_solve(self, v: FloatArray, out: FloatArray) -> None:
        """out = (D/ω + L)⁻¹ v (with ``inv_d``)."""

    @abstractmethod
    def _lower_solve_pair(self, v1: FloatArray, v2: FloatArray, out1: FloatArray,
                          out2: FloatArray) -> None:
        """:meth:`_lower_solve` of two vectors in one pass over L."""

    @abstractmethod
    def _eisenstat(self, v: FloatArray, w: FloatArray, out: FloatArray) -> None:
        """out = Â v, ``w`` scratch (module docstring)."""

    @abstractmethod
    def _upper_product(self, v: FloatArray, out: FloatArray) -> None:
        """out = (D/ω + U) v."""

    def preconditioner(self) -> spla.LinearOperator:
        """M⁻¹ = (D/ω + U)⁻¹ D/ω (D/ω + L)⁻¹ as an operator (one forward and one backward pass)."""
        n = self.n

        def apply(v: FloatArray) -> FloatArray:
            t = np.empty(n)
            self._lower_solve(np.ascontiguousarray(v, dtype=float).ravel(), t)
            t *= self.d
            out = np.empty(n)
            self._upper_solve(t, out)
            return out

        return spla.LinearOperator((n, n), matvec=apply, dtype=float)

    def split_product(self, v: FloatArray) -> FloatArray:
        """Â v = M_L⁻¹ A M_R⁻¹ v by Eisenstat's product (module docstring): one backward and
        one forward pass; ``v`` contiguous float64."""
        out, w = np.empty(self.n), np.empty(self.n)
        self._eisenstat(v, w, out)
        return out

    def left(self, b: FloatArray) -> FloatArray:
        """M_L⁻¹ b = D/ω (D/ω + L)⁻¹ b."""
        out = np.empty(self.n)
        self._lower_solve(np.ascontiguousarray(b, dtype=float), out)
        return out * self.d

    def left_pair(self, b: FloatArray, r: FloatArray) -> tuple[FloatArray, FloatArray]:
        """(M_L⁻¹ b, M_L⁻¹ r) in one pass over the lower triangle."""
        out1, out2 = np.empty(self.n), np.empty(self.n)
        self._lower_solve_pair(np.ascontiguousarray(b, dtype=float),
                               np.ascontiguousarray(r, dtype=float), out1, out2)
        out1 *= self.d
        out2 *= self.d
        return out1, out2

    def right(self, x: FloatArray) -> FloatArray:
        """M_R x = (D/ω + U) x."""
        out = np.empty(self.n)
        self._upper_product(np.ascontiguousarray(x, dtype=float), out)
        return out

    def right_solve(self, y: FloatArray) -> FloatArray:
        """M_R⁻¹ y = (D/ω + U)⁻¹ y."""
        out = np.empty(self.n)
        self._upper_solve(np.ascontiguousarray(y, dtype=float), out)
        return out


class SymmetricGaussSeidel(GaussSeidelSplitting):
    """The splitting (:class:`GaussSeidelSplitting`) of a square CSR matrix, column indices
    sorted on a copy when they are not. Holds the strictly lower and upper parts as two CSR
    arrays (``lower``, ``upper``: about the memory of A once more) and the diagonal:
    together the whole of A, which :meth:`matrix` gives as an operator so that the caller
    need not keep A."""

    def __init__(self, A: sp.csr_matrix, omega: float = 1.0) -> None:
        A = A.tocsr()
        if not rows_sorted(A.indptr, A.indices):
            A = A.copy()
            A.sort_indices()
        data = np.asarray(A.data, dtype=float)
        dpos = _diagonal_positions(A.indptr, A.indices)
        if np.any(dpos < 0):
            msg = "the matrix has a zero on its diagonal: no Gauss–Seidel"
            raise ValueError(msg)
        super().__init__(data[dpos], omega)
        all_rows = np.arange(self.n, dtype=np.int64)
        lp, li, ld, up, ui, ud = split_csr(A, all_rows, None, all_rows)
        self.lower = (unsigned(lp), unsigned(li), ld)  # unsigned: fe3d._indices.unsigned
        self.upper = (unsigned(up), unsigned(ui), ud)

    def matrix(self) -> SplitMatrix:
        """A as an operator on the splitting's arrays, so that A need not be kept."""
        return SplitMatrix(self)

    def _upper_solve(self, v: FloatArray, out: FloatArray) -> None:
        _upper_solve(*self.upper, self.inv_d, v, out)

    def _lower_solve(self, v: FloatArray, out: FloatArray) -> None:
        _lower_solve(*self.lower, self.inv_d, v, out)

    def _lower_solve_pair(self, v1: FloatArray, v2: FloatArray, out1: FloatArray,
                          out2: FloatArray) -> None:
        _lower_solve_pair(*self.lower, self.inv_d, v1, v2, out1, out2)

    def _eisenstat(self, v: FloatArray, w: FloatArray, out: FloatArray) -> None:
        _split_product(*self.lower, *self.upper, self.d, self.inv_d, self.e, v, w, out)

    def _upper_product(self, v: FloatArray, out: FloatArray) -> None:
        _upper_product(*self.upper, self.d, v, out)
