"""Closed-form boundary integrals (fe3d.p1.BoundaryFacets) against scikit-fem's quadrature
of the weak forms in fe3d/transport/forms.py (a general-purpose FE library as reference;
tolerance 1e-13 relative, round-off)."""

from __future__ import annotations

import numpy as np
import pytest
from skfem import ElementTetP1, FacetBasis, MeshTet, asm

from fe3d.p1 import BoundaryFacets
from fe3d.transport import forms


@pytest.fixture(scope="module")
def mesh() -> MeshTet:
    m = MeshTet.init_tensor(np.linspace(0, 3, 4), np.linspace(0, 2, 3), np.linspace(-1, 0, 3))
    rng = np.random.default_rng(2)
    inner = ~np.isin(np.arange(m.p.shape[1]), m.boundary_nodes())
    p = m.p.copy()
    p[:, inner] += 0.1 * rng.standard_normal((3, int(inner.sum())))
    return MeshTet(p, m.t).with_boundaries({"east": lambda x: np.isclose(x[0], 3.0)})


def test_outflow_load_and_mass_match_quadrature(mesh: MeshTet) -> None:
    n = mesh.p.shape[1]
    rng = np.random.default_rng(0)
    q = rng.standard_normal((3, mesh.t.shape[1]))  # a flux constant per cell
    fb = FacetBasis(mesh, ElementTetP1(), facets=mesh.boundaries["east"])
    qn = np.clip(np.einsum("ke,keq->eq", q[:, fb.tind], fb.normals), 0.0, None)
    ref_load = asm(forms.outflow_weight, fb, qn=qn)
    ref_mass = asm(forms.outflow, fb, qn=qn)

    tri = mesh.facets[:, mesh.boundaries["east"]]
    bf = BoundaryFacets.of(mesh.p, mesh.t, tri[::-1])  # orientation of the triple is free
    assert np.allclose(bf.normal, [[1.0], [0.0], [0.0]], atol=1e-14)
    mine_qn = np.clip(bf.normal_flux(q), 0.0, None)
    assert np.allclose(bf.load(mine_qn, n), ref_load, rtol=0, atol=1e-13 * abs(ref_load).max())
    assert abs(bf.mass(mine_qn, n) - ref_mass).max() <= 1e-13 * abs(ref_mass).max()
    assert np.isclose(bf.area.sum(), 2.0 * 1.0, rtol=1e-14)


def test_a_triangle_that_is_no_face_is_refused(mesh: MeshTet) -> None:
    corners = np.array([[0], [int(np.argmax(mesh.p[0] + mesh.p[1]))], [mesh.p.shape[1] - 1]])
    with pytest.raises(ValueError, match="not a face of any cell"):
        BoundaryFacets.of(mesh.p, mesh.t, corners)
