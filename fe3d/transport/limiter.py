"""Flux correction of the low-order monotone step towards a high-order target (theory.md T16b).

The low-order step of T16, M_L (c_L − cⁿ)/Δt + L c_L = b (backward Euler, lumped storage,
discrete upwinding: bounded at any step), and a high-order target step, the Galerkin
θ-scheme M (c_H − cⁿ)/Δt + K(θ c_H + (1 − θ) cⁿ) = b (Crank–Nicolson or backward Euler),
differ by a sum of antisymmetric fluxes between neighbours plus a remainder at the sinks
(decay and outflow; :func:`limited_target_fluxes`). Flux correction adds back as much of
each flux as keeps every node within the range of its neighbours' values (Zalesak's
limiter), and repeats that on the unused part of the fluxes against the corrected field:

    c_i = c_L,i + Δt/m_i Σ_j α_ij f_ij,   0 ≤ α_ij = α_ji ≤ 1.

Kuzmin 2009, "Explicit and implicit FEM-FCT algorithms with flux linearization", J. Comput.
Phys. 228 (the linearised correction and its bounds); Zalesak 1979, "Fully multidimensional
flux-corrected transport algorithms for fluids", J. Comput. Phys. 31 (the limiter); Schär &
Smolarkiewicz 1996, "A synchronous and iterative flux-correction formalism for coupled
transport equations", J. Comput. Phys. 128 (iterating the limiter on the remaining fluxes);
all from memory. Compiled (numba) on the CSR arrays.
"""

from __future__ import annotations

from dataclasses import dataclass

import numba
import numpy as np
import scipy.sparse as sp

from fe3d._typing import FloatArray, IndexArray

__all__ = ["LIMITER_PASSES", "PASS_TOLERANCE", "Correction", "TargetFluxes",
           "limited_target_fluxes", "raw_flux_sums"]

LIMITER_PASSES = 4
"""Passes of Zalesak's limiter over the fluxes not yet used (iterative flux correction)."""

PASS_TOLERANCE = 1e-3
"""The passes stop once a pass changes no free node by more than this share of the largest
value of the low-order and target fields (0.1 %: well below what separates a receptor's
value from its limit; common practice, no source)."""


@numba.njit(cache=True, nogil=True)
def _target_fluxes(indptr: IndexArray, cols: IndexArray, m: FloatArray, d: FloatArray,
                   low: FloatArray, low_t: FloatArray, c_low: FloatArray, rate: FloatArray,
                   c_mean: FloatArray) -> FloatArray:
    """Raw fluxes f_ij towards the target, per CSR entry. No prelimiting: dropping those
    that run down the gradient of c_L removed the target's own spreading (T16b)."""
    f = np.zeros(cols.size)
    for i in range(c_low.size):
        x_i = c_low[i] - c_mean[i]
        for p in range(indptr[i], indptr[i + 1]):
            j = cols[p]
            if j == i:
                continue
            fij = (m[p] * (rate[i] - rate[j]) - d[p] * (c_mean[i] - c_mean[j])
                   + low[p] * (c_low[j] - c_mean[j]) - low_t[p] * x_i)
            f[p] = fij
    return f


@numba.njit(cache=True, nogil=True)
def _zalesak_pass(indptr: IndexArray, cols: IndexArray, f: FloatArray, lumped: FloatArray,
                  c: FloatArray, dt: float, held: np.ndarray, blocked: np.ndarray,
                  cap: FloatArray, total: FloatArray) -> float:
    """One pass of Zalesak's limiter, in place: the share α_ij f_ij of each flux that keeps
    every free node within its neighbours' range of ``c`` (the upper end raised to ``cap``,
    what the node's sources bring) is added to ``total`` (net flux per node) and to ``c``
    at the free nodes, and taken off ``f``. Held nodes do not limit their neighbours;
    blocked nodes take and give no flux. Returns the largest change of a free node's value.
    Branch-free inner loops (the signs of the fluxes are mixed)."""
    n = lumped.size
    r_plus, r_minus = np.ones(n), np.ones(n)
    for i in range(n):
        if held[i]:
            continue
        if blocked[i]:
            r_plus[i] = r_minus[i] = 0.0
            continue
        p_plus = p_minus = q_minus = 0.0
        q_plus = max(0.0, cap[i] - c[i])
        ci = c[i]
        for p in range(indptr[i], indptr[i + 1]):
            fp = f[p]
            p_plus += max(fp, 0.0)
            p_minus += min(fp, 0.0)
            d = c[cols[p]] - ci
            q_plus = max(q_plus, d)
            q_minus = min(q_minus, d)
        if p_plus > 0.0:
            r_plus[i] = min(1.0, lumped[i] * q_plus / (dt * p_plus))
        if p_minus < 0.0:
            r_minus[i] = min(1.0, lumped[i] * q_minus / (dt * p_minus))
    moved = 0.0
    for i in range(n):
        s = 0.0
        rp, rm = r_plus[i], r_minus[i]
        for p in range(indptr[i], indptr[i + 1]):
            fij = f[p]
            j = cols[p]
            a = max(fij, 0.0) * min(rp, r_minus[j]) + min(fij, 0.0) * min(rm, r_plus[j])
            f[p] = fij - a
            s += a
        total[i] += s
        if not held[i]:
            c[i] += dt * s / lumped[i]
            moved = max(moved, abs(dt * s / lumped[i]))
    return moved


@dataclass(frozen=True)
class TargetFluxes:
    """The operators the correction towards a high-order target needs, on one CSR pattern:
    the consistent mass M, the diffusion D that the low-order operator added (T16,
    nonpositive off-diagonal entries), the low-order operator L = K + D and its transpose's
    values on the same pattern, the lumped mass m_L (row sums of M) and L's column sums
    [m³/s] (the nodal decay and outflow: the sinks)."""

    mass: sp.csr_matrix
    diffusion: sp.csr_matrix
    low_order: sp.csr_matrix
    low_order_transposed: FloatArray
    lumped: FloatArray
    sink: FloatArray
    exchange: FloatArray  # the diagonal of D [m³/s]: a node's exchange with its neighbours

    @classmethod
    def of(cls, mass: sp.csr_matrix, galerkin: sp.csr_matrix,
           low_order: sp.csr_matrix) -> TargetFluxes:
        """From the Galerkin operators M, K and the low-order spatial operator L."""
        lt = low_order.T.tocsr()
        lt.sort_indices()
        if not (np.array_equal(mass.indptr, low_order.indptr)
                and np.array_equal(mass.indices, low_order.indices)
                and np.array_equal(lt.indices, low_order.indices)):
            msg = "the operators must share one structurally symmetric CSR pattern"
            raise ValueError(msg)
        diffusion = sp.csr_matrix((low_order.data - galerkin.data, low_order.indices,
                                   low_order.indptr), shape=low_order.shape)
        return cls(mass=mass, diffusion=diffusion, low_order=low_order,
                   low_order_transposed=np.ascontiguousarray(lt.data),
                   lumped=np.asarray(mass.sum(axis=1)).ravel(),
                   sink=np.asarray(low_order.sum(axis=0)).ravel(),
                   exchange=diffusion.diagonal())


@dataclass(frozen=True)
class Correction:
    """The correction of one low-order step (theory.md T16b).

    ``fluxes`` [kg/s per node]: the net limited fluxes, Σ = 0 (the fixed nodes' share goes
    to the source input through the residual); ``corrected``: the new field (c_L plus both
    corrections at the free nodes); ``sink_state``: the field the sinks (decay, outflow)
    acted on, for the budget; ``blocked`` nodes and limiter ``passes``."""

    fluxes: FloatArray
    corrected: FloatArray
    sink_state: FloatArray
    blocked: int
    passes: int


def limited_target_fluxes(ops: TargetFluxes, c_low: FloatArray, c_high: FloatArray,
                          c_old: FloatArray, dt: float, theta: float, fixed: IndexArray,
                          *, reach: float = np.inf, passes: int = LIMITER_PASSES,
                          upper: FloatArray | None = None) -> Correction:
    """Move the low-order step c_L towards a high-order target step c_H (theory.md T16b),
    as far as the local bounds allow.

    The target solves M(c_H − cⁿ)/Δt + K ĉ = b with ĉ = θ c_H + (1 − θ) cⁿ (Galerkin,
    backward Euler or Crank–Nicolson), the low-order step M_L(c_L − cⁿ)/Δt + L c_L = b with
    L = K + D. Their difference is M_L(c_H − c_L)/Δt = Σ_j f_ij + r_i with the antisymmetric

        f_ij = m_ij (ċ_i − ċ_j) + d_ij (ĉ_i − ĉ_j) + l_ij x_j − l_ji x_i,
        ċ = (c_H − cⁿ)/Δt,  x = c_L − ĉ,

    (d_ij ≥ 0 the added diffusion) and the nodal remainder r_i = x_i Σ_j l_ji, nonzero only
    where L's column sums are: at the sinks (decay and outflow, which the low-order step
    takes at c_L and the target at ĉ). Unlimited, the two corrections give c_H exactly.
    Zalesak's limiter keeps every corrected value within the range of its neighbours'
    values; it is applied again to the part of each flux not yet used, against the
    corrected field, up to ``passes`` times and until a pass moves no node by more than
    ``PASS_TOLERANCE`` of the fields' scale (iterative flux correction). ``upper`` [kg/m³]
    raises a node's upper bound to what its sources bring (injected or inflowing water's
    concentration; +inf for a mass load), so a source node is not held down to its
    neighbours' values. The remainder is
    then added at each free node as far as the node stays at or above zero (where it
    lowers it) or within its neighbours' range of the corrected field and of the step's
    start (where it raises it).
    Every pass stays bounded, so the result is bounded whatever the step. Nodes ``fixed``
    take no correction; the fluxes they exchange still appear in ``fluxes`` (with the
    opposite sign at the fixed node), so their sum is 0. A node whose step is long against
    its exchange with its neighbours, Δt Σ_j d_ij > ``reach`` m_i, takes and gives no
    flux."""
    n = ops.lumped.size
    held = np.zeros(n, dtype=np.bool_)
    held[fixed] = True
    blocked = ~held & (dt * ops.exchange > reach * ops.lumped)
    c_low = np.ascontiguousarray(c_low, dtype=float)
    indptr, cols = ops.mass.indptr, ops.mass.indices
    f = _raw_fluxes(ops, c_low, c_high, c_old, dt, theta)
    c, total = c_low.copy(), np.zeros(n)
    free = ~held
    # the diagonal of f is zero by construction (f_ii = 0): the passes may run over it
    cap = np.full(n, -np.inf) if upper is None else np.asarray(upper, dtype=float)
    scale = max(float(np.max(np.abs(c_low))), float(np.max(np.abs(c_high))))
    used = 0
    for used in range(1, passes + 1):
        moved = _zalesak_pass(indptr, cols, f, ops.lumped, c, float(dt), held, blocked, cap,
                              total)
        if used > 1 and moved <= PASS_TOLERANCE * scale:
            break
    change, a = _sink_change(ops, c, c_low, np.asarray(c_old, dtype=float), dt, theta)
    share = _sink_share(indptr, cols, c, np.asarray(c_old, dtype=float), change,
                        free & ~blocked, cap)
    c[free] += share[free] * change[free]
    # the sinks acted on c_L − (m/Δt)(c − c*)/s = c_L − (c − c*)/a
    acted = c_low - np.divide(share * change, a, out=np.zeros(n), where=a > 0.0)
    return Correction(fluxes=total, corrected=c, sink_state=acted,
                      blocked=int(blocked.sum()), passes=used)


def _sink_change(ops: TargetFluxes, c_star: FloatArray, c_low: FloatArray,
                 c_old: FloatArray, dt: float, theta: float) -> tuple[FloatArray, FloatArray]:
    """The sinks' remainder at each node after the flux passes (``c_star``), taken at the
    node's own corrected value (theory.md T16b): m(c − c*)/Δt = s(c_L − θc − (1 − θ)cⁿ),
    so c = [c* + a(c_L − (1 − θ)cⁿ)]/(1 + θa) with a = Δt s/m. Implicit in c, it stays
    between c* and c_L for backward Euler whatever a (a stiff decay, λΔt ≫ 1, no longer
    drives the node to zero), and with every flux used it gives the target exactly.
    Returns the change c − c* and a [-]."""
    a = dt * ops.sink / ops.lumped
    target = (c_star + a * (c_low - (1.0 - theta) * c_old)) / (1.0 + theta * a)
    return target - c_star, a


@numba.njit(cache=True, nogil=True)
def _sink_share(indptr: IndexArray, cols: IndexArray, c: FloatArray, c_old: FloatArray,
                change: FloatArray, free: np.ndarray, cap: FloatArray) -> FloatArray:
    """Share β_i ∈ [0, 1] of a nodal ``change`` that keeps each free node at or above zero
    when it lowers the node (a sink only takes mass: decay may take a node below its
    neighbours, as it does on a plateau), and within its neighbours' range of ``c`` and of
    the step's start ``c_old`` when it raises it (the upper end raised to ``cap``)."""
    beta = np.zeros(c.size)
    for i in range(c.size):
        if not free[i] or change[i] == 0.0:
            continue
        hi = max(c[i], cap[i])
        for p in range(indptr[i], indptr[i + 1]):
            hi = max(hi, c[cols[p]], c_old[cols[p]])
        room = (hi - c[i]) if change[i] > 0.0 else -max(c[i], 0.0)
        beta[i] = min(1.0, room / change[i])  # room = +inf: the whole change
    return beta


def _raw_fluxes(ops: TargetFluxes, c_low: FloatArray, c_high: FloatArray, c_old: FloatArray,
                dt: float, theta: float) -> FloatArray:
    c_high = np.asarray(c_high, dtype=float)
    rate = (c_high - c_old) / dt
    c_mean = theta * c_high + (1.0 - theta) * c_old
    return _target_fluxes(ops.mass.indptr, ops.mass.indices, ops.mass.data,
                          ops.diffusion.data, ops.low_order.data, ops.low_order_transposed,
                          np.ascontiguousarray(c_low, dtype=float), rate, c_mean)


def raw_flux_sums(ops: TargetFluxes, c_low: FloatArray, c_high: FloatArray,
                  c_old: FloatArray, dt: float, theta: float) -> FloatArray:
    """Σ_j f_ij at every node [kg/s], before any limiting: the part of
    M_L(c_H − c_L)/Δt that the correction can move (see :func:`limited_target_fluxes`)."""
    f = _raw_fluxes(ops, c_low, c_high, c_old, dt, theta)
    rows = np.repeat(np.arange(ops.lumped.size), np.diff(ops.mass.indptr))
    return np.bincount(rows, weights=f, minlength=ops.lumped.size)
