"""Closed-form transport operators against scikit-fem's assembly of the same forms."""

from __future__ import annotations

import numpy as np
from skfem import Basis, BilinearForm, ElementTetP1, MeshTet, asm

from fe3d.transport import forms
from fe3d.transport.assembly import transport_operators


@BilinearForm
def _mass(u, v, w):
    return forms.storage.form(u, v, w) + forms.supg_storage.form(u, v, w)


@BilinearForm
def _spatial(u, v, w):
    return (forms.advection.form(u, v, w) + forms.dispersion.form(u, v, w)
            + forms.decay.form(u, v, w) + forms.supg_advection.form(u, v, w)
            + forms.supg_decay.form(u, v, w))


def test_closed_form_operators_match_scikit_fem():
    """Random per-cell coefficients on a distorted mesh, chunks smaller than the mesh;
    scikit-fem (reference library) integrates the same forms by quadrature.
    Tolerance 1e-12 × the largest entry (round-off of a few hundred operations)."""
    rng = np.random.default_rng(1)
    mesh = MeshTet.init_tensor(np.linspace(0, 2, 4), np.linspace(0, 1, 3), np.linspace(0, 1, 3))
    p = mesh.p + 0.04 * rng.standard_normal(mesh.p.shape)
    mesh = MeshTet(p, mesh.t)
    e = mesh.t.shape[1]
    coef = {"m": rng.uniform(0.2, 2.0, e), "k": rng.uniform(0.0, 1.0, e),
            "q": rng.standard_normal((3, e)), "a": rng.standard_normal((3, e)),
            "tau": rng.uniform(0.0, 0.5, e)}
    d = rng.standard_normal((e, 3, 3))
    coef["theta_d"] = np.moveaxis(d @ np.transpose(d, (0, 2, 1)), 0, 2)
    basis = Basis(mesh, ElementTetP1())
    nqp = basis.X.shape[1]
    kw = {"m": coef["m"], "k": coef["k"], "q": coef["q"], "a": coef["a"], "tau": coef["tau"],
          "thetaD": coef["theta_d"]}
    kw = {key: np.repeat(val[..., None], nqp, axis=-1) for key, val in kw.items()}
    ref_m = asm(_mass, basis, **kw)
    ref_k = asm(_spatial, basis, **kw)
    mine_m, mine_k = transport_operators(mesh.p, mesh.t, n=mesh.p.shape[1],
                                         **coef)
    assert abs(ref_m - mine_m).max() <= 1e-12 * abs(ref_m).max()
    assert abs(ref_k - mine_k).max() <= 1e-12 * abs(ref_k).max()
    # the Galerkin and SUPG parts, built apart (a new step length rebuilds only SUPG), add up
    # to the whole, and the Galerkin part is scikit-fem's assembly without the SUPG forms
    gal = transport_operators(mesh.p, mesh.t, n=mesh.p.shape[1],
                              parts="galerkin", **coef)
    stab = transport_operators(mesh.p, mesh.t, n=mesh.p.shape[1], parts="supg",
                               **coef)
    assert abs(gal[0] + stab[0] - mine_m).max() <= 1e-14 * abs(mine_m).max()
    assert abs(gal[1] + stab[1] - mine_k).max() <= 1e-14 * abs(mine_k).max()
    ref_gal_k = asm(_spatial_galerkin, basis, **kw)
    assert abs(ref_gal_k - gal[1]).max() <= 1e-12 * abs(ref_gal_k).max()


@BilinearForm
def _spatial_galerkin(u, v, w):
    return (forms.advection.form(u, v, w) + forms.dispersion.form(u, v, w)
            + forms.decay.form(u, v, w))
