"""Shock capturing (theory.md T15): the artificial-diffusion matrix against scikit-fem, and the
coefficient's defining properties (zero residual → zero, bounds, no mutation)."""

from __future__ import annotations

import numpy as np
import pytest
from skfem import Basis, ElementTetP1, MeshTet, asm

from fe3d.errors import SolverError
from fe3d.mesh.geometry import p1_gradients
from fe3d.transport import forms
from fe3d.transport.shock import (
    SHOCK_STRENGTH,
    isotropic_stiffness,
    picard_shock_step,
    shock_diffusivity,
)
from fe3d.transport.stabilization import element_length_along_flow


def _mesh(seed: int = 1) -> MeshTet:
    rng = np.random.default_rng(seed)
    mesh = MeshTet.init_tensor(np.linspace(0, 2, 4), np.linspace(0, 1, 3), np.linspace(0, 1, 3))
    return MeshTet(mesh.p + 0.04 * rng.standard_normal(mesh.p.shape), mesh.t)


def _coefficients(mesh: MeshTet, seed: int = 2) -> dict:
    """Random per-cell storage, decay and flux, and h along the flow (T7)."""
    rng = np.random.default_rng(seed)
    e = mesh.t.shape[1]
    grads, vol = p1_gradients(mesh.p, mesh.t)
    m = rng.uniform(0.2, 2.0, e)
    q = rng.standard_normal((3, e))
    return {"grads": grads, "vol": vol, "m": m, "q": q, "k": rng.uniform(0.0, 1.0, e),
            "h": element_length_along_flow(q / m, grads), "along": rng.uniform(0.0, 0.1, e)}


def test_stiffness_matches_scikit_fem():
    """Σ ν_e V_e ∇φ_i·∇φ_j against scikit-fem's quadrature assembly of ∫ν∇u·∇v (scikit-fem, a
    general-purpose FE library, is the reference) on a distorted mesh with random ν per cell
    (a third of them zero), in chunks smaller than the mesh.
    Tolerance 1e-12 × the largest entry: both sum a few dozen products per entry in double
    precision (round-off ~ 1e-15 relative), with a wide margin."""
    mesh = _mesh()
    e = mesh.t.shape[1]
    nu = np.random.default_rng(3).uniform(0.0, 2.0, e)
    nu[::3] = 0.0  # cells without shock capturing are skipped: they must still come out right
    basis = Basis(mesh, ElementTetP1())
    ref = asm(forms.shock_diffusion, basis, nu=np.repeat(nu[:, None], basis.X.shape[1], axis=1))
    mine = isotropic_stiffness(mesh.p, mesh.t, nu, mesh.p.shape[1])
    assert abs(ref - mine).max() <= 1e-12 * abs(ref).max()
    # symmetric with zero row sums: moves no mass (T9)
    assert abs(mine - mine.T).max() <= 1e-14 * abs(mine).max()
    assert np.max(np.abs(mine.sum(axis=1))) <= 1e-13 * abs(mine).max()


_BDF2_RATIO = 0.7  # Δt_n/Δt_{n−1} of the variable-step BDF2 case
_SCHEMES = {
    "backward_euler": (1.0, (1.0, -1.0, 0.0)),
    "crank_nicolson": (0.5, (1.0, -1.0, 0.0)),
    "bdf2": (1.0, ((1 + 2 * _BDF2_RATIO) / (1 + _BDF2_RATIO), -(1 + _BDF2_RATIO),
                   _BDF2_RATIO**2 / (1 + _BDF2_RATIO))),
}


@pytest.mark.parametrize("scheme", list(_SCHEMES))
def test_zero_where_the_discrete_residual_vanishes(scheme):
    """A linear profile carried at the transport velocity, c(x, t) = g·(x − a t) with a = q/m
    and no decay, solves the equation exactly and is exactly represented by P1 and by each
    scheme (all three are exact for fields linear in t): R_e = m(−g·a) + q·g = 0. Then ν = 0
    exactly where the along-flow dispersion is positive, and ν ≤ 1e-12 × the cap (round-off
    in R) where it is zero."""
    theta_t, weights = _SCHEMES[scheme]
    mesh = _mesh()
    co = _coefficients(mesh)
    e = mesh.t.shape[1]
    a = np.array([0.3, -0.2, 0.1])
    m = np.full(e, 0.7)
    q = np.repeat((m[0] * a)[:, None], e, axis=1)  # uniform flux so that a = q/m everywhere
    g = np.array([1.5, 0.5, -2.0])
    dt = 0.8
    c_older = g @ (mesh.p + (a * dt / _BDF2_RATIO)[:, None])  # one (longer) step earlier
    c_old = g @ mesh.p
    c_new = g @ (mesh.p - (a * dt)[:, None])
    kw = {"dt": dt, "m": m, "q": q, "k": np.zeros(e), "h": co["h"], "theta_t": theta_t,
          "time_weights": weights, "c_older": c_older}
    nu = shock_diffusivity(mesh.t, co["grads"], c_new, c_old, along_dispersion=co["along"]
                           + 1e-9, **kw)
    assert np.all(nu == 0.0)
    nu0 = shock_diffusivity(mesh.t, co["grads"], c_new, c_old,
                            along_dispersion=np.zeros(e), **kw)
    cap = 0.5 * np.linalg.norm(q, axis=0) * co["h"]
    assert np.all(nu0 <= 1e-12 * cap)


def test_bounds_and_flat_fields():
    """On random fields ν ≥ 0 and ν ≤ ½|q|h (the upwind cap), and it is positive somewhere (a
    rough field has a residual); on a uniform field with decay (R ≠ 0, ∇c = 0) ν = 0 without
    a division warning (warnings are errors in this suite)."""
    mesh = _mesh()
    co = _coefficients(mesh)
    rng = np.random.default_rng(4)
    n = mesh.p.shape[1]
    kw = {"dt": 0.3, "m": co["m"], "q": co["q"], "k": co["k"], "h": co["h"],
          "along_dispersion": co["along"]}
    cap = 0.5 * np.linalg.norm(co["q"], axis=0) * co["h"]
    for _ in range(5):
        nu = shock_diffusivity(mesh.t, co["grads"], rng.uniform(-1, 2, n), rng.uniform(0, 1, n),
                               **kw)
        assert np.all(nu >= 0.0)
        assert np.all(nu <= cap)
        assert np.any(nu > 0.0)
    flat = shock_diffusivity(mesh.t, co["grads"], np.full(n, 2.0), np.full(n, 3.0), **kw)
    assert np.all(flat == 0.0)
    zero = shock_diffusivity(mesh.t, co["grads"], np.zeros(n), np.zeros(n), **kw)
    assert np.all(zero == 0.0)


def test_one_cell_by_hand():
    """Reference tetrahedron, c = φ_1 (∇c = (1, 0, 0), mean ¼), c_old = 0, Δt = 1 s, m = 1,
    q = (1, 0, 0) m/s, k = 0, h = 1 m: R = ¼ + 1 = 1.25, ν = 0.35 × 1.25 − θD_∥ (hand
    computation, exact in binary to round-off: tolerance 1e-15 relative), capped at ½."""
    p = np.array([[0.0, 1.0, 0.0, 0.0], [0.0, 0.0, 1.0, 0.0], [0.0, 0.0, 0.0, 1.0]])
    cells = np.arange(4)[:, None]
    grads, _ = p1_gradients(p, cells)
    kw = {"dt": 1.0, "m": np.ones(1), "q": np.array([[1.0], [0.0], [0.0]]), "k": np.zeros(1),
          "h": np.ones(1)}
    c = np.array([0.0, 1.0, 0.0, 0.0])
    for along, expected in [(0.0, 0.4375), (0.1, 0.3375), (0.5, 0.0)]:
        nu = shock_diffusivity(cells, grads, c, np.zeros(4), along_dispersion=np.full(1, along),
                               **kw)
        assert nu[0] == pytest.approx(expected, rel=1e-15, abs=1e-16)
    strong = shock_diffusivity(cells, grads, c, np.zeros(4), along_dispersion=np.zeros(1),
                               strength=4 * SHOCK_STRENGTH, **kw)
    assert strong[0] == 0.5  # 1.75 capped at ½|q|h


def test_inputs_are_not_modified():
    mesh = _mesh()
    co = _coefficients(mesh)
    rng = np.random.default_rng(5)
    n = mesh.p.shape[1]
    args = {"cells": mesh.t, "grads": co["grads"], "c": rng.uniform(0, 1, n),
            "c_old": rng.uniform(0, 1, n)}
    kw = {"m": co["m"], "q": co["q"], "k": co["k"], "h": co["h"],
          "along_dispersion": co["along"]}
    before = {key: val.copy() for key, val in {**args, **kw}.items()}
    nu = shock_diffusivity(**args, dt=0.5, **kw)
    nu_copy = nu.copy()
    isotropic_stiffness(mesh.p, mesh.t, nu, n)
    for key, val in {**args, **kw}.items():
        np.testing.assert_array_equal(val, before[key], err_msg=key)
    np.testing.assert_array_equal(nu, nu_copy)


def test_picard_step_alternates_and_returns_the_last_pair():
    """The driver calls coeff → solve `passes` times, starting from the predictor, and
    returns the last solution with the coefficient it was solved with."""
    calls = []

    def coeff_from(c):
        calls.append(("coeff", float(c[0])))
        return c * 10.0

    def solve_with_extra(nu):
        calls.append(("solve", float(nu[0])))
        return nu / 10.0 + 1.0

    c, nu = picard_shock_step(solve_with_extra, coeff_from, np.zeros(2), passes=3)
    assert calls == [("coeff", 0.0), ("solve", 0.0), ("coeff", 1.0), ("solve", 10.0),
                     ("coeff", 2.0), ("solve", 20.0)]
    assert c[0] == 3.0 and nu[0] == 20.0
    with pytest.raises(SolverError):
        picard_shock_step(solve_with_extra, coeff_from, np.zeros(2), passes=0)


def test_bad_step_or_weight_is_refused():
    mesh = _mesh()
    co = _coefficients(mesh)
    n = mesh.p.shape[1]
    kw = {"m": co["m"], "q": co["q"], "k": co["k"], "h": co["h"],
          "along_dispersion": co["along"]}
    with pytest.raises(SolverError, match="time step"):
        shock_diffusivity(mesh.t, co["grads"], np.zeros(n), np.zeros(n), dt=0.0, **kw)
    with pytest.raises(SolverError, match="time weight"):
        shock_diffusivity(mesh.t, co["grads"], np.zeros(n), np.zeros(n), dt=1.0, theta_t=0.0,
                          **kw)
    with pytest.raises(SolverError, match="c_older"):
        shock_diffusivity(mesh.t, co["grads"], np.zeros(n), np.zeros(n), dt=1.0,
                          time_weights=(1.5, -2.0, 0.5), **kw)
