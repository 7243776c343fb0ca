"""Compiled P1 kernels (fe3d/p1.py) against scipy's own COO → CSR assembly.

Reference: scipy.sparse (a general-purpose library) summing the same element matrices;
tolerance 1e-14 relative (round-off of a different summation order)."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp
from skfem import MeshTet

from fe3d.p1 import (
    CsrPattern,
    cells_spanning_zero,
    gradients,
    length_along,
    node_graph,
    split_rows,
    tensor_gradient,
    transpose_positions,
    volumes,
)


def _scipy_sum(cells: np.ndarray, local: np.ndarray, n: int) -> sp.csr_matrix:
    rows = np.repeat(cells.T[:, :, None], 4, axis=2).ravel()
    cols = np.repeat(cells.T[:, None, :], 4, axis=1).ravel()
    return sp.coo_matrix((local.ravel(), (rows, cols)), shape=(n, n)).tocsr()


@pytest.fixture(scope="module")
def mesh() -> MeshTet:
    m = MeshTet.init_tensor(np.linspace(0, 3, 5), np.linspace(0, 2, 4), np.linspace(-1, 0, 3))
    rng = np.random.default_rng(3)  # distort the nodes so no two cells are alike
    return MeshTet(m.p + 0.05 * rng.standard_normal(m.p.shape), m.t)


def _each_entry_lands_on_its_own_pair(pat: CsrPattern, cells: np.ndarray) -> None:
    """Entry (i, j) of a cell's element matrix, summed alone, is the matrix entry
    (cells[i], cells[j]) and no other (the positions the assembly searches for)."""
    for e in range(0, cells.shape[1], max(1, cells.shape[1] // 30)):
        for i in range(4):
            for j in range(4):
                local = np.zeros((1, 4, 4))
                local[0, i, j] = 1.0
                A = pat.element_sum(local, np.array([e])).tocoo()
                A.eliminate_zeros()
                assert (A.row.tolist(), A.col.tolist()) == ([cells[i, e]], [cells[j, e]])


def test_pattern_is_every_node_pair_sharing_a_cell(mesh: MeshTet) -> None:
    n = mesh.p.shape[1]
    pat = CsrPattern.of_cells(mesh.t, n)
    ref = _scipy_sum(mesh.t, np.ones((mesh.t.shape[1], 4, 4)), n)
    assert np.array_equal(pat.indptr, ref.indptr)
    assert np.array_equal(pat.indices, ref.indices)
    _each_entry_lands_on_its_own_pair(pat, mesh.t)


def test_positions_whatever_the_order_of_a_cells_nodes(mesh: MeshTet) -> None:
    """The assembly finds each entry by walking the cell's rows with its nodes sorted, so a
    cell listed in any of its 24 node orders must land on the same pairs. Reference:
    scipy's COO → CSR of the same element blocks."""
    from itertools import permutations

    n = mesh.p.shape[1]
    orders = np.array(list(permutations(range(4))))
    cells = np.ascontiguousarray(np.stack([mesh.t[orders[e % 24], e]
                                           for e in range(mesh.t.shape[1])], axis=1))
    pat = CsrPattern.of_cells(cells, n)
    _each_entry_lands_on_its_own_pair(pat, cells)
    local = np.random.default_rng(5).standard_normal((cells.shape[1], 4, 4))
    ref = _scipy_sum(cells, local, n)
    assert abs(pat.element_sum(local) - ref).max() <= 1e-14 * abs(ref).max()


def test_element_sum_and_stiffness_match_scipy(mesh: MeshTet) -> None:
    n, e = mesh.p.shape[1], mesh.t.shape[1]
    pat = CsrPattern.of_cells(mesh.t, n)
    grads, vol = gradients(mesh.p, mesh.t)
    rng = np.random.default_rng(0)
    local = rng.standard_normal((e, 4, 4))
    ref = _scipy_sum(mesh.t, local, n)
    assert abs(pat.element_sum(local) - ref).max() <= 1e-14 * abs(ref).max()
    some = np.array([0, 5, 7, e - 1])
    ref_some = _scipy_sum(mesh.t[:, some], local[some], n)
    got = pat.element_sum(local[some], cell_ids=some)
    assert abs(got - ref_some).max() <= 1e-14 * abs(ref_some).max()
    T = rng.standard_normal((3, 3, e))
    T = T + T.transpose(1, 0, 2)
    stiff_local = np.einsum("eia,abe,ejb->eij", grads, T, grads) * np.abs(vol)[:, None, None]
    ref_k = _scipy_sum(mesh.t, stiff_local, n)
    assert abs(pat.stiffness(mesh.p, mesh.t, T) - ref_k).max() <= 1e-13 * abs(ref_k).max()


def test_gradients_sum_to_zero_and_reproduce_linear_fields(mesh: MeshTet) -> None:
    grads, _ = gradients(mesh.p, mesh.t)
    # ∇ of the P1 interpolant of a linear field is exact: u = 2x − y + 3z
    u = 2 * mesh.p[0] - mesh.p[1] + 3 * mesh.p[2]
    g = np.einsum("eik,ie->ek", grads, u[mesh.t])
    assert np.allclose(g, [2.0, -1.0, 3.0], atol=1e-12)
    assert np.allclose(grads.sum(axis=1), 0.0, atol=1e-12)
    hull = MeshTet.init_tensor(np.linspace(0, 3, 5), np.linspace(0, 2, 4),
                               np.linspace(-1, 0, 3))
    _, v0 = gradients(hull.p, hull.t)
    assert np.isclose(np.abs(v0).sum(), 6.0, rtol=1e-14)


def test_values_of_refuses_an_entry_outside_the_pattern(mesh: MeshTet) -> None:
    n = mesh.p.shape[1]
    pat = CsrPattern.of_cells(mesh.t, n)
    diag = pat.values_of(sp.diags(np.arange(n, dtype=float)))
    assert np.allclose(pat.matrix(diag).diagonal(), np.arange(n))
    far = sp.coo_matrix(([1.0], ([0], [n - 1])), shape=(n, n))
    with pytest.raises(ValueError, match="outside the mesh's pattern"):
        pat.values_of(far)


def test_split_rows_equals_scipy_fancy_indexing() -> None:
    rng = np.random.default_rng(5)
    A = sp.random(40, 40, density=0.2, random_state=rng, format="csr") + sp.eye(40)
    A = A.tocsr()
    A.sort_indices()
    fixed = np.array([0, 3, 17, 39])
    free = np.setdiff1d(np.arange(40), fixed)
    ff, fd = split_rows(A, free, fixed)
    assert abs(ff - A[free][:, free]).max() == 0.0
    assert abs(fd - A[free][:, fixed]).max() == 0.0
    assert ff.has_sorted_indices


def test_length_along_and_volumes_match_the_numpy_reference(mesh: MeshTet) -> None:
    """Compiled T7 length against fe3d's numpy form of the same formula, and against a hand
    value: on the unit right tetrahedron with a = (1, 0, 0), Σ|a·∇φ_i| = 2, so h = 1 m;
    round-off tolerance (1e-13 relative)."""
    from fe3d.transport.stabilization import element_length_along_flow

    grads, vol = gradients(mesh.p, mesh.t)
    a = np.random.default_rng(7).standard_normal((3, mesh.t.shape[1]))
    a[:, :3] = 0.0  # no flow: the fallback 2 / max|∇φ_i|
    ref = element_length_along_flow(a, grads)
    assert np.allclose(length_along(mesh.p, mesh.t, a), ref, rtol=1e-13, atol=0.0)
    assert np.array_equal(volumes(mesh.p, mesh.t), vol)
    corner = np.array([[0.0, 1.0, 0.0, 0.0], [0.0, 0.0, 1.0, 0.0], [0.0, 0.0, 0.0, 1.0]])
    one = np.array([[0], [1], [2], [3]])
    assert np.isclose(length_along(corner, one, np.array([[1.0], [0.0], [0.0]]))[0], 1.0,
                      rtol=1e-14)


def test_shared_tensors_times_a_value_per_cell_equal_the_full_tensors(mesh: MeshTet) -> None:
    """Stiffness and tensor gradient with one tensor per group of cells times a value per
    cell against the same tensors formed whole per cell (stiffness: the scipy reference of
    the test above; gradient: numpy einsum of the basis gradients). The exact gradient of a
    linear field u = 2x − y + 3z is (2, −1, 3) on every cell (P1 reproduces linear fields).
    Tolerance: round-off of a different summation order (1e-13 relative)."""
    n, e = mesh.p.shape[1], mesh.t.shape[1]
    rng = np.random.default_rng(11)
    shared = rng.standard_normal((3, 3, 3))
    shared = shared + shared.transpose(1, 0, 2)
    group = rng.integers(0, 3, e)
    scale = rng.uniform(0.5, 2.0, e)
    whole = shared[:, :, group] * scale
    pat = CsrPattern.of_cells(mesh.t, n)
    ref = pat.stiffness(mesh.p, mesh.t, whole)
    got = pat.stiffness(mesh.p, mesh.t, shared, tensor_of=group, scale=scale)
    assert abs(got - ref).max() <= 1e-13 * abs(ref).max()
    u = 2 * mesh.p[0] - mesh.p[1] + 3 * mesh.p[2]
    grad_u = np.array([2.0, -1.0, 3.0])
    ref_g = np.einsum("ije,j->ie", whole, grad_u)
    got_g = tensor_gradient(mesh.p, mesh.t, u, shared, group, scale)
    assert np.allclose(got_g, ref_g, rtol=1e-13, atol=1e-13 * abs(ref_g).max())
    field = rng.standard_normal(n)
    grads, _ = gradients(mesh.p, mesh.t)
    ref_f = np.einsum("ije,ej->ie", whole, np.einsum("eik,ie->ek", grads, field[mesh.t]))
    got_f = tensor_gradient(mesh.p, mesh.t, field, shared, group, scale)
    assert np.allclose(got_f, ref_f, rtol=1e-13, atol=1e-13 * abs(ref_f).max())


def test_node_graph_is_the_pattern_without_entry_positions(mesh: MeshTet) -> None:
    """node_graph and CsrPattern share one kernel; cells joining every pair of 20 nodes
    (400 entries, more than the first guess of 16 columns per node) make the column array
    grow and still come out whole. Reference: scipy's COO → CSR of the element blocks."""
    from itertools import combinations

    n = mesh.p.shape[1]
    g = node_graph(mesh.t, n)
    pat = CsrPattern.of_cells(mesh.t, n)
    assert np.array_equal(g.indptr, pat.indptr) and np.array_equal(g.indices, pat.indices)
    dense = np.array(list(combinations(range(20), 4))).T
    dense_pat = CsrPattern.of_cells(dense, 20)
    ref = _scipy_sum(dense, np.ones((dense.shape[1], 4, 4)), 20)
    assert dense_pat.nnz == 400 > 16 * 20
    assert np.array_equal(dense_pat.indptr, ref.indptr)
    assert np.array_equal(dense_pat.indices, ref.indices)
    _each_entry_lands_on_its_own_pair(dense_pat, dense)


def test_cells_spanning_zero_equal_the_numpy_gather(mesh: MeshTet) -> None:
    """The compiled pass picks exactly the cells numpy's gather ``d[cells]`` picks (some
    node ≥ 0 and some ≤ 0), on int32 and int64 cells, for a field with exact zeros at nodes
    (touching counts) and for one below zero everywhere (no cell)."""
    rng = np.random.default_rng(3)
    for d in (rng.standard_normal(mesh.p.shape[1]),
              np.round(2.0 * rng.standard_normal(mesh.p.shape[1])),
              -1.0 - rng.random(mesh.p.shape[1])):
        side = d[mesh.t]
        expected = (side.max(axis=0) >= 0.0) & (side.min(axis=0) <= 0.0)
        for cells in (mesh.t.astype(np.int32), mesh.t.astype(np.int64)):
            assert np.array_equal(cells_spanning_zero(cells, d), expected)
    assert not cells_spanning_zero(mesh.t, -np.ones(mesh.p.shape[1])).any()


def test_transpose_positions_give_scipys_transpose(mesh: MeshTet) -> None:
    """The mirror entries read off the pattern equal scipy's transpose (reference
    library) value for value; a pattern that is not structurally symmetric is refused."""
    pattern = CsrPattern.of_cells(mesh.t, mesh.p.shape[1])
    A = pattern.matrix(np.random.default_rng(5).standard_normal(pattern.nnz))
    mirror = transpose_positions(A)
    assert mirror.dtype == np.int32
    assert np.array_equal(A.data[mirror], A.T.tocsr().data)
    with pytest.raises(ValueError, match="structurally symmetric"):
        transpose_positions(sp.csr_matrix(np.triu(np.ones((4, 4)))))
