"""Symmetric Gauss–Seidel with Eisenstat's product (fe3d/sgs.py) against the same operators
formed explicitly with scipy's triangular solves (a general-purpose reference library);
tolerance 1e-12 relative (round-off). Identity from Eisenstat (1981), SIAM J. Sci. Stat.
Comput. 2(1), "Efficient implementation of a class of preconditioned conjugate gradient
methods"."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from fe3d.sgs import SymmetricGaussSeidel, plus_diagonal, split_csr


def _matrix(n: int = 60, seed: int = 4) -> sp.csr_matrix:
    rng = np.random.default_rng(seed)
    A = sp.random(n, n, density=0.1, random_state=rng, format="csr")
    A = (A + sp.diags(5.0 + rng.random(n))).tocsr()  # nonsymmetric, diagonally dominant
    A.sort_indices()
    # the same matrix with every row's entries stored in reverse (unsorted on purpose)
    rows = [slice(A.indptr[i], A.indptr[i + 1]) for i in range(n)]
    indices = np.concatenate([A.indices[r][::-1] for r in rows])
    data = np.concatenate([A.data[r][::-1] for r in rows])
    return sp.csr_matrix((data, indices, A.indptr.copy()), shape=A.shape)


def test_split_product_and_preconditioner_match_explicit_triangular_solves() -> None:
    A = _matrix()
    n = A.shape[0]
    lower = sp.tril(A, format="csr")  # D + L
    upper = sp.triu(A, format="csr")  # D + U
    d = A.diagonal()
    g = SymmetricGaussSeidel(A)
    v = np.random.default_rng(0).standard_normal(n)
    # Â v = D (D+L)⁻¹ A (D+U)⁻¹ v
    ref = d * spla.spsolve_triangular(lower, A @ spla.spsolve_triangular(upper, v, lower=False))
    assert np.allclose(g.split_product(v), ref, rtol=0, atol=1e-12 * abs(ref).max())
    # M⁻¹ v = (D+U)⁻¹ D (D+L)⁻¹ v
    ref_m = spla.spsolve_triangular(upper, d * spla.spsolve_triangular(lower, v), lower=False)
    got = g.preconditioner() @ v
    assert np.allclose(got, ref_m, rtol=0, atol=1e-12 * abs(ref_m).max())
    assert np.allclose(g.right_solve(g.right(v)), v, atol=1e-12)
    # the pair of left solves in one pass: D (D+L)⁻¹ b and D (D+L)⁻¹ r
    r = np.random.default_rng(1).standard_normal(n)
    got_b, got_r = g.left_pair(v, r)
    for got, rhs in ((got_b, v), (got_r, r)):
        ref_l = d * spla.spsolve_triangular(lower, rhs)
        assert np.allclose(got, ref_l, rtol=0, atol=1e-12 * abs(ref_l).max())


@pytest.mark.parametrize("omega", [0.7, 1.2, 1.6])
def test_relaxed_split_product_matches_explicit_ssor(omega: float) -> None:
    """SSOR: D → D/ω in both triangular factors (Saad 2003, "Iterative methods for sparse
    linear systems", 2nd ed., sec. 4.1 and 10.2); the product Â v = D/ω (D/ω + L)⁻¹ A
    (D/ω + U)⁻¹ v still costs one backward and one forward pass."""
    A = _matrix(seed=11)
    n = A.shape[0]
    dw = A.diagonal() / omega
    lower = (sp.tril(A, k=-1) + sp.diags(dw)).tocsr()
    upper = (sp.triu(A, k=1) + sp.diags(dw)).tocsr()
    g = SymmetricGaussSeidel(A, omega=omega)
    v = np.random.default_rng(2).standard_normal(n)
    ref = dw * spla.spsolve_triangular(lower, A @ spla.spsolve_triangular(upper, v, lower=False))
    assert np.allclose(g.split_product(v), ref, rtol=0, atol=1e-12 * abs(ref).max())
    ref_m = spla.spsolve_triangular(upper, dw * spla.spsolve_triangular(lower, v), lower=False)
    assert np.allclose(g.preconditioner() @ v, ref_m, rtol=0, atol=1e-12 * abs(ref_m).max())
    assert np.allclose(g.left(v), dw * spla.spsolve_triangular(lower, v), atol=1e-12)
    assert np.allclose(g.right(v), upper @ v, atol=1e-12)


def test_relaxation_outside_0_2_is_refused() -> None:
    with pytest.raises(ValueError, match="omega"):
        SymmetricGaussSeidel(_matrix(), omega=2.0)


def test_split_solve_recovers_the_solution() -> None:
    A = _matrix(200, seed=9)
    x_true = np.random.default_rng(1).random(A.shape[0])
    b = A @ x_true
    g = SymmetricGaussSeidel(A)
    split = spla.LinearOperator((g.n, g.n), matvec=lambda v: g.split_product(np.ravel(v)))
    y, info = spla.bicgstab(split, g.left(b), rtol=1e-12, atol=0.0)
    assert info == 0
    x = g.right_solve(y)
    assert np.linalg.norm(A @ x - b) <= 1e-10 * np.linalg.norm(b)


def test_zero_diagonal_is_refused() -> None:
    A = sp.csr_matrix(np.array([[0.0, 1.0], [1.0, 2.0]]))
    with pytest.raises(ValueError, match="zero on its diagonal"):
        SymmetricGaussSeidel(A)


def test_plus_diagonal_shares_the_pattern_and_matches_scipy() -> None:
    A = _matrix(30, seed=2)
    A.sort_indices()
    d = np.linspace(1.0, 2.0, 30)
    J = plus_diagonal(A, d)
    assert np.shares_memory(J.indices, A.indices)  # only the values are new
    assert abs(J - (A + sp.diags(d))).max() == 0.0
    no_diag = sp.csr_matrix(np.array([[0.0, 1.0], [1.0, 0.0]]))  # diagonal not stored
    assert np.allclose(plus_diagonal(no_diag, np.array([3.0, 4.0])).toarray(),
                       [[3.0, 1.0], [1.0, 4.0]])


def test_split_csr_gives_the_triangles_and_the_free_fixed_blocks() -> None:
    """Both uses of the one split kernel against scipy's tril/triu and fancy indexing."""
    A = _matrix(40, seed=6)
    A.sort_indices()
    rows = np.arange(40)
    lp, li, ld, up, ui, ud = split_csr(A, rows, None, rows)
    lower = sp.csr_matrix((ld, li, lp), shape=A.shape)
    upper = sp.csr_matrix((ud, ui, up), shape=A.shape)
    assert abs(lower - sp.tril(A, k=-1)).max() == 0.0
    assert abs(upper - sp.triu(A, k=1)).max() == 0.0
    keep = np.array([1, 4, 5, 20, 39])
    side = np.ones(40, np.int8)
    side[keep] = 0
    new = np.zeros(40, np.int64)
    new[keep] = np.arange(keep.size)
    new[side == 1] = np.arange(40 - keep.size)
    p0, i0, v0, p1, i1, v1 = split_csr(A, keep, side, new)
    block0 = sp.csr_matrix((v0, i0, p0), shape=(keep.size, keep.size))
    block1 = sp.csr_matrix((v1, i1, p1), shape=(keep.size, 40 - keep.size))
    assert abs(block0 - A[keep][:, keep]).max() == 0.0
    assert abs(block1 - A[keep][:, side == 1]).max() == 0.0


def test_split_matrix_is_the_matrix_bit_for_bit() -> None:
    """The operator on the splitting's arrays against scipy's CSR product of A itself (the
    reference library): equal bit for bit, since each row is summed from zero in column
    order as scipy does; tocsr() rebuilds A exactly."""
    A = _matrix()
    A_sorted = A.copy()
    A_sorted.sort_indices()
    op = SymmetricGaussSeidel(A, omega=1.2).matrix()
    v = np.random.default_rng(3).standard_normal(A.shape[0])
    assert np.array_equal(op @ v, A_sorted @ v)
    back = op.tocsr()
    assert np.array_equal(back.indptr, A_sorted.indptr)
    assert np.array_equal(back.indices, A_sorted.indices)
    assert np.array_equal(back.data, A_sorted.data)
    assert np.array_equal(op.diagonal(), A.diagonal())


def test_scaled_matrix_is_the_scaled_copy_bit_for_bit() -> None:
    """(θ − 1)K as an operator on K's arrays against scipy's CSR product of the scaled
    copy (the reference library): equal bit for bit (each entry scaled, then multiplied)."""
    from fe3d.sgs import ScaledMatrix

    A = _matrix()
    A.sort_indices()
    v = np.random.default_rng(5).standard_normal(A.shape[0])
    copy = sp.csr_matrix((-0.5 * A.data, A.indices, A.indptr), shape=A.shape)
    assert np.array_equal(ScaledMatrix(A, -0.5) @ v, copy @ v)


def test_linear_combination_is_the_combined_copy_bit_for_bit() -> None:
    """a0/Δt M + θK as an operator on M's and K's arrays against scipy's CSR product of
    the combined copy (the reference library), bit for bit: M on K's pattern, and M a
    diagonal matrix of its own (lumped) added at K's diagonal entries."""
    from fe3d.sgs import LinearCombination

    K = _matrix()
    K.sort_indices()
    rng = np.random.default_rng(6)
    M = sp.csr_matrix((rng.random(K.nnz), K.indices, K.indptr), shape=K.shape)
    v = rng.standard_normal(K.shape[0])
    on_pattern = sp.csr_matrix((2.5 * M.data + 0.5 * K.data, K.indices, K.indptr),
                               shape=K.shape)
    op = LinearCombination(M, 2.5, K, 0.5)
    assert np.array_equal(op @ v, on_pattern @ v)
    assert np.array_equal(op.tocsr().data, on_pattern.data)
    lumped = sp.diags(rng.random(K.shape[0]), format="csr")
    data = 0.5 * K.data
    data[K.indptr[:-1] + np.array([np.searchsorted(K.indices[a:b], i) for i, (a, b) in
                                   enumerate(zip(K.indptr[:-1], K.indptr[1:], strict=True))])
         ] += 2.5 * lumped.diagonal()
    combined = sp.csr_matrix((data, K.indices, K.indptr), shape=K.shape)
    op = LinearCombination(lumped, 2.5, K, 0.5)
    assert np.array_equal(op @ v, combined @ v)
    assert np.array_equal(op.tocsr().data, combined.data)
