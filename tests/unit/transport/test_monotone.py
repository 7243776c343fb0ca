"""Low-order operators by discrete upwinding (fe3d/transport/assembly.py, theory.md T16;
Kuzmin & Turek 2002, "Flux correction tools for finite elements", J. Comput. Phys. 175).

On a mesh of flat cells (plan size 10× the thickness, as in layered aquifers) with an
anisotropic dispersion tensor the Galerkin operator has positive off-diagonal entries; the
checks are the construction's defining properties (no positive off-diagonal entry, D
symmetric with zero row sums, lumping keeps every row sum) and their consequence, a
nonnegative inverse of the backward Euler step matrix (an M-matrix: Varga 1962, *Matrix
Iterative Analysis*, from memory), computed with numpy's dense inverse (reference library).
Tolerances are round-off: 1e-12 relative to the largest entry."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp
from skfem import MeshTet

from fe3d.transport.assembly import low_order_operators, transport_operators
from fe3d.transport.dispersion import dispersion_tensor
from fe3d.transport.limiter import TargetFluxes, limited_target_fluxes, raw_flux_sums


def _operators() -> tuple[sp.csr_matrix, sp.csr_matrix]:
    m = MeshTet.init_tensor(np.linspace(0, 50, 6), np.linspace(0, 30, 4), np.linspace(0, 2, 3))
    points, cells = np.asarray(m.p, dtype=float), np.asarray(m.t, dtype=np.int64)
    e = cells.shape[1]
    theta = np.full(e, 0.3)
    q = np.tile(np.array([[1.0], [0.4], [0.05]]) * 1e-6, (1, e))  # Darcy flux [m/s]
    v = q / theta
    D = dispersion_tensor(v, alpha_l=np.full(e, 5.0), alpha_th=np.full(e, 0.5),
                          alpha_tv=np.full(e, 0.05), d_eff=np.full(e, 1e-9))
    m_coef = theta * 1.5
    return transport_operators(points, cells, m=m_coef, k=np.full(e, 1e-9), q=q, a=q / m_coef,
                               tau=np.zeros(e), theta_d=theta * D, n=points.shape[1],
                               parts="galerkin")


def lumped_operators(M: sp.csr_matrix, K: sp.csr_matrix) -> tuple[sp.dia_matrix,
                                                                   sp.csr_matrix]:
    """The low-order operators with the lumped mass as a diagonal matrix (a run holds the
    diagonal alone)."""
    lumped, KD = low_order_operators(M, K)
    return sp.diags(lumped), KD


def test_discrete_upwinding_properties() -> None:
    M, K = _operators()
    off = ~np.eye(K.shape[0], dtype=bool)
    k_dense = K.toarray()
    scale = np.abs(k_dense).max()
    assert k_dense[off].max() > 1e-6 * scale  # the Galerkin operator is not monotone here
    ML, KD = lumped_operators(M, K)
    d = KD.toarray() - k_dense
    assert np.all(KD.toarray()[off] <= 1e-12 * scale)
    assert np.allclose(d, d.T, rtol=0, atol=1e-12 * scale)
    assert np.allclose(d.sum(axis=1), 0.0, rtol=0, atol=1e-12 * scale)
    ml = ML.toarray()
    assert np.count_nonzero(ml[off]) == 0
    assert np.allclose(ml.sum(axis=1), M.toarray().sum(axis=1), rtol=1e-12, atol=0)
    # the same CSR structure: operators of one mesh still add by their value arrays
    assert np.array_equal(KD.indices, K.indices) and np.array_equal(KD.indptr, K.indptr)


@pytest.mark.parametrize("dt", [1e5, 1e7, 1e9])
def test_backward_euler_step_matrix_has_a_nonnegative_inverse(dt: float) -> None:
    M, K = _operators()
    ML, KD = lumped_operators(M, K)
    inv = np.linalg.inv((ML / dt + KD).toarray())
    assert inv.min() >= -1e-12 * np.abs(inv).max()
    # the consistent-mass Galerkin step matrix does not have that property here
    inv_g = np.linalg.inv((M / dt + K).toarray())
    assert inv_g.min() < -1e-6 * np.abs(inv_g).max()


def _limiter_inputs(seed: int) -> tuple:
    """The correction's operators (theory.md T16b) and random low-order, target and old
    fields (random, so that the limiter is active)."""
    M, K = _operators()
    _, KD = lumped_operators(M, K)
    rng = np.random.default_rng(seed)
    n = K.shape[0]
    return TargetFluxes.of(M, K, KD), rng.random(n), rng.random(n), rng.random(n)


def _neighbourhood(ops: TargetFluxes) -> sp.csr_matrix:
    return (abs(ops.mass) + sp.identity(ops.lumped.size)).tocsr()


def test_limited_fluxes_conserve_and_keep_local_bounds() -> None:
    """Flux correction (theory.md T16b): the limited fluxes cancel in pairs (Σ g = 0 to
    round-off); with one pass of the limiter every corrected free value lies within the
    low-order and the step's start values of its node and neighbours (Zalesak 1979's
    limiter with those bounds, by construction);
    with the default passes and the sinks' remainder within [0, the largest low-order or
    old value]; fixed nodes take no correction."""
    ops, c_low, c_high, c_old = _limiter_inputs(8)
    m_l, n = ops.lumped, ops.lumped.size
    fixed = np.arange(0, n, 7)
    free = np.setdiff1d(np.arange(n), fixed)
    dt = 1e6
    fix = limited_target_fluxes(ops, c_low, c_high, c_old, dt, 0.5, fixed, passes=1)
    g = fix.fluxes
    assert fix.passes == 1
    assert abs(g.sum()) <= 1e-12 * np.abs(g).sum()
    c = c_low.copy()
    c[free] += dt * g[free] / m_l[free]
    adj = _neighbourhood(ops)
    for i in free:
        around = adj.indices[adj.indptr[i]:adj.indptr[i + 1]]
        nb = np.concatenate([c_low[around], c_old[around]])
        assert nb.min() - 1e-12 <= c[i] <= nb.max() + 1e-12
    assert np.abs(dt * g[free] / m_l[free]).max() > 1e-3  # the correction is not trivially 0
    fix = limited_target_fluxes(ops, c_low, c_high, c_old, dt, 0.5, fixed)
    g = fix.fluxes
    assert fix.passes > 1
    assert abs(g.sum()) <= 1e-12 * np.abs(g).sum()
    c = fix.corrected  # fluxes and the sinks' remainder (decay may lower a node to 0)
    assert c.min() >= -1e-12 and c.max() <= max(c_low.max(), c_old.max()) + 1e-12
    np.testing.assert_array_equal(c[fixed], c_low[fixed])


def test_raw_fluxes_carry_the_difference_between_the_steps() -> None:
    """The flux decomposition of T16b: for the low-order backward Euler step c_L and the
    Galerkin Crank–Nicolson step c_H from the same cⁿ (dense solves, numpy), M_L(c_H −
    c_L)/Δt equals the sum of the raw fluxes plus x_i Σ_j l_ji, x = c_L − ĉ. Tolerance:
    1e-9 of the largest term (the dense solves' round-off times the step matrices'
    condition numbers, about 1e3 here)."""
    M, K = _operators()
    ML, KD = lumped_operators(M, K)
    ops = TargetFluxes.of(M, K, KD)
    rng = np.random.default_rng(5)
    n = K.shape[0]
    c_old, b, dt = rng.random(n), 1e-7 * rng.random(n), 3e5
    Md, Kd, MLd, KDd = M.toarray(), K.toarray(), ML.toarray(), KD.toarray()
    c_low = np.linalg.solve(MLd / dt + KDd, MLd @ c_old / dt + b)
    c_high = np.linalg.solve(Md / dt + 0.5 * Kd, Md @ c_old / dt - 0.5 * Kd @ c_old + b)
    x = c_low - 0.5 * (c_high + c_old)
    lhs = ops.lumped * (c_high - c_low) / dt
    rhs = raw_flux_sums(ops, c_low, c_high, c_old, dt, 0.5) + x * KDd.sum(axis=0)
    np.testing.assert_allclose(rhs, lhs, rtol=0, atol=1e-9 * np.abs(lhs).max())


def test_a_stiff_sink_does_not_empty_a_steady_node() -> None:
    """Decay with λΔt = 20 around a constant point load, starting from the low-order step's
    own steady state (so c_L = cⁿ): the sinks' remainder is taken at each node's corrected
    value (implicit, theory.md T16b). With one limiter pass every free node stays within
    the local range of that state; with the default passes, each bounded by the field
    corrected so far, within the state's global range (the passes may carry a node below
    its first neighbours' range, here towards a target that goes negative: measured, one
    node at 0.96 of its neighbours' smallest value), and the load's node keeps at least
    half its value. Taken explicitly, λΔt(c_L − ĉ) emptied the load's node (0 against
    c_L = 0.05 kg/m³; found by the long-term-plume check). Tolerance: round-off of the
    dense solves (1e-12 of the largest value). Bound by construction, no outside reference."""
    mesh = MeshTet.init_tensor(np.linspace(0, 50, 11), np.linspace(0, 30, 7),
                               np.linspace(0, 2, 3))
    points, cells = np.asarray(mesh.p, dtype=float), np.asarray(mesh.t, dtype=np.int64)
    e = cells.shape[1]
    theta = np.full(e, 0.3)
    q = np.tile(np.array([[1.0], [0.4], [0.05]]) * 1e-6, (1, e))
    D = dispersion_tensor(q / theta, alpha_l=np.full(e, 5.0), alpha_th=np.full(e, 0.5),
                          alpha_tv=np.full(e, 0.05), d_eff=np.full(e, 1e-9))
    m_coef, lam, dt = theta * 1.5, 1e-6, 2e7  # λΔt = 20
    M, K = transport_operators(points, cells, m=m_coef, k=lam * m_coef, q=q, a=q / m_coef,
                               tau=np.zeros(e), theta_d=theta * D, n=points.shape[1],
                               parts="galerkin")
    ML, KD = lumped_operators(M, K)
    ops = TargetFluxes.of(M, K, KD)
    n = K.shape[0]
    load = np.zeros(n)
    source = int(np.argmin(np.hypot(points[0] - 10, points[1] - 15) + abs(points[2] - 1)))
    load[source] = 1e-6  # [kg/s]
    Md, Kd, MLd, KDd = M.toarray(), K.toarray(), ML.toarray(), KD.toarray()
    c_old = np.linalg.solve(KDd, load)  # the low-order steady state
    c_low = np.linalg.solve(MLd / dt + KDd, MLd @ c_old / dt + load)
    c_high = np.linalg.solve(Md / dt + 0.5 * Kd, Md @ c_old / dt - 0.5 * Kd @ c_old + load)
    upper = np.zeros(n)
    upper[source] = np.inf  # a mass load has no upper bound (sources.upper_bound)
    none = np.array([], dtype=np.int64)
    one = limited_target_fluxes(ops, c_low, c_high, c_old, dt, 0.5, none, upper=upper,
                                passes=1)
    tol = 1e-12 * c_old.max()
    adj = _neighbourhood(ops)
    for i in range(n):
        nb = c_old[adj.indices[adj.indptr[i]:adj.indptr[i + 1]]]
        assert nb.min() - tol <= one.corrected[i], (i, one.corrected[i], nb.min())
    for fix in (one, limited_target_fluxes(ops, c_low, c_high, c_old, dt, 0.5, none,
                                           upper=upper)):
        assert fix.corrected.min() >= c_old.min() - tol
        assert fix.corrected[source] >= 0.5 * c_low[source]
