"""The Gauss–Seidel splitting read off the step operators in place (fe3d/free_block.py)
against the splitting of the copied free block (fe3d.sgs.SymmetricGaussSeidel, itself checked
against scipy's triangular solves in test_sgs.py) and the free block against scipy's own
fancy indexing and CSR product (the reference library).

Equality is exact, not to a tolerance: both sides form every entry by the same floating-point
expression (``ca*a + cb*b``, or ``cb*b`` plus ``ca*m`` at the diagonal, as
LinearCombination.tocsr does), meet the kept entries of each row in the same order (the free
nodes keep their order, so a triangle of the block is the same entries in the same order as
that of S restricted to free columns) and assign them to the same two partial sums (the
second sum alternates over kept entries only); IEEE addition and multiplication are
commutative, so nothing else can differ."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp

from fe3d.free_block import BlockGaussSeidel, FreeBlock
from fe3d.linalg import LinearSolver
from fe3d.p1 import split_rows
from fe3d.sgs import LinearCombination, SymmetricGaussSeidel


def _operators(n: int = 120, seed: int = 7) -> tuple[sp.csr_matrix, sp.csr_matrix,
                                                      sp.csr_matrix]:
    """K nonsymmetric and diagonally dominant on a sorted pattern with its whole diagonal,
    M on K's pattern, and a lumped M (a diagonal matrix of its own)."""
    rng = np.random.default_rng(seed)
    pattern = sp.random(n, n, density=0.08, random_state=rng, format="csr")
    pattern = (pattern + pattern.T + sp.eye(n)).tocsr()  # symmetric pattern, as a mesh's
    pattern.sort_indices()
    K = sp.csr_matrix((rng.standard_normal(pattern.nnz), pattern.indices, pattern.indptr),
                      shape=(n, n))
    rows = np.repeat(np.arange(n), np.diff(K.indptr))
    on_diagonal = rows == K.indices
    K.data[on_diagonal] = 2.0 + np.bincount(rows, weights=abs(K.data), minlength=n)
    M = sp.csr_matrix((rng.random(K.nnz), K.indices, K.indptr), shape=(n, n))
    lumped = sp.diags(1.0 + rng.random(n), format="csr")
    return K, M, lumped


@pytest.mark.parametrize("lumped", [False, True])
@pytest.mark.parametrize("omega", [1.0, 1.2])
def test_in_place_splitting_is_the_copied_splitting_bit_for_bit(lumped: bool,
                                                                omega: float) -> None:
    K, M, M_lumped = _operators()
    n = K.shape[0]
    rng = np.random.default_rng(3)
    is_fixed = rng.random(n) < 0.25
    free, fixed = np.nonzero(~is_fixed)[0], np.nonzero(is_fixed)[0]
    S = LinearCombination(M_lumped if lumped else M, 37.5, K, 0.5)
    S_ff, S_fD = split_rows(S.tocsr(), free, fixed)
    block = FreeBlock(S, free, fixed)
    copied = SymmetricGaussSeidel(S_ff, omega=omega)
    in_place = BlockGaussSeidel(block, omega=omega)
    v, r = rng.standard_normal(free.size), rng.standard_normal(free.size)
    for name, a, b in [
        ("split product", copied.split_product(v), in_place.split_product(v)),
        ("left", copied.left(v), in_place.left(v)),
        ("right", copied.right(v), in_place.right(v)),
        ("right solve", copied.right_solve(v), in_place.right_solve(v)),
        ("preconditioner", copied.preconditioner() @ v, in_place.preconditioner() @ v),
        ("matrix", copied.matrix() @ v, in_place.matrix() @ v),
        *(("left pair", x, y) for x, y in zip(copied.left_pair(v, r),
                                               in_place.left_pair(v, r), strict=True)),
    ]:
        assert np.array_equal(a, b), name
    # the block itself against scipy: fancy indexing and the CSR product
    S_csr = S.tocsr()
    assert abs(block.tocsr() - S_csr[free][:, free]).max() == 0.0
    assert abs(block.held_columns() - S_csr[free][:, fixed]).max() == 0.0
    assert np.array_equal(block @ v, S_ff @ v)
    assert np.array_equal(block.tocsr().data, S_ff.data)
    assert np.array_equal(block.diagonal(), S_ff.diagonal())
    held = block.held_columns()
    assert np.array_equal(held.data, S_fD.data) and np.array_equal(held.indices, S_fD.indices)


def test_solver_on_the_block_gives_the_copys_solution_bit_for_bit() -> None:
    """The whole Gauss–Seidel solve (BiCGSTAB on the split system, fe3d/linalg.py) and a
    Newton-style diagonal exchange on each splitting: equal results."""
    from fe3d.transport.newton_correction import CorrectionSolver

    K, _, M_lumped = _operators(400, seed=2)
    n = K.shape[0]
    rng = np.random.default_rng(5)
    is_fixed = rng.random(n) < 0.1
    free, fixed = np.nonzero(~is_fixed)[0], np.nonzero(is_fixed)[0]
    S = LinearCombination(M_lumped, 20.0, K, 1.0)
    S_ff, _ = split_rows(S.tocsr(), free, fixed)
    b = rng.standard_normal(free.size)
    a = LinearSolver(S_ff, method="gauss_seidel")
    c = LinearSolver(FreeBlock(S, free, fixed), method="gauss_seidel")
    assert np.array_equal(a.solve(b), c.solve(b))
    assert np.array_equal(a.solve(2 * b), c.solve(2 * b))  # from the window of solutions
    extra = rng.random(free.size)
    assert np.array_equal(CorrectionSolver(a).solve(extra, b, 1e-8),
                          CorrectionSolver(c).solve(extra, b, 1e-8))


def test_block_refuses_a_pattern_without_its_diagonal() -> None:
    K = sp.csr_matrix(np.array([[0.0, 1.0], [1.0, 2.0]]))
    K.eliminate_zeros()
    S = LinearCombination(K, 1.0, K, 1.0)
    with pytest.raises(ValueError, match="diagonal"):
        FreeBlock(S, np.array([0, 1]), np.array([], dtype=np.int64))
