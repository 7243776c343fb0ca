"""The step planner: which step comes next, what a failed or rejected step becomes, and when
a multistep scheme starts again (theory.md T13, T14).

Fixed steps: a queue of equal steps between breakpoints (output and source-switch times,
:func:`time_steps`); a failed step is replaced by its two halves. Plume steps (no
``time.step``): the step the run loop hands in from the plume's Courant number (T14b),
landing on every breakpoint. Adaptive steps: the step
controller of :mod:`fe3d.transport.timeschemes` grows or shrinks the step, snapped to
``time.step · 2^k`` so that operators are reused, and every step lands on the next
breakpoint. Knows no physics and no fields.
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass

from fe3d.case.schema import TimeControl
from fe3d.errors import SolverError
from fe3d.transport.timeschemes import ORDER, StepControl, fit_to_next_time, next_step

__all__ = ["PlannedStep", "PlannerState", "StepPlanner", "time_steps"]

logger = logging.getLogger(__name__)


def time_steps(breakpoints: list[float], step: float) -> list[tuple[float, float, float]]:
    """Steps (t0, t1, dt) [s] that land exactly on every breakpoint.

    Each interval between breakpoints is cut into the fewest equal steps no longer than
    ``step``. ``dt`` is rounded to 12 significant digits so that intervals of equal length
    share one step length (and one assembled operator); t1 of an interval's last step is the
    breakpoint itself.
    """
    out: list[tuple[float, float, float]] = []
    t = 0.0
    for b in breakpoints:
        if b <= t:
            continue
        n = max(1, math.ceil((b - t) / step - 1e-9))
        dt = float(f"{(b - t) / n:.12g}")
        for i in range(n):
            t1 = b if i == n - 1 else t + (i + 1) * dt
            out.append((t + i * dt, t1, dt))
        t = b
    return out


@dataclass(frozen=True)
class PlannedStep:
    """A step from ``t0`` to ``t1`` [s]; ``dt`` is t1 − t0 rounded to 12 significant digits,
    so that equal steps share their operators."""

    t0: float
    t1: float
    dt: float


@dataclass(frozen=True)
class PlannerState:
    """Where a :class:`StepPlanner` stands between two steps: the time reached ``t`` [s],
    the step it wants next ``dt_want`` [s], the failures at this time ``cuts_here``, the
    step cuts and rejections so far, and the fixed steps still queued as (t1, dt) [s]
    (next step last). Enough to continue the plan bit for bit (a checkpoint)."""

    t: float
    dt_want: float
    cuts_here: int
    step_cuts: int
    rejected: int
    queue: tuple[tuple[float, float], ...]


def _at(t: float, x: float) -> bool:
    return abs(t - x) <= 1e-9 * max(1.0, x)


class StepPlanner:
    """Plans the steps from 0 to ``time.end`` through every breakpoint.

    ``breakpoints`` [s] are the output and source-switch times and the end; ``switches``
    [s] the source switches, after which a multistep scheme starts again (T13)."""

    def __init__(self, time: TimeControl, breakpoints: list[float], switches: set[float],
                 max_step_cuts: int) -> None:
        self.time, self.breaks, self.switches = time, breakpoints, switches
        self.max_step_cuts = max_step_cuts
        self.adaptive = time.adaptive
        self.follows_plume = time.step is None  # T14b: steps from the plume's Courant number
        base = time.end if time.step is None else time.step
        self.control = StepControl(dt_min=time.min_step or base * 1e-6,
                                   dt_max=time.max_step or time.end, order=ORDER[time.scheme])
        self._queue = [] if self.adaptive or self.follows_plume else [
            (b, d) for _, b, d in time_steps(breakpoints, base)]
        self._queue.reverse()  # pop() from the end
        self.t = 0.0
        self._dt_want = base
        self._cuts_here = 0
        self.step_cuts = 0
        self.rejected = 0

    def state(self) -> PlannerState:
        """Where the planner stands (for a checkpoint)."""
        return PlannerState(t=self.t, dt_want=self._dt_want, cuts_here=self._cuts_here,
                            step_cuts=self.step_cuts, rejected=self.rejected,
                            queue=tuple(self._queue))

    def resume_from(self, saved: PlannerState) -> None:
        """Stand where ``saved`` stood (a run continued from a checkpoint)."""
        self.t, self._dt_want, self._cuts_here = saved.t, saved.dt_want, saved.cuts_here
        self.step_cuts, self.rejected = saved.step_cuts, saved.rejected
        self._queue = list(saved.queue)

    @property
    def finished(self) -> bool:
        """True once the end time is reached."""
        return self.t >= self.time.end * (1.0 - 1e-12)

    def next(self, plume_step: float | None = None) -> PlannedStep:
        """The next step from the current time; ``plume_step`` [s] is the step that holds
        the plume at the Courant target (used when the case gives no time.step), halved as
        often as this position's steps have failed."""
        t = self.t
        if self.follows_plume and plume_step is not None:
            cap = min(plume_step, self.control.dt_max) / 2.0**self._cuts_here
            self._dt_want = cap
        if self.adaptive or self.follows_plume:
            b = next(x for x in self.breaks if x > t * (1.0 + 1e-12))
            t1 = t + fit_to_next_time(t, self._dt_want, b)
            if abs(t1 - b) <= 1e-9 * max(1.0, b):
                t1 = b
            return PlannedStep(t, t1, float(f"{t1 - t:.12g}"))
        t1, dt = self._queue.pop()
        return PlannedStep(t, t1, dt)

    def failed(self, step: PlannedStep, exc: SolverError) -> None:
        """A step's solve failed: plan it again at half length, or raise the failure (same
        type, with the step in the message) after ``solver.max_step_cuts`` halvings."""
        self._cuts_here += 1
        self.step_cuts += 1
        if self._cuts_here > self.max_step_cuts:
            msg = (f"transport step from t = {step.t0:.6g} s to {step.t1:.6g} s failed after "
                   f"{self.max_step_cuts} step cuts (last Δt = {step.dt:.4g} s): {exc}")
            raise type(exc)(msg) from exc
        logger.warning("step from t = %.6g s failed (%s); retrying with Δt = %.4g s",
                       step.t0, exc, step.dt / 2)
        if self.adaptive or self.follows_plume:
            self._dt_want = step.dt / 2
        else:
            half = float(f"{step.dt / 2:.12g}")
            self._queue += [(step.t1, half), (step.t0 + half, half)]

    def judge(self, step: PlannedStep, newton_iterations: int, error: float | None) -> bool:
        """Keep the step? Fixed steps are always kept; adaptive steps by the controller
        (R21), which also sets the next step length, snapped to time.step · 2^k. Without an
        error estimate (the first steps after a start) the step is not grown."""
        if not self.adaptive:
            return True
        decision = next_step(self.control, step.dt, newton_iterations=newton_iterations,
                             error=error)
        if not decision.accept:
            self.rejected += 1
            self._dt_want = decision.dt_next
            return False
        grow = decision.dt_next if error is not None else min(decision.dt_next, step.dt)
        want = self.time.step * 2.0 ** math.floor(math.log2(grow / self.time.step) + 1e-9)
        self._dt_want = min(max(want, self.control.dt_min), self.control.dt_max)
        return True

    def advance(self, step: PlannedStep) -> bool:
        """Commit ``step``; True when it ends on a source switch (a multistep restart)."""
        self._cuts_here = 0
        self.t = step.t1
        return any(_at(self.t, x) for x in self.switches)
