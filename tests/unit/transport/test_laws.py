"""Pointwise laws: dispersion tensor, SUPG τ, time-step schedule (no mesh needed)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from fe3d.transport.dispersion import dispersion_tensor
from fe3d.transport.run import time_steps
from fe3d.transport.stabilization import supg_tau

finite = st.floats(min_value=-10.0, max_value=10.0, allow_nan=False)


@settings(max_examples=50, deadline=None)
@given(vx=finite, vy=finite, vz=finite)
def test_dispersion_eigenvalues_with_equal_transverse(vx, vy, vz):
    """With α_TH = α_TV = α_T: D = α_T|v|I + (α_L − α_T)vvᵀ/|v| + D*I, whose eigenvalues are
    α_L|v| + D* (along v) and α_T|v| + D* (twice) (Bear 1972, Dynamics of Fluids in Porous
    Media, ch. 10). Tolerance: 1e-12 relative (a few roundings)."""
    v = np.array([vx, vy, vz])
    speed = float(np.linalg.norm(v))
    D = dispersion_tensor(v.reshape(3, 1), alpha_l=np.array([2.0]), alpha_th=np.array([0.3]),
                          alpha_tv=np.array([0.3]), d_eff=np.array([1e-3]))[:, :, 0]
    np.testing.assert_allclose(D, D.T)
    ev = np.sort(np.linalg.eigvalsh(D))
    expected = np.sort([2.0 * speed + 1e-3, 0.3 * speed + 1e-3, 0.3 * speed + 1e-3])
    np.testing.assert_allclose(ev, expected, rtol=1e-12, atol=1e-12)


def test_dispersion_horizontal_flow_separates_vertical_transverse():
    """Flow along x: D = diag(α_L, α_TH, α_TV)|v| + D* (definition of the three dispersivities)."""
    D = dispersion_tensor(np.array([[2.0], [0.0], [0.0]]), alpha_l=np.array([5.0]),
                          alpha_th=np.array([0.5]), alpha_tv=np.array([0.05]),
                          d_eff=np.array([0.0]))[:, :, 0]
    np.testing.assert_allclose(D, np.diag([10.0, 1.0, 0.1]), rtol=1e-14, atol=1e-15)


def test_supg_tau_limits():
    """τ → h/(2|a|) when advection dominates, → Δt/2 when the step dominates, and at grid
    Péclet 1 (steady) equals h/(2|a|)/√10 ≈ 0.316 h/(2|a|), close to the optimal
    coth(1) − 1 = 0.313 of the 1D theory (Brooks & Hughes 1982)."""
    a = np.array([[1.0], [0.0], [0.0]])
    h = np.array([2.0])
    adv = supg_tau(a, np.array([0.0]), np.array([0.0]), h, dt=1e12)
    assert adv[0] == pytest.approx(1.0, rel=1e-9)
    step = supg_tau(a * 1e-9, np.array([0.0]), np.array([0.0]), h, dt=4.0)
    assert step[0] == pytest.approx(2.0, rel=1e-9)
    pe1 = supg_tau(a, np.array([1.0]), np.array([0.0]), h, dt=1e12)  # Pe = |a|h/(2κ) = 1
    assert pe1[0] == pytest.approx(1.0 / math.sqrt(10.0), rel=1e-9)
    assert abs(pe1[0] - (1.0 / math.tanh(1.0) - 1.0)) < 0.01


def test_time_steps_hit_breakpoints_exactly():
    steps = time_steps([10.0, 25.0, 25.0, 30.0], 4.0)
    ends = [t1 for _, t1, _ in steps]
    for b in (10.0, 25.0, 30.0):
        assert b in ends
    assert all(dt <= 4.0 + 1e-12 for _, _, dt in steps)
    assert steps[0][0] == 0.0
    assert all(abs((t1 - t0) - dt) < 1e-9 for t0, t1, dt in steps)
    assert all(steps[i][1] == steps[i + 1][0] for i in range(len(steps) - 1))
