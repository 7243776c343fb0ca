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
fluids", J. Comput. Phys. 31 (both from memory). Pure numpy on the CSR arrays.
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp

from fe3d._typing import FloatArray, IndexArray

__all__ = ["limited_fluxes"]


def limited_fluxes(mass: sp.csr_matrix, diffusion: sp.csr_matrix, lumped: FloatArray,
                   c_low: FloatArray, c_old: FloatArray, dt: float,
                   fixed: IndexArray) -> FloatArray:
    """Net limited antidiffusive flux g_i = Σ_j α_ij f_ij into every node [kg/s].

    ``mass`` is the consistent mass operator M and ``diffusion`` the symmetric D of T16
    (nonpositive off-diagonal entries), both on one CSR pattern with its diagonal;
    ``lumped`` the row sums of M. Nodes ``fixed`` (fixed concentrations) take no correction
    and do not limit their neighbours; the fluxes they exchange still appear in g (with
    the opposite sign at the fixed node), so Σ g = 0. The corrected field is
    c_L + Δt g / m_L at the other nodes."""
    n = lumped.size
    indptr, cols = mass.indptr, mass.indices
    rows = np.repeat(np.arange(n), np.diff(indptr))
    rate = (c_low - c_old) / dt
    dc = c_low[rows] - c_low[cols]  # c_i − c_j
    f = mass.data * (rate[rows] - rate[cols]) - diffusion.data * dc  # d_ij ≥ 0 is −D
    f[rows == cols] = 0.0
    f[f * dc < 0.0] = 0.0  # prelimiting: a flux down the gradient is diffusive, drop it
    p_plus = np.bincount(rows, weights=np.maximum(f, 0.0), minlength=n)
    p_minus = np.bincount(rows, weights=np.minimum(f, 0.0), minlength=n)
    q_plus = np.maximum.reduceat(-dc, indptr[:-1])  # max_j (c_j − c_i) ≥ 0 (j = i included)
    q_minus = np.minimum.reduceat(-dc, indptr[:-1])
    with np.errstate(divide="ignore", invalid="ignore"):
        r_plus = np.where(p_plus > 0.0, np.minimum(1.0, lumped * q_plus / (dt * p_plus)), 1.0)
        r_minus = np.where(p_minus < 0.0, np.minimum(1.0, lumped * q_minus / (dt * p_minus)),
                           1.0)
    r_plus[fixed] = 1.0
    r_minus[fixed] = 1.0
    alpha = np.where(f > 0.0, np.minimum(r_plus[rows], r_minus[cols]),
                     np.minimum(r_minus[rows], r_plus[cols]))
    return np.bincount(rows, weights=alpha * f, minlength=n)
