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


def test_dispersion_formed_block_by_block_is_the_whole_tensor(monkeypatch):
    """θD formed for blocks of 7 cells (never held whole) against the tensor of the whole
    seepage velocity times θ: equal bit for bit (the same operations per cell), and so are
    the operators assembled from either; aᵀθDa by blocks equals the whole einsum to
    1e-14 relative (summation order only)."""
    import fe3d.p1
    import fe3d.transport.model
    from fe3d.transport.dispersion import dispersion_tensor
    from fe3d.transport.model import Dispersion

    monkeypatch.setattr(fe3d.p1, "CELL_BLOCK", 7)
    monkeypatch.setattr(fe3d.transport.model, "CELL_BLOCK", 7)
    rng = np.random.default_rng(2)
    mesh = MeshTet.init_tensor(np.linspace(0, 2, 4), np.linspace(0, 1, 3), np.linspace(0, 1, 3))
    e = mesh.t.shape[1]
    unit = rng.integers(0, 2, e)
    theta = np.array([0.3, 0.25])[unit]
    q = rng.standard_normal((3, e)) * 1e-6
    q[:, 0] = 0.0  # a cell without flow: D* I
    disp = Dispersion(darcy_flux=q, porosity=theta, cell_unit=unit,
                      longitudinal=np.array([2.0, 0.5]),
                      transverse_horizontal=np.array([0.2, 0.05]),
                      transverse_vertical=np.array([0.02, 0.01]),
                      effective_diffusion=np.array([1e-10, 5e-10]))
    whole = dispersion_tensor(q / theta, alpha_l=disp.longitudinal[unit],
                              alpha_th=disp.transverse_horizontal[unit],
                              alpha_tv=disp.transverse_vertical[unit],
                              d_eff=disp.effective_diffusion[unit]) * theta
    blocks = np.concatenate([disp.of_cells(a, b) for a, b in disp.blocks()], axis=2)
    assert np.array_equal(blocks, whole)
    a = q / theta
    ref = np.einsum("ie,ije,je->e", a, whole, a)
    assert np.allclose(disp.along(a), ref, rtol=1e-14, atol=0.0)
    coef = {"m": theta, "k": np.full(e, 1e-9), "q": q, "a": a, "tau": np.zeros(e),
            "n": mesh.p.shape[1]}
    held = transport_operators(mesh.p, mesh.t, theta_d=whole, **coef)
    formed = transport_operators(mesh.p, mesh.t, theta_d=disp.of_cells, **coef)
    assert all(np.array_equal(x.data, y.data) for x, y in zip(held, formed, strict=True))
