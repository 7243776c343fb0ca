"""Time schemes as residual builders: local error estimate, step controller, landing on times."""

from __future__ import annotations

import math

import numpy as np
import pytest

from fe3d.errors import SolverError
from fe3d.transport.timeschemes import (
    ORDER,
    StepControl,
    fit_to_next_time,
    local_error,
    next_step,
    step_coefficients,
    weighted_error,
)

LAM = 0.7


def _exact(t):
    return np.array([math.exp(-LAM * t)])


def _one_step(scheme, t_new, times, hist):
    """One step of dc/dt = −λc with the transport's coefficients (theory.md T13):
    (a0 c^{n+1} + a1 c^n + a2 c^{n−1})/Δt = −λ(θ c^{n+1} + (1 − θ) c^n), solved for c^{n+1}."""
    dt = t_new - times[0]
    formula = step_coefficients(scheme, dt, times[0] - times[1])
    known = (formula.a1 * hist[0] + formula.a2 * hist[1]
             + dt * LAM * (1.0 - formula.theta) * hist[0])
    return -known / (formula.a0 + dt * LAM * formula.theta)


@pytest.mark.parametrize("scheme", ["backward_euler", "crank_nicolson", "bdf2"])
@pytest.mark.parametrize("ratio", [1.0, 1.5, 0.6])
def test_local_error_estimate_matches_the_true_one_step_error(scheme, ratio):
    """One step of dc/dt = −λc from exact past values, steps of unequal length (new step =
    ratio × previous): the estimate (R20, Milne's device with the schemes' error constants,
    Hairer, Nørsett & Wanner 1993, Solving ODEs I, ch. III, from memory) is within 15 % of the
    true local error c^{n+1} − e^{−λ t_{n+1}} at λΔt ≈ 0.01 (the neglected terms are
    O(λΔt) relative; 15 % is our bound)."""
    h_prev = 0.01 / LAM
    t_hist = [3 * h_prev, 2 * h_prev, h_prev, 0.0]
    t_new = t_hist[0] + ratio * h_prev
    hist = [_exact(t) for t in t_hist]
    c_new = _one_step(scheme, t_new, t_hist, hist)
    true = c_new - _exact(t_new)
    est = local_error(scheme, c_new, [t_new, *t_hist], hist)
    assert est is not None
    assert est[0] == pytest.approx(true[0], rel=0.15), (est, true)


def test_local_error_needs_history():
    """Fewer than p+1 past states: no estimate (None)."""
    assert local_error("crank_nicolson", np.ones(1), [2.0, 1.0, 0.0], [np.ones(1)] * 2) is None
    assert ORDER["bdf2"] == 2


def test_controller_rules():
    """Rule R21 (Hairer, Nørsett & Wanner 1993, ch. II.4 elementary controller, from memory;
    the Newton-count factors are common practice, no source): checked case by case."""
    ctl = StepControl(dt_min=1.0, dt_max=100.0, order=2)
    d = next_step(ctl, 10.0, newton_iterations=2, error=None)
    assert d.accept and d.dt_next == 20.0
    d = next_step(ctl, 10.0, newton_iterations=2, error=0.5)
    assert d.accept and d.dt_next == pytest.approx(10.0 * 0.9 * 0.5 ** (-1 / 3))
    d = next_step(ctl, 10.0, newton_iterations=9, error=0.01)
    assert d.accept and d.dt_next == pytest.approx(7.0)
    d = next_step(ctl, 10.0, newton_iterations=6, error=None)
    assert d.accept and d.dt_next == 10.0
    d = next_step(ctl, 10.0, newton_iterations=3, error=8.0)
    assert not d.accept and d.dt_next == pytest.approx(10.0 * 0.9 * 8.0 ** (-1 / 3))
    d = next_step(ctl, 10.0, newton_iterations=None, error=None)
    assert not d.accept and d.dt_next == 5.0
    assert next_step(ctl, 80.0, newton_iterations=1, error=None).dt_next == 100.0
    with pytest.raises(SolverError, match="cannot be cut below the smallest step"):
        next_step(ctl, 1.5, newton_iterations=None, error=None)


def test_weighted_error_and_landing_on_output_times():
    """max |e|/(atol + rtol|c|); a step reaching past t_next lands on it, a sliver shorter
    than Δt/4 is avoided by halving the rest (R21)."""
    assert weighted_error(np.array([1e-7, 2e-6]), np.array([1.0, 1.0]), rtol=1e-6,
                          atol=1e-9) == pytest.approx(2e-6 / (1e-9 + 1e-6))
    assert fit_to_next_time(0.0, 5.0, 3.0) == 3.0
    assert fit_to_next_time(0.0, 1.0, 10.0) == 1.0
    assert fit_to_next_time(0.0, 4.0, 4.5) == 2.25
    with pytest.raises(ValueError, match="not after"):
        fit_to_next_time(2.0, 1.0, 2.0)
