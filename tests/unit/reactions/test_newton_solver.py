"""The generic Newton solver: line search, failure messages, log (no physics)."""

from __future__ import annotations

import numpy as np
import pytest

from fe3d.errors import NewtonError, SolverError
from fe3d.transport.newton import newton


def _scalar(f, df):
    return (lambda x: f(x)), (lambda x, r: r / df(x))


def test_line_search_rescues_arctan():
    """arctan(x) = 0 from x0 = 10: the full Newton step overshoots and diverges; with the
    backtracking line search it converges (classical example, e.g. Kelley 1995, Iterative
    Methods for Linear and Nonlinear Equations, SIAM, ch. 8, from memory)."""
    res, solve = _scalar(np.arctan, lambda x: 1.0 / (1.0 + x * x))
    with pytest.raises(NewtonError):
        newton(res, solve, np.array([10.0]), line_search=False, max_iter=4)
    out = newton(res, solve, np.array([10.0]), rtol=1e-12, atol=1e-14)
    assert abs(out.x[0]) < 1e-13
    assert min(out.step_lengths) < 1.0
    assert len(out.residual_norms) == out.iterations + 1
    assert len(out.log_lines()) == out.iterations + 1


def test_converged_start_takes_no_iteration():
    """R(x0) = 0: returned at once with zero iterations."""
    out = newton(lambda x: x - 2.0, lambda x, r: r, np.array([2.0]))
    assert out.iterations == 0 and out.x[0] == 2.0


def test_no_root_fails_with_one_clear_message():
    """x² + 1 = 0 has no real root: NewtonError (a SolverError) with the norms reached."""
    with pytest.raises(SolverError) as err:
        newton(lambda x: x * x + 1.0, lambda x, r: r / (2.0 * x + 1e-300), np.array([0.5]))
    assert isinstance(err.value, NewtonError)
    assert "\n" not in str(err.value)
    assert str(err.value).startswith("Newton:")
    assert err.value.residual_norms


def test_iteration_limit_and_non_finite_correction():
    """Too few iterations → 'not converged in N iterations'; singular Jacobian → NaN
    correction reported."""
    with pytest.raises(NewtonError, match="not converged in 2 iterations"):
        newton(lambda x: np.exp(x) - 5.0, lambda x, r: r / np.exp(x), np.array([10.0]),
               max_iter=2)
    with pytest.raises(NewtonError, match="non-finite correction"):
        newton(lambda x: x - 1.0, lambda x, r: r * np.nan, np.array([0.0]))
    with pytest.raises(NewtonError, match="not finite at the starting point"):
        newton(lambda x: x * np.nan, lambda x, r: r, np.array([0.0]))
