"""The implicit time schemes' step coefficients, a local error estimate and a step controller.

The semi-discrete system is written d S(c)/dt = f(c) (theory.md R16); one step of backward
Euler, Crank–Nicolson or BDF2 is the linear multistep formula of :class:`StepCoefficients`
(T13, R17–R19), which the transport's step systems and Newton residuals are built from. Pure
functions; no mesh.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Literal

import numpy as np

from fe3d._typing import FloatArray
from fe3d.errors import SolverError

__all__ = [
    "ORDER",
    "Scheme",
    "StepCoefficients",
    "StepControl",
    "StepDecision",
    "fit_to_next_time",
    "local_error",
    "next_step",
    "step_coefficients",
    "weighted_error",
]

Scheme = Literal["backward_euler", "crank_nicolson", "bdf2"]
ORDER: dict[str, int] = {"backward_euler": 1, "crank_nicolson": 2, "bdf2": 2}

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
