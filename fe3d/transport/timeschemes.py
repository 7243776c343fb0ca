"""Implicit time schemes as residual builders, a local error estimate and a step controller.

The semi-discrete system is written d S(c)/dt = f(c) (theory.md R16). S is the stored mass:
S(c) = M c for linear storage, or the mass of water and sorbed phase for nonlinear sorption,
which keeps the schemes mass-conservative. Both S and f are callables returning the value and
its Jacobian: any objects that support ``a * J1 - b * J2`` (numpy arrays, scipy sparse
matrices, or 1-D arrays of pointwise diagonals) work, as long as both Jacobians are of the
same kind (a 1-D diagonal would broadcast wrongly against a matrix).

Each ``*_step`` function returns the residual R(c) and its Jacobian for the unknown c^{n+1};
the caller hands them to :func:`fe3d.transport.newton.newton`. Pure functions; no mesh.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np

from fe3d._typing import FloatArray
from fe3d.errors import SolverError

__all__ = [
    "ORDER",
    "Scheme",
    "StepCoefficients",
    "StepControl",
    "StepDecision",
    "StepEquations",
    "backward_euler_step",
    "bdf2_step",
    "crank_nicolson_step",
    "fit_to_next_time",
    "linear_storage",
    "local_error",
    "next_step",
    "step_coefficients",
    "weighted_error",
]

Scheme = Literal["backward_euler", "crank_nicolson", "bdf2"]
ORDER: dict[str, int] = {"backward_euler": 1, "crank_nicolson": 2, "bdf2": 2}

Operator = Any
"""A Jacobian: dense or sparse matrix, or a 1-D array holding a diagonal."""
ValueAndJacobian = Callable[[FloatArray], tuple[FloatArray, Operator]]


@dataclass(frozen=True)
class StepEquations:
    """R(c^{n+1}) = 0 for one step, with its Jacobian dR/dc^{n+1}."""

    residual: Callable[[FloatArray], FloatArray]
    jacobian: Callable[[FloatArray], Operator]


def linear_storage(m: Operator) -> ValueAndJacobian:
    """S(c) = M c with constant M (matrix, or 1-D array for a diagonal/lumped M)."""
    if isinstance(m, np.ndarray) and m.ndim == 1:
        return lambda c: (m * c, m)
    return lambda c: (m @ c, m)


@dataclass(frozen=True)
class StepCoefficients:
    """One step of a linear multistep scheme for M dc/dt + K c = F (theory.md T13):

    [a0 M c^{n+1} + a1 M c^n + a2 M c^{n−1}]/Δt + θ K c^{n+1} + (1 − θ) K c^n = F.

    Backward Euler (1, −1, 0, 1), Crank–Nicolson (1, −1, 0, ½), BDF2 with ω = Δt/Δt_prev:
    ((1 + 2ω)/(1 + ω), −(1 + ω), ω²/(1 + ω), 1). a0 + a1 + a2 = 0 in every case.
    """

    a0: float
    a1: float
    a2: float
    theta: float


def step_coefficients(scheme: str, dt: float, dt_prev: float | None) -> StepCoefficients:
    """Coefficients of one step; BDF2 without a previous step (start or restart) is backward
    Euler."""
    if scheme == "crank_nicolson":
        return StepCoefficients(1.0, -1.0, 0.0, 0.5)
    if scheme == "bdf2" and dt_prev is not None:
        w = dt / dt_prev
        return StepCoefficients((1.0 + 2.0 * w) / (1.0 + w), -(1.0 + w), w * w / (1.0 + w), 1.0)
    return StepCoefficients(1.0, -1.0, 0.0, 1.0)



def backward_euler_step(
    storage: ValueAndJacobian, rhs: ValueAndJacobian, c_n: FloatArray, dt: float,
) -> StepEquations:
    """Backward Euler (R17): R = (S(c) − S(c^n))/Δt − f(c)."""
    s_n = storage(c_n)[0]

    def residual(c: FloatArray) -> FloatArray:
        return (storage(c)[0] - s_n) / dt - rhs(c)[0]

    def jacobian(c: FloatArray) -> Operator:
        return storage(c)[1] * (1.0 / dt) - rhs(c)[1]

    return StepEquations(residual, jacobian)


def crank_nicolson_step(
    storage: ValueAndJacobian, rhs: ValueAndJacobian, c_n: FloatArray, dt: float,
) -> StepEquations:
    """Crank–Nicolson (R18): R = (S(c) − S(c^n))/Δt − ½(f(c) + f(c^n))."""
    s_n = storage(c_n)[0]
    f_n = rhs(c_n)[0]

    def residual(c: FloatArray) -> FloatArray:
        return (storage(c)[0] - s_n) / dt - 0.5 * (rhs(c)[0] + f_n)

    def jacobian(c: FloatArray) -> Operator:
        return storage(c)[1] * (1.0 / dt) - rhs(c)[1] * 0.5

    return StepEquations(residual, jacobian)


def bdf2_step(
    storage: ValueAndJacobian, rhs: ValueAndJacobian, c_n: FloatArray, c_nm1: FloatArray,
    dt: float, dt_prev: float,
) -> StepEquations:
    """Variable-step BDF2 (R19), ω = Δt/Δt_prev:

    R = [(1+2ω)/(1+ω) S(c) − (1+ω) S(c^n) + ω²/(1+ω) S(c^{n−1})]/Δt − f(c).

    With ω = 1 this is (3/2 S^{n+1} − 2 S^n + ½ S^{n−1})/Δt = f^{n+1}. The first step of a
    run (no c^{n−1}) is taken with backward Euler; its local error is O(Δt²), so the global
    order stays 2.
    """
    co = step_coefficients("bdf2", dt, dt_prev)
    a0, a1, a2 = co.a0, co.a1, co.a2
    s_old = a1 * storage(c_n)[0] + a2 * storage(c_nm1)[0]

    def residual(c: FloatArray) -> FloatArray:
        return (a0 * storage(c)[0] + s_old) / dt - rhs(c)[0]

    def jacobian(c: FloatArray) -> Operator:
        return storage(c)[1] * (a0 / dt) - rhs(c)[1]

    return StepEquations(residual, jacobian)


# --- local error estimate ----------------------------------------------------------------


def _corrector_constant(scheme: str, dt: float, dt_prev: float | None) -> float:
    """C in (c^{n+1} − c(t_{n+1})) ≈ C c^{(p+1)}: the scheme's local error (R20)."""
    if scheme == "backward_euler":
        return dt * dt / 2.0
    if scheme == "crank_nicolson":
        return dt**3 / 12.0
    if scheme == "bdf2":
        w = 1.0 if dt_prev is None else dt / dt_prev
        return dt**3 / 6.0 * (1.0 + w) ** 2 / (w * (1.0 + 2.0 * w))
    msg = f"unknown time scheme {scheme!r}"
    raise ValueError(msg)


def local_error(
    scheme: Scheme, c_new: FloatArray, times: Sequence[float], history: Sequence[FloatArray],
) -> FloatArray | None:
    """Estimate of the local error of the step that gave ``c_new`` (R20).

    ``times`` = (t_{n+1}, t_n, t_{n−1}, …) and ``history`` = (c^n, c^{n−1}, …), newest first.
    A predictor c^P extrapolates the last p+1 accepted states (p = scheme order) to t_{n+1};
    its error is C_P c^{(p+1)} with C_P = −Π_j (t_{n+1} − t_{n−j})/(p+1)!. With the
    scheme's own constant C (R20), c^{n+1} − c^P ≈ (C − C_P) c^{(p+1)}, so the local error is
    C/(C − C_P) · (c^{n+1} − c^P) (Milne's device; e.g. Hairer, Nørsett & Wanner 1993,
    from memory). Returns None when there is not enough history (the first p steps).
    """
    p = ORDER[scheme]
    if len(history) < p + 1 or len(times) < p + 2:
        return None
    t_new = times[0]
    nodes = np.asarray(times[1 : p + 2], dtype=float)
    # Lagrange extrapolation to t_new.
    pred = np.zeros_like(np.asarray(c_new, dtype=float))
    for j in range(p + 1):
        lj = 1.0
        for m in range(p + 1):
            if m != j:
                lj *= (t_new - nodes[m]) / (nodes[j] - nodes[m])
        pred = pred + lj * np.asarray(history[j], dtype=float)
    c_pred = -float(np.prod(t_new - nodes)) / math.factorial(p + 1)
    dt = t_new - nodes[0]
    dt_prev = nodes[0] - nodes[1]
    c_corr = _corrector_constant(scheme, dt, dt_prev)
    return c_corr / (c_corr - c_pred) * (np.asarray(c_new, dtype=float) - pred)


def weighted_error(
    error: FloatArray, c: FloatArray, *, rtol: float, atol: float,
) -> float:
    """max_i |e_i|/(atol + rtol |c_i|): ≤ 1 means the step meets the tolerance."""
    return float(np.max(np.abs(error) / (atol + rtol * np.abs(c))))


# --- step-size controller ------------------------------------------------------------------


@dataclass(frozen=True)
class StepControl:
    """Bounds and factors of the step controller (R21).

    ``newton_easy``/``newton_hard``: at most/at least this many Newton iterations lets the
    step grow/shrinks it by ``hard_factor``.
    """

    dt_min: float
    dt_max: float
    order: int
    safety: float = 0.9
    grow_max: float = 2.0
    shrink_min: float = 0.2
    cut_on_failure: float = 0.5
    newton_easy: int = 4
    newton_hard: int = 8
    hard_factor: float = 0.7


@dataclass(frozen=True)
class StepDecision:
    """Whether to keep the step just taken, and the length of the next (or retried) step."""

    accept: bool
    dt_next: float
    reason: str


def next_step(
    control: StepControl, dt: float, *, newton_iterations: int | None,
    error: float | None,
) -> StepDecision:
    """The step-size rule (R21).

    - Newton failed (``newton_iterations`` None): reject, retry with Δt·cut_on_failure.
    - ``error`` (the weighted local error, 1 = tolerance) > 1: reject, retry with
      Δt·max(shrink_min, safety·error^(−1/(p+1))).
    - Otherwise accept. The next step is Δt·min(f_err, f_newton), with
      f_err = clip(safety·error^(−1/(p+1)), shrink_min, grow_max) (grow_max without an
      estimate) and f_newton = grow_max (≤ newton_easy iterations), hard_factor
      (≥ newton_hard) or 1 (between).

    The result is clipped to [dt_min, dt_max]. A rejected step that would need a step below
    dt_min raises :class:`SolverError`.
    """
    p1 = control.order + 1
    if newton_iterations is None or (error is not None and error > 1.0):
        if newton_iterations is None:
            factor, reason = control.cut_on_failure, "Newton failed"
        else:
            assert error is not None
            factor = max(control.shrink_min, control.safety * error ** (-1.0 / p1))
            reason = f"local error {error:.2f} × tolerance"
        new = dt * factor
        if new < control.dt_min * (1.0 - 1e-12):
            msg = (f"time step rejected ({reason}) at Δt = {dt:.6g} s and cannot be cut below "
                   f"the smallest step {control.dt_min:.6g} s")
            raise SolverError(msg)
        return StepDecision(False, min(max(new, control.dt_min), control.dt_max), reason)
    if error is None or error <= 0.0:
        f_err = control.grow_max
    else:
        f_err = min(control.grow_max,
                    max(control.shrink_min, control.safety * error ** (-1.0 / p1)))
    if newton_iterations <= control.newton_easy:
        f_newton = control.grow_max
    elif newton_iterations >= control.newton_hard:
        f_newton = control.hard_factor
    else:
        f_newton = 1.0
    new = min(max(dt * min(f_err, f_newton), control.dt_min), control.dt_max)
    return StepDecision(True, new, f"{newton_iterations} Newton iterations")


def fit_to_next_time(t: float, dt: float, t_next: float) -> float:
    """Step length that lands exactly on ``t_next`` (an output or switching time).

    If t + Δt reaches or passes t_next (within 1e-12 relative), the step is t_next − t. If
    it would leave a sliver shorter than Δt/4 before t_next, the rest is split in two
    equal steps (common practice, no source).
    """
    remaining = t_next - t
    if remaining <= 0.0:
        msg = f"next time {t_next!r} is not after the current time {t!r}"
        raise ValueError(msg)
    if dt >= remaining * (1.0 - 1e-12):
        return remaining
    if remaining - dt < 0.25 * dt:
        return 0.5 * remaining
    return dt
