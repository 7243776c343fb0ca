"""Point location (fe3d/mesh/locate.py) on a box split into tetrahedra by scikit-fem (a
general-purpose reference library builds the mesh): every located point is rebuilt exactly
from its cell's corners and barycentric coordinates (the definition of barycentric
coordinates; tolerance 1e-12 m), and points outside are reported as outside."""

from __future__ import annotations

import numpy as np
import pytest
import skfem

from fe3d.errors import MeshError
from fe3d.mesh.locate import CellFinder, locate_points


def _flat_box() -> tuple[np.ndarray, np.ndarray]:
    """A 100 m × 60 m × 6 m box: flat cells as in layered meshes (plan size ≫ thickness)."""
    m = skfem.MeshTet.init_tensor(np.linspace(0, 100, 11), np.linspace(0, 60, 7),
                                  np.linspace(0, 6, 5))
    return np.asarray(m.p, dtype=float), np.asarray(m.t, dtype=np.int64)


def test_located_points_are_rebuilt_from_their_cells() -> None:
    points, cells = _flat_box()
    rng = np.random.default_rng(2)
    xs = rng.random((3, 200)) * np.array([[100.0], [60.0], [6.0]])
    for ids, bary in (CellFinder(points, cells).find(xs), locate_points(points, cells, xs)):
        assert np.all(ids >= 0)
        assert np.all(bary >= -1e-9) and np.allclose(bary.sum(axis=0), 1.0, atol=1e-12)
        rebuilt = np.einsum("dik,ik->dk", points[:, cells[:, ids]], bary)
        assert np.allclose(rebuilt, xs, rtol=0, atol=1e-12 * 100)


def test_points_outside_are_reported() -> None:
    points, cells = _flat_box()
    outside = np.array([[50.0, 120.0], [30.0, 30.0], [7.0, 3.0]])
    ids, _ = CellFinder(points, cells).find(outside)
    assert ids.tolist() == [-1, -1]
    # a subset finder answers in the mesh's cell numbering
    sub = np.arange(0, cells.shape[1], 2)
    ids_sub, _ = CellFinder(points, cells, sub).find(points[:, cells[:, sub[:5]]].mean(axis=1))
    assert ids_sub.tolist() == sub[:5].tolist()
    with pytest.raises(MeshError, match="outside the mesh"):
        locate_points(points, cells, outside)


def test_a_site_mesh_holds_its_arrays_in_the_kernels_layout() -> None:
    """The compiled kernels read C-ordered float64 points and int32 or int64 cells; a
    SiteMesh given a transposed view (as the mesher's points were) holds a C-ordered copy of
    the same values, and given int64 cells it holds them as int32 (16 bytes per cell instead
    of 32, about 93 bytes per node: docs/performance.md, memory per node)."""
    from fe3d.mesh.site_mesh import SiteMesh

    points, cells = _flat_box()
    view = np.ascontiguousarray(points.T).T  # same values, Fortran order
    assert not view.flags.c_contiguous
    site = SiteMesh(points=view, cells=cells, cell_layer=np.zeros(
        cells.shape[1], dtype=np.int64), layer_names=("box",), faces={})
    assert site.points.flags.c_contiguous and site.points.dtype == np.float64
    assert site.cells.flags.c_contiguous and site.cells.dtype == np.int32
    assert np.array_equal(site.points, points) and np.array_equal(site.cells, cells)


def test_p1_operators_on_int32_cells_equal_those_on_int64_cells_bit_for_bit() -> None:
    """A mesh's int32 cells reach the compiled kernels as they are (no int64 copy) and give
    the same CSR pattern and matrix values, bit for bit, as int64 cells: the pattern, a
    stiffness matrix with one tensor per cell, and the nodal lumping (against numpy's
    ``bincount``, the sum it replaced, in the same order)."""
    from fe3d.mesh.site_mesh import SiteMesh
    from fe3d.p1 import CsrPattern, index_array, sum_at_corners

    points, cells = _flat_box()
    site = SiteMesh(points=points, cells=cells, cell_layer=np.zeros(
        cells.shape[1], dtype=np.int64), layer_names=("box",), faces={})
    assert index_array(site.cells) is site.cells  # no copy on the way to a kernel
    rng = np.random.default_rng(5)
    a = rng.random((3, 3, cells.shape[1]))
    tensors = a + a.transpose(1, 0, 2)
    wide = CsrPattern.of_cells(cells, site.n_nodes)
    narrow = site.pattern
    assert narrow.cells is site.cells
    A64 = wide.stiffness(points, cells, tensors)
    A32 = narrow.stiffness(site.points, site.cells, tensors)
    assert np.array_equal(A64.indptr, A32.indptr) and np.array_equal(A64.indices, A32.indices)
    assert A64.data.tobytes() == A32.data.tobytes()
    weight = rng.random(cells.shape[1])
    expected = np.bincount(cells.ravel(), weights=np.tile(weight, 4), minlength=site.n_nodes)
    assert sum_at_corners(site.cells, weight, site.n_nodes).tobytes() == expected.tobytes()
    assert sum_at_corners(cells, weight, site.n_nodes).tobytes() == expected.tobytes()
