"""Flux limiting of the low-order monotone step (theory.md T16b).

The low-order step of T16, M_L (c_L − cⁿ)/Δt + A_L c_L = b, differs from the Galerkin step
with consistent mass, M (c − cⁿ)/Δt + A c = b, by a sum of antidiffusive fluxes between
neighbours,

    f_ij = m_ij (ċ_i − ċ_j) + d_ij (c_i − c_j),   ċ = (c_L − cⁿ)/Δt,  f_ji = −f_ij,

(m_ij the consistent mass, d_ij ≥ 0 the diffusion T16 added). Linearised flux correction
adds back as much of each flux as keeps every node within the range of its neighbours'
low-order values (Zalesak's limiter):

    c_i = c_L,i + Δt/m_i Σ_j α_ij f_ij,   0 ≤ α_ij = α_ji ≤ 1.

Kuzmin 2009, "Explicit and implicit FEM-FCT algorithms with flux linearization", J. Comput.
Phys. 228; Zalesak 1979, "Fully multidimensional flux-corrected transport algorithms for
fluids", J. Comput. Phys. 31 (both from memory). Compiled (numba) on the CSR arrays.
"""

from __future__ import annotations

import numba
import numpy as np
import scipy.sparse as sp

from fe3d._typing import FloatArray, IndexArray

__all__ = ["limited_fluxes"]


@numba.njit(cache=True, nogil=True)
def _limit(indptr: IndexArray, cols: IndexArray, m: FloatArray, d: FloatArray,
           lumped: FloatArray, c_low: FloatArray, rate: FloatArray, dt: float,
           is_fixed: np.ndarray, reach: float) -> tuple[FloatArray, int]:
    n = lumped.size
    blocked = 0
    f = np.zeros(cols.size)
    r_plus, r_minus = np.ones(n), np.ones(n)
    for i in range(n):
        p_plus = p_minus = q_plus = q_minus = exchange = 0.0
        for p in range(indptr[i], indptr[i + 1]):
            j = cols[p]
            if j == i:
                continue
            exchange -= d[p]
            dc = c_low[i] - c_low[j]
            fij = m[p] * (rate[i] - rate[j]) - d[p] * dc  # d_ij ≤ 0 stored: −d is ≥ 0
            if fij * dc < 0.0:  # prelimiting: down the gradient, diffusive
                fij = 0.0
            f[p] = fij
            if fij > 0.0:
                p_plus += fij
            else:
                p_minus += fij
            q_plus = max(q_plus, -dc)
            q_minus = min(q_minus, -dc)
        if not is_fixed[i] and dt * exchange > reach * lumped[i]:
            r_plus[i] = r_minus[i] = 0.0  # the step is long against this node's exchange
            blocked += 1
        elif not is_fixed[i]:
            if p_plus > 0.0:
                r_plus[i] = min(1.0, lumped[i] * q_plus / (dt * p_plus))
            if p_minus < 0.0:
                r_minus[i] = min(1.0, lumped[i] * q_minus / (dt * p_minus))
    g = np.zeros(n)
    for i in range(n):
        s = 0.0
        for p in range(indptr[i], indptr[i + 1]):
            fij = f[p]
            if fij > 0.0:
                s += min(r_plus[i], r_minus[cols[p]]) * fij
            elif fij < 0.0:
                s += min(r_minus[i], r_plus[cols[p]]) * fij
        g[i] = s
    return g, blocked


def limited_fluxes(mass: sp.csr_matrix, diffusion: sp.csr_matrix, lumped: FloatArray,
                   c_low: FloatArray, c_old: FloatArray, dt: float,
                   fixed: IndexArray, *, reach: float = np.inf) -> tuple[FloatArray, int]:
    """Net limited antidiffusive flux g_i = Σ_j α_ij f_ij into every node [kg/s], and the
    number of nodes the ``reach`` rule below blocked.

    ``mass`` is the consistent mass operator M and ``diffusion`` the symmetric D of T16
    (nonpositive off-diagonal entries), both on one CSR pattern with its diagonal;
    ``lumped`` the row sums of M. Nodes ``fixed`` (fixed concentrations) take no correction
    and do not limit their neighbours; the fluxes they exchange still appear in g (with
    the opposite sign at the fixed node), so Σ g = 0. The corrected field is
    c_L + Δt g / m_L at the other nodes. A node whose step is long against its exchange
    with its neighbours, Δt Σ_j |d_ij| > ``reach`` m_i, takes and gives no flux (there the
    explicit correction would push it to a neighbour's extreme). One compiled pass for
    the fluxes and the limiter's sums, one for the limited fluxes."""
    if not (np.array_equal(mass.indptr, diffusion.indptr)
            and np.array_equal(mass.indices, diffusion.indices)):
        msg = "the mass and diffusion operators must share one CSR pattern"
        raise ValueError(msg)
    is_fixed = np.zeros(lumped.size, dtype=np.bool_)
    is_fixed[fixed] = True
    c_low = np.ascontiguousarray(c_low, dtype=float)
    rate = (c_low - np.asarray(c_old, dtype=float)) / dt
    return _limit(mass.indptr, mass.indices, np.asarray(mass.data, dtype=float),
                  np.asarray(diffusion.data, dtype=float),
                  np.asarray(lumped, dtype=float), c_low, rate, float(dt), is_fixed,
                  float(reach))
