"""Flux correction of the low-order monotone step towards a high-order target (theory.md T16b).

The low-order step of T16, M_L (c_L − cⁿ)/Δt + L c_L = b (backward Euler, lumped storage,
discrete upwinding: bounded at any step), and a high-order target step, the Galerkin
θ-scheme M (c_H − cⁿ)/Δt + K(θ c_H + (1 − θ) cⁿ) = b (Crank–Nicolson or backward Euler),
differ by a sum of antisymmetric fluxes between neighbours plus a remainder at the sinks
(decay and outflow; :func:`limited_target_fluxes`). Flux correction adds back as much of
each flux as keeps every node within the range of its neighbours' values, those of the
field so far and of the step's start (Zalesak's limiter with Zalesak's own bounds: bounds
from the low-order field alone clip a moving peak), and repeats that on the unused part
of the fluxes against the corrected field:

    c_i = c_L,i + Δt/m_i Σ_j α_ij f_ij,   0 ≤ α_ij = α_ji ≤ 1.

The target is either solved (:func:`limited_target_fluxes`, given c_H) or linearised at the
low-order step (:func:`linearised_correction`, an option: not accurate enough to be the
default, theory.md T16b). The passes are compiled sweeps over the CSR arrays with no
allocation per pass; rows with no work left are closed after each pass.

Kuzmin 2009, "Explicit and implicit FEM-FCT algorithms with flux linearization", J. Comput.
Phys. 228 (the linearised correction and its bounds); Zalesak 1979, "Fully multidimensional
flux-corrected transport algorithms for fluids", J. Comput. Phys. 31 (the limiter); Schär &
Smolarkiewicz 1996, "A synchronous and iterative flux-correction formalism for coupled
transport equations", J. Comput. Phys. 128 (iterating the limiter on the remaining fluxes);
all from memory. Compiled (numba) on the CSR arrays.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numba
import numpy as np
import scipy.sparse as sp

from fe3d._indices import unsigned
from fe3d._typing import FloatArray, IndexArray
from fe3d.p1 import transpose_positions

__all__ = ["CLOSE_TOLERANCE", "LIMITER_PASSES", "MASS_SWEEPS", "PASS_TOLERANCE", "Correction",
           "TargetFluxes", "TargetStep", "limited_target_fluxes", "linearised_correction",
           "linearised_target", "raw_flux_sums"]

LIMITER_PASSES = 16
"""Most passes of Zalesak's limiter over the fluxes not yet used (iterative flux
correction). Each pass's bounds are the ranges of the field corrected so far, so the passes
carry the bounds from the low-order step towards the corrected one. Measured on the demo at
its 0.1 yr step with cells ÷1, ÷1.5, ÷2.25 (theory.md T16b): MW-1's solvent peak 9.79 →
10.14 → 9.35 mg/L with 4 passes to 0.1 %, 9.82 → 10.56 → 10.85 with 16 to 10⁻⁵. The cap,
not PASS_TOLERANCE, ends the passes in most steps (benchmarks/step_cost.py: 15–16 passes
at Courant 1 and 10); 32 passes changed the demo's receptor peaks by at most 0.1 % (supply
screen 0.05807 → 0.05814 mg/L, the others equal to four digits)."""

CLOSE_TOLERANCE = 1e-6
"""After a pass, a node whose unused fluxes could move it by no more than this share of the
fields' scale takes no part in the later passes: its remaining fluxes are dropped, in pairs
(α_ij = α_ji = 0), so the budget still closes and the bounds hold. Set at a thousandth of
the earlier pass tolerance, 10⁻³ (common practice, no source), and kept when that became
10⁻⁵: measured at 223 k nodes after the first pass, 4 % of the rows stay open at Courant 1,
36 % at 10 (row sweeps over all passes 1.3 and 2.9–4.4)."""

MASS_SWEEPS = 2
"""Jacobi sweeps of the consistent mass for the linearised target's rate (T16b); the
correction adds one more. Kuzmin 2009 uses two to three (from memory)."""

PASS_TOLERANCE = 1e-5
"""The passes stop once a pass changes no free node by more than this share of the largest
value of the low-order and target fields. The largest value sits at the source, so a
receptor's value can be thousands of times smaller: at 10⁻³ the passes stopped while a
receptor's peak was still rising (the demo's series above); 10⁻⁵ (common practice, no
source)."""


@numba.njit(cache=True, nogil=True)
def _ratios(rows: IndexArray, sums: FloatArray, ranges: FloatArray, lumped: FloatArray,
            dt: float, held: np.ndarray, r: FloatArray) -> None:
    """Zalesak's R_i^± of the ``rows`` into r[2i], r[2i + 1] from the flux sums P_i^±
    (``sums``) and the ranges Q_i^± (``ranges``), same layout: 1 at held nodes, else
    min(1, m_i Q_i^± / (Δt P_i^±)) (1 where P_i^± = 0)."""
    for i in rows:
        rp = rm = 1.0
        if not held[i]:
            p_plus, p_minus = sums[2 * i], sums[2 * i + 1]
            if p_plus > 0.0:
                rp = min(1.0, lumped[i] * ranges[2 * i] / (dt * p_plus))
            if p_minus < 0.0:
                rm = min(1.0, lumped[i] * ranges[2 * i + 1] / (dt * p_minus))
        r[2 * i] = rp
        r[2 * i + 1] = rm


@numba.njit(cache=True, nogil=True)
def _first_sweep(indptr: IndexArray, cols: IndexArray, m: FloatArray, k: FloatArray,
                 low: FloatArray, low_t: FloatArray, c_low: FloatArray, rate: FloatArray,
                 c_mean: FloatArray, c_old: FloatArray, cap: FloatArray, f: FloatArray,
                 sums: FloatArray, ranges: FloatArray) -> None:
    """The raw fluxes f_ij towards the target (T16b) into ``f``, with the first pass's flux
    sums P_i^± and ranges Q_i^± of c_L and cⁿ (``c_old``; the upper end raised to ``cap``)
    into ``sums`` and
    ``ranges`` (2i, 2i + 1), in one sweep over the CSR arrays. No prelimiting: dropping the
    fluxes that run down the gradient of c_L removed the target's own spreading (T16b).
    The added diffusion d_ij = l_ij − k_ij is formed from L and the Galerkin K (``k``);
    l_ji is ``low_t[p]``, L's transpose on the same pattern (read in order: read at L's own
    position of entry (j, i) instead, the scattered reads took half of this sweep's time)."""
    for i in range(c_low.size):
        x_i = c_low[i] - c_mean[i]
        ci = c_low[i]
        p_plus = p_minus = q_minus = 0.0
        q_plus = max(0.0, cap[i] - ci)
        for p in range(indptr[i], indptr[i + 1]):
            j = cols[p]
            fij = 0.0
            if j != i:
                fij = (m[p] * (rate[i] - rate[j]) - (low[p] - k[p]) * (c_mean[i] - c_mean[j])
                       + low[p] * (c_low[j] - c_mean[j]) - low_t[p] * x_i)
            f[p] = fij
            p_plus += max(fij, 0.0)
            p_minus += min(fij, 0.0)
            q_plus = max(q_plus, c_low[j] - ci, c_old[j] - ci)
            q_minus = min(q_minus, c_low[j] - ci, c_old[j] - ci)
        sums[2 * i] = p_plus
        sums[2 * i + 1] = p_minus
        ranges[2 * i] = q_plus
        ranges[2 * i + 1] = q_minus


@numba.njit(cache=True, nogil=True)
def _apply_sweep(rows: IndexArray, indptr: IndexArray, cols: IndexArray, f: FloatArray,
                 lumped: FloatArray, c: FloatArray, dt: float, held: np.ndarray,
                 r: FloatArray, total: FloatArray, sums: FloatArray) -> float:
    """Second half of a pass over the ``rows``, in place: the share α_ij f_ij of each flux
    (α_ij = min(R_i^+, R_j^-) for f_ij > 0, else min(R_i^-, R_j^+)) is added to ``total``
    and to ``c`` at the free nodes and taken off ``f``; the unused fluxes' sums P_i^± for
    the next pass go to ``sums`` (2i, 2i + 1). Returns the largest change of a free
    node's value."""
    moved = 0.0
    for i in rows:
        s = p_plus = p_minus = 0.0
        rp, rm = r[2 * i], r[2 * i + 1]
        for p in range(indptr[i], indptr[i + 1]):
            fij = f[p]
            j = cols[p]
            a = max(fij, 0.0) * min(rp, r[2 * j + 1]) + min(fij, 0.0) * min(rm, r[2 * j])
            rest = fij - a
            f[p] = rest
            s += a
            p_plus += max(rest, 0.0)
            p_minus += min(rest, 0.0)
        sums[2 * i] = p_plus
        sums[2 * i + 1] = p_minus
        total[i] += s
        if not held[i]:
            step = dt * s / lumped[i]
            c[i] += step
            moved = max(moved, abs(step))
    return moved


@numba.njit(cache=True, nogil=True)
def _range_sweep(rows: IndexArray, indptr: IndexArray, cols: IndexArray, c: FloatArray,
                 c_old: FloatArray, cap: FloatArray, ranges: FloatArray) -> None:
    """The neighbours' range Q_i^± of ``c`` and ``c_old`` (the upper end raised to ``cap``)
    at the ``rows`` into ``ranges`` (2i, 2i + 1), for a later pass. Reads no flux."""
    for i in rows:
        ci = c[i]
        q_minus = 0.0
        q_plus = max(0.0, cap[i] - ci)
        for p in range(indptr[i], indptr[i + 1]):
            j = cols[p]
            q_plus = max(q_plus, c[j] - ci, c_old[j] - ci)
            q_minus = min(q_minus, c[j] - ci, c_old[j] - ci)
        ranges[2 * i] = q_plus
        ranges[2 * i + 1] = q_minus


@numba.njit(cache=True, nogil=True)
def _still_open(rows: IndexArray, sums: FloatArray, lumped: FloatArray, dt: float,
                floor: float, r: FloatArray) -> IndexArray:
    """The ``rows`` whose unused fluxes could still move them by more than ``floor``
    (Δt/m_i max(P_i^+, −P_i^-)); the others are closed: R_i^± = 0 from now on, so no flux
    of theirs is used again (α_ij = α_ji = 0) and the later passes skip them."""
    keep = np.empty(rows.size, dtype=rows.dtype)
    k = 0
    for i in rows:
        if dt * max(sums[2 * i], -sums[2 * i + 1]) > floor * lumped[i]:
            keep[k] = i
            k += 1
        else:
            r[2 * i] = r[2 * i + 1] = 0.0
    return keep[:k]


@numba.njit(cache=True, nogil=True)
def _limit(indptr: IndexArray, cols: IndexArray, m: FloatArray, k: FloatArray,
           low: FloatArray, low_t: FloatArray, c_low: FloatArray, rate: FloatArray,
           c_mean: FloatArray, c_old: FloatArray, cap: FloatArray, lumped: FloatArray,
           dt: float,
           held: np.ndarray, passes: int, stop: float, floor: float,
           c: FloatArray, total: FloatArray, work: FloatArray) -> tuple[int, int]:
    """Up to ``passes`` passes of Zalesak's limiter over the raw fluxes towards the target,
    each over the part of every flux not yet used and against the corrected field ``c``
    (updated in place, starting as c_L), the net limited flux per node added to ``total``.
    Stops after a pass (the second or later) that moves no free node by more than ``stop``.
    A pass is a sweep for the ranges Q^± and one for the fluxes (which also sums the unused
    fluxes P^± for the next pass); the raw fluxes are formed in the first pass's first
    sweep. After each pass the rows whose unused fluxes could move them by no more than
    ``floor`` are closed (:func:`_still_open`), so later passes sweep only the rows with
    work left. Returns the passes used and the rows swept over all passes."""
    n, nnz = lumped.size, cols.size
    f = work[:nnz]
    r, sums, ranges = work[nnz:nnz + 2 * n], work[nnz + 2 * n:nnz + 4 * n], work[nnz + 4 * n:]
    _first_sweep(indptr, cols, m, k, low, low_t, c_low, rate, c_mean, c_old, cap, f, sums,
                 ranges)
    rows = np.arange(n).astype(indptr.dtype)
    used, swept = 1, n
    while True:
        _ratios(rows, sums, ranges, lumped, dt, held, r)
        moved = _apply_sweep(rows, indptr, cols, f, lumped, c, dt, held, r, total, sums)
        if used >= passes or (used > 1 and moved <= stop):
            return used, swept
        rows = _still_open(rows, sums, lumped, dt, floor, r)
        swept += rows.size
        _range_sweep(rows, indptr, cols, c, c_old, cap, ranges)
        used += 1


@dataclass(frozen=True)
class TargetFluxes:
    """The operators the correction towards a high-order target needs, on one CSR pattern:
    the consistent mass M, the Galerkin spatial operator K, the low-order operator L = K + D
    (D the diffusion it added, T16, nonpositive off-diagonal entries: formed as L − K where
    it is read, not held) and its transpose's values on the same pattern (l_ji at the
    position of entry (i, j): read in order by the limiter's first sweep), the lumped mass
    m_L (row sums of M) and L's column sums [m³/s] (the nodal decay and outflow: the
    sinks)."""

    mass: sp.csr_matrix
    galerkin: sp.csr_matrix
    low_order: sp.csr_matrix
    low_order_transposed: FloatArray
    lumped: FloatArray
    sink: FloatArray
    work: FloatArray = field(repr=False, compare=False, default_factory=lambda: np.empty(0))
    """Scratch space of the passes (one value per CSR entry, then 3 × 2 per node), reused
    by every call so that no step allocates (and first touches) a flux array; its contents
    mean nothing between calls, so the species of a run share one (they are corrected one
    after another)."""

    def scratch(self) -> FloatArray:
        """The passes' scratch space (:attr:`work`), allocated here when the record was
        built without it."""
        need = self.scratch_size(self.mass.indices.size, self.lumped.size)
        return self.work if self.work.size == need else np.empty(need)

    @property
    def diffusion(self) -> sp.csr_matrix:
        """D = L − K, a new matrix on the same pattern."""
        return sp.csr_matrix((self.low_order.data - self.galerkin.data, self.low_order.indices,
                              self.low_order.indptr), shape=self.low_order.shape)

    @staticmethod
    def scratch_size(pattern_entries: int, n: int) -> int:
        """Length of the passes' scratch space on a pattern of ``pattern_entries`` entries
        and ``n`` rows."""
        return pattern_entries + 6 * n

    @classmethod
    def of(cls, mass: sp.csr_matrix, galerkin: sp.csr_matrix, low_order: sp.csr_matrix,
           work: FloatArray | None = None) -> TargetFluxes:
        """From the Galerkin operators M, K and the low-order spatial operator L; ``work``
        is the scratch space to use (of :meth:`scratch_size`; allocated here when None)."""
        nnz = low_order.indices.size
        msg = "the operators must share one structurally symmetric CSR pattern"
        if not (np.array_equal(mass.indptr, low_order.indptr)
                and np.array_equal(mass.indices, low_order.indices)):
            raise ValueError(msg)
        try:  # the position of (j, i) for each entry (i, j)
            mirror = transpose_positions(low_order)
        except ValueError as exc:
            raise ValueError(msg) from exc
        return cls(mass=mass, galerkin=galerkin, low_order=low_order,
                   low_order_transposed=low_order.data[mirror],
                   lumped=np.asarray(mass.sum(axis=1)).ravel(),
                   sink=np.asarray(low_order.sum(axis=0)).ravel(),
                   work=np.empty(cls.scratch_size(nnz, low_order.shape[0])) if work is None
                   else work)


@dataclass(frozen=True)
class TargetStep:
    """What the correction aims at (theory.md T16b): the target step's rate
    ċ = (c_H − cⁿ)/Δt [kg/m³/s] and its time-weighted mean ĉ = θ c_H + (1 − θ) cⁿ [kg/m³]
    (of a solved target step, or linearised at the low-order step)."""

    rate: FloatArray
    mean: FloatArray


@dataclass(frozen=True)
class Correction:
    """The correction of one low-order step (theory.md T16b).

    ``fluxes`` [kg/s per node]: the net limited fluxes, Σ = 0 (the fixed nodes' share goes
    to the source input through the residual); ``corrected``: the new field (c_L plus both
    corrections at the free nodes); ``sink_state``: the field the sinks (decay, outflow)
    acted on, for the budget; limiter ``passes`` and ``row_sweeps``, the rows the passes
    swept over all passes divided by the number of rows (1 per full pass: a
    load-independent measure of the limiter's work)."""

    fluxes: FloatArray
    corrected: FloatArray
    sink_state: FloatArray
    passes: int
    row_sweeps: float = 1.0


def limited_target_fluxes(ops: TargetFluxes, c_low: FloatArray, c_high: FloatArray,
                          c_old: FloatArray, dt: float, theta: float, fixed: IndexArray,
                          *, passes: int = LIMITER_PASSES,
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
    values of the field so far and of cⁿ; it is applied again to the part of each flux not
    yet used, against the corrected field, up to ``passes`` times and until a pass moves no
    node by more than ``PASS_TOLERANCE`` of the fields' scale (iterative flux correction).
    ``upper`` [kg/m³] raises a node's upper bound to what its sources bring (injected or
    inflowing water's concentration; +inf for a mass load), so a source node is not held
    down to its neighbours' values. The remainder is then added at each free node as far as
    the node stays at or above zero (where it lowers it) or within its neighbours' range of
    the corrected field and of the step's start (where it raises it). Every pass stays
    bounded, so the result is bounded whatever the step. Nodes ``fixed`` take no
    correction; the fluxes they exchange still appear in ``fluxes`` (with the
    opposite sign at the fixed node), so their sum is 0."""
    c_old = np.asarray(c_old, dtype=float)
    rate, c_mean = _rate_and_mean(np.asarray(c_high, dtype=float), c_old, dt, theta)
    return _correct(ops, c_low, TargetStep(rate=rate, mean=c_mean), c_old, dt, theta,
                    fixed, passes=passes, upper=upper)


def linearised_correction(ops: TargetFluxes, c_low: FloatArray, c_old: FloatArray,
                          dt: float, theta: float, fixed: IndexArray, *,
                          passes: int = LIMITER_PASSES, upper: FloatArray | None = None,
                          sweeps: int = MASS_SWEEPS) -> Correction:
    """As :func:`limited_target_fluxes`, with the target's rate and mean taken from the
    low-order step instead of a second solve (linearised correction, Kuzmin 2009; theory.md
    T16b): ĉ = θ c_L + (1 − θ) cⁿ and ċ from M ċ = b − K ĉ by :func:`linearised_target`.
    Unlimited, the result is cⁿ + Δt ċ with one more Jacobi sweep of M."""
    c_old = np.asarray(c_old, dtype=float)
    target = linearised_target(ops, c_low, c_old, dt, theta, fixed, sweeps=sweeps)
    return _correct(ops, c_low, target, c_old, dt, theta, fixed, passes=passes, upper=upper)


def linearised_target(ops: TargetFluxes, c_low: FloatArray, c_old: FloatArray, dt: float,
                      theta: float, fixed: IndexArray, *, sweeps: int = MASS_SWEEPS,
                      ) -> TargetStep:
    """The target's rate ċ [kg/m³/s] and mean ĉ [kg/m³] linearised at the low-order step
    (theory.md T16b): ĉ = θ c_L + (1 − θ) cⁿ, and at the free nodes M ċ = b − K ĉ, the
    Galerkin residual, with b − K ĉ = M_L (c_L − cⁿ)/Δt + L(c_L − ĉ) + D ĉ from the
    low-order step itself (so the loads need not be known), solved by ``sweeps`` Jacobi
    sweeps of the consistent mass from M_L⁻¹(b − K ĉ). At the ``fixed`` nodes
    ċ = (c_L − cⁿ)/Δt. Costs about 1.5 + ``sweeps`` SpMV."""
    n = ops.lumped.size
    held = np.zeros(n, dtype=np.bool_)
    held[fixed] = True
    c_low = np.ascontiguousarray(c_low, dtype=float)
    c_old = np.ascontiguousarray(c_old, dtype=float)
    mean = theta * c_low + (1.0 - theta) * c_old
    residual, rate = np.empty(n), np.empty(n)
    indptr, cols = unsigned(ops.mass.indptr), unsigned(ops.mass.indices)
    _galerkin_residual(indptr, cols, ops.low_order.data,
                       ops.galerkin.data, c_low, mean, c_old, ops.lumped, float(dt), held,
                       residual, rate)
    other = np.empty(n)
    for _ in range(sweeps):
        _mass_sweep(indptr, cols, ops.mass.data, ops.lumped, residual,
                    held, rate, other)
        rate, other = other, rate
    return TargetStep(rate=rate, mean=mean)


@numba.njit(cache=True, nogil=True)
def _galerkin_residual(indptr: IndexArray, cols: IndexArray, low: FloatArray, k: FloatArray,
                       c_low: FloatArray, mean: FloatArray, c_old: FloatArray,
                       lumped: FloatArray, dt: float, held: np.ndarray, residual: FloatArray,
                       rate: FloatArray) -> None:
    """b − K ĉ = M_L(c_L − cⁿ)/Δt + L(c_L − ĉ) + D ĉ per row into ``residual`` [kg/s] and
    its lumped rate M_L⁻¹(b − K ĉ) into ``rate`` (at held nodes (c_L − cⁿ)/Δt); D = L − K
    from L (``low``) and K (``k``)."""
    for i in range(lumped.size):
        own = (c_low[i] - c_old[i]) / dt
        s = 0.0
        for p in range(indptr[i], indptr[i + 1]):
            j = cols[p]
            s += low[p] * (c_low[j] - mean[j]) + (low[p] - k[p]) * mean[j]
        residual[i] = lumped[i] * own + s
        rate[i] = own if held[i] else residual[i] / lumped[i]


@numba.njit(cache=True, nogil=True)
def _mass_sweep(indptr: IndexArray, cols: IndexArray, m: FloatArray, lumped: FloatArray,
                residual: FloatArray, held: np.ndarray, rate: FloatArray,
                out: FloatArray) -> None:
    """One Jacobi sweep of M ċ = ``residual`` at the free nodes: out = ċ + M_L⁻¹(residual −
    M ċ); held nodes keep their rate."""
    for i in range(lumped.size):
        if held[i]:
            out[i] = rate[i]
            continue
        s = 0.0
        for p in range(indptr[i], indptr[i + 1]):
            s += m[p] * rate[cols[p]]
        out[i] = rate[i] + (residual[i] - s) / lumped[i]


def _correct(ops: TargetFluxes, c_low: FloatArray, target: TargetStep, c_old: FloatArray,
             dt: float, theta: float, fixed: IndexArray, *, passes: int,
             upper: FloatArray | None) -> Correction:
    """The limited correction of c_L towards ``target`` (see :func:`limited_target_fluxes`)."""
    n = ops.lumped.size
    held = np.zeros(n, dtype=np.bool_)
    held[fixed] = True
    c_low = np.ascontiguousarray(c_low, dtype=float)
    indptr, cols = unsigned(ops.mass.indptr), unsigned(ops.mass.indices)
    c, total = c_low.copy(), np.zeros(n)
    free = ~held
    cap = np.full(n, -np.inf) if upper is None else np.asarray(upper, dtype=float)
    rate, c_mean = target.rate, target.mean
    scale = max(float(np.max(np.abs(c_low))), float(np.max(np.abs(c_old + dt * rate))))
    used, swept = _limit(indptr, cols, ops.mass.data, ops.galerkin.data,
                         ops.low_order.data, ops.low_order_transposed, c_low, rate, c_mean,
                         np.ascontiguousarray(c_old, dtype=float), cap, ops.lumped,
                         float(dt), held, passes,
                         PASS_TOLERANCE * scale, CLOSE_TOLERANCE * scale, c, total,
                         ops.scratch())
    change, a = _sink_change(ops, c, c_low, c_old, dt, theta)
    share = _sink_share(indptr, cols, c, c_old, change, free, cap)
    c[free] += share[free] * change[free]
    # the sinks acted on c_L − (m/Δt)(c − c*)/s = c_L − (c − c*)/a
    acted = c_low - np.divide(share * change, a, out=np.zeros(n), where=a > 0.0)
    return Correction(fluxes=total, corrected=c, sink_state=acted, passes=used,
                      row_sweeps=swept / max(n, 1))


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
        if change[i] < 0.0:  # lowering (decay, outflow): no neighbour is read
            beta[i] = min(1.0, -max(c[i], 0.0) / change[i])
            continue
        hi = max(c[i], cap[i])
        for p in range(indptr[i], indptr[i + 1]):
            hi = max(hi, c[cols[p]], c_old[cols[p]])
        beta[i] = min(1.0, (hi - c[i]) / change[i])  # hi = +inf: the whole change
    return beta


def _rate_and_mean(c_high: FloatArray, c_old: FloatArray, dt: float,
                   theta: float) -> tuple[FloatArray, FloatArray]:
    """ċ = (c_H − cⁿ)/Δt and ĉ = θ c_H + (1 − θ) cⁿ of the target step."""
    return (c_high - c_old) / dt, theta * c_high + (1.0 - theta) * c_old


def raw_flux_sums(ops: TargetFluxes, c_low: FloatArray, c_high: FloatArray,
                  c_old: FloatArray, dt: float, theta: float) -> FloatArray:
    """Σ_j f_ij at every node [kg/s], before any limiting: the part of
    M_L(c_H − c_L)/Δt that the correction can move (see :func:`limited_target_fluxes`)."""
    n = ops.lumped.size
    c_low = np.ascontiguousarray(c_low, dtype=float)
    rate, c_mean = _rate_and_mean(np.asarray(c_high, dtype=float),
                                  np.asarray(c_old, dtype=float), dt, theta)
    f, sums, ranges = np.empty(ops.mass.indices.size), np.empty(2 * n), np.empty(2 * n)
    _first_sweep(unsigned(ops.mass.indptr), unsigned(ops.mass.indices), ops.mass.data,
                 ops.galerkin.data,
                 ops.low_order.data, ops.low_order_transposed, c_low, rate, c_mean,
                 np.asarray(c_old, dtype=float), np.full(n, -np.inf), f, sums, ranges)
    rows = np.repeat(np.arange(n), np.diff(ops.mass.indptr))
    return np.bincount(rows, weights=f, minlength=n)
