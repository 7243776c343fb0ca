"""The compiled passes of the flux limiter and the linearised target (theory.md T16b).

References: Zalesak 1979, "Fully multidimensional flux-corrected transport algorithms for
fluids", J. Comput. Phys. 31 (P^±, Q^±, R^±, α_ij), repeated on the unused fluxes after
Schär & Smolarkiewicz 1996, J. Comput. Phys. 128; Kuzmin 2009, "Explicit and implicit
FEM-FCT algorithms with flux linearization", J. Comput. Phys. 228 (the time derivative from
the Galerkin residual and Jacobi sweeps of the consistent mass); all from memory. The fused
compiled sweeps are checked against a plain numpy transcription of those formulas, the
linearised rate against numpy's dense solve (reference library).
"""

from __future__ import annotations

import numpy as np
from test_monotone import _limiter_inputs, _operators, lumped_operators

import fe3d.transport.limiter as limiter
from fe3d.transport.limiter import (
    CLOSE_TOLERANCE,
    PASS_TOLERANCE,
    TargetFluxes,
    limited_target_fluxes,
    linearised_correction,
    linearised_target,
)


def _zalesak_reference(ops: TargetFluxes, c_low: np.ndarray, c_high: np.ndarray,
                       c_old: np.ndarray, dt: float, theta: float, fixed: np.ndarray,
                       passes: int, upper: np.ndarray) -> tuple[np.ndarray, int]:
    """Net limited flux per node and passes used, written entry by entry from the formulas
    of T16b with numpy (no compiled code, no closing of rows)."""
    n = ops.lumped.size
    A = ops.mass
    rows = np.repeat(np.arange(n), np.diff(A.indptr))
    cols = A.indices
    off = rows != cols
    rate, mean = (c_high - c_old) / dt, theta * c_high + (1.0 - theta) * c_old
    x = c_low - mean
    lt = ops.low_order.T.tocsr()  # l_ji on L's pattern, from scipy (the kernel reads positions)
    lt.sort_indices()
    f = np.where(off, A.data * (rate[rows] - rate[cols])
                 - ops.diffusion.data * (mean[rows] - mean[cols])
                 + ops.low_order.data * x[cols] - lt.data * x[rows], 0.0)
    held = np.zeros(n, dtype=bool)
    held[fixed] = True
    c, total = c_low.copy(), np.zeros(n)
    scale = max(np.abs(c_low).max(), np.abs(c_high).max())
    for used in range(1, passes + 1):
        p_plus = np.bincount(rows, np.maximum(f, 0.0), n)
        p_minus = np.bincount(rows, np.minimum(f, 0.0), n)
        # the bounds: the neighbours' range of the field so far and of the step's start
        up = np.maximum(c[cols], c_old[cols]) - c[rows]
        down = np.minimum(c[cols], c_old[cols]) - c[rows]
        q_plus = np.maximum(np.maximum.reduceat(np.maximum(up, 0.0), A.indptr[:-1]),
                            upper - c)
        q_minus = np.minimum.reduceat(np.minimum(down, 0.0), A.indptr[:-1])
        with np.errstate(divide="ignore", invalid="ignore"):
            r_plus = np.where(p_plus > 0, np.minimum(1, ops.lumped * q_plus / (dt * p_plus)), 1)
            r_minus = np.where(p_minus < 0, np.minimum(1, ops.lumped * q_minus / (dt * p_minus)),
                               1)
        r_plus[held], r_minus[held] = 1.0, 1.0
        alpha = np.where(f > 0, np.minimum(r_plus[rows], r_minus[cols]),
                         np.minimum(r_minus[rows], r_plus[cols]))
        g = np.bincount(rows, alpha * f, n)
        f = f - alpha * f
        total += g
        step = np.where(held, 0.0, dt * g / ops.lumped)
        c += step
        if used > 1 and np.abs(step).max() <= PASS_TOLERANCE * scale:
            break
    return total, used


def test_limiter_passes_match_the_formulas() -> None:
    """The fused compiled passes give the net fluxes of the plain transcription, pass for
    pass (1, 2 and 6 passes, held nodes and raised upper bounds included). Tolerance: the
    fluxes a closed row drops move any node by at most CLOSE_TOLERANCE × scale × (largest
    ratio of neighbouring lumped masses) per pass, plus round-off (1e-13 relative to the
    largest net flux)."""
    ops, c_low, c_high, c_old = _limiter_inputs(11)
    n = c_low.size
    fixed = np.arange(0, n, 9)
    upper = np.where(np.arange(n) % 4 == 0, 0.95, -np.inf)
    dt = 1e6
    A = ops.mass.tocoo()
    mass_ratio = float(np.max(ops.lumped[A.row] / ops.lumped[A.col]))
    scale = max(np.abs(c_low).max(), np.abs(c_high).max())
    for passes in (1, 2, 6):
        fix = limited_target_fluxes(ops, c_low, c_high, c_old, dt, 0.5, fixed, passes=passes,
                                    upper=upper)
        total, used = _zalesak_reference(ops, c_low, c_high, c_old, dt, 0.5, fixed, passes,
                                         upper)
        assert fix.passes == used
        dropped = passes * CLOSE_TOLERANCE * scale * mass_ratio * ops.lumped / dt
        np.testing.assert_array_less(np.abs(fix.fluxes - total),
                                     dropped + 1e-13 * np.abs(total).max())
        assert np.abs(total).max() > 0.0


def _low_order_step(seed: int) -> tuple[TargetFluxes, np.ndarray, np.ndarray, np.ndarray,
                                        np.ndarray, float]:
    """Operators, cⁿ, load b, the dense low-order backward Euler step c_L and the dense
    Galerkin matrices (M, K) stacked, with Δt [s]."""
    M, K = _operators()
    ML, KD = lumped_operators(M, K)
    rng = np.random.default_rng(seed)
    n = K.shape[0]
    c_old, b, dt = rng.random(n), 1e-7 * rng.random(n), 3e5
    c_low = np.linalg.solve((ML / dt + KD).toarray(), ML @ c_old / dt + b)
    return TargetFluxes.of(M, K, KD), c_old, b, c_low, np.stack([M.toarray(), K.toarray()]), dt


def test_linearised_rate_solves_the_galerkin_residual() -> None:
    """Kuzmin's linearised rate: with enough Jacobi sweeps M ċ = b − K ĉ, ĉ = θ c_L + (1 −
    θ) cⁿ (dense solve), although the loads b are not given to it (they come from the
    low-order step). The sweeps converge at least as 0.8^k (the spectrum of M_L⁻¹M lies
    in [1/5, 1] for P1 tetrahedra: the element mass (V/20)(I + 11ᵀ) against V/4 I), so
    200 sweeps leave 4e-20 of the start error; tolerance: round-off of the dense solves
    (1e-10 relative, condition number about 1e3)."""
    ops, c_old, b, c_low, (Md, Kd), dt = _low_order_step(5)
    none = np.array([], dtype=np.int64)
    for theta in (0.5, 1.0):
        mean = theta * c_low + (1 - theta) * c_old
        exact = np.linalg.solve(Md, b - Kd @ mean)
        got = linearised_target(ops, c_low, c_old, dt, theta, none, sweeps=200)
        np.testing.assert_allclose(got.mean, mean, rtol=0, atol=1e-15)
        np.testing.assert_allclose(got.rate, exact, rtol=0, atol=1e-10 * np.abs(exact).max())
        errors = [np.abs(linearised_target(ops, c_low, c_old, dt, theta, none,
                                           sweeps=k).rate - exact).max() for k in (0, 1, 2)]
        assert errors[2] < errors[1] < errors[0]


def test_linearised_correction_is_bounded_and_conservative() -> None:
    """The linearised correction keeps the guarantees of T16b: the fluxes cancel in pairs
    (round-off, 1e-12 relative) and the result lies within [0, the largest of c_L and cⁿ]
    (by construction of the limiter, to round-off); held nodes keep c_L."""
    ops, c_old, _, c_low, _, dt = _low_order_step(9)
    fixed = np.arange(0, c_low.size, 7)
    fix = linearised_correction(ops, c_low, c_old, dt, 0.5, fixed)
    assert abs(fix.fluxes.sum()) <= 1e-12 * np.abs(fix.fluxes).sum()
    top = max(c_low.max(), c_old.max())
    assert fix.corrected.min() >= -1e-12 * top
    assert fix.corrected.max() <= top * (1 + 1e-12)
    np.testing.assert_array_equal(fix.corrected[fixed], c_low[fixed])
    assert np.abs(fix.corrected - c_low).max() > 1e-3 * top  # the correction did something


def test_closed_rows_drop_fluxes_in_pairs() -> None:
    """With a closing floor far above the fluxes every row closes after the first pass, so
    later passes add nothing: the result equals one pass (exactly), and the sum of the net
    fluxes is still zero (round-off)."""
    ops, c_low, c_high, c_old = _limiter_inputs(4)
    none = np.array([], dtype=np.int64)
    one = limited_target_fluxes(ops, c_low, c_high, c_old, 1e6, 0.5, none, passes=1)
    saved = limiter.CLOSE_TOLERANCE
    limiter.CLOSE_TOLERANCE = 1e30
    try:
        many = limited_target_fluxes(ops, c_low, c_high, c_old, 1e6, 0.5, none, passes=4)
    finally:
        limiter.CLOSE_TOLERANCE = saved
    np.testing.assert_array_equal(many.fluxes, one.fluxes)
    assert abs(many.fluxes.sum()) <= 1e-12 * np.abs(many.fluxes).sum()
    assert many.passes == 2 and many.row_sweeps == 1.0  # pass 2 found every row closed
