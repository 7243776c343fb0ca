"""Where Newton starts a step (theory.md R14c): at the step's start cⁿ.

Newton's first iterate from cⁿ is the solution of the step linearised at cⁿ, solved to the
first forcing term (R14b). Two starts from earlier levels were built and measured against it
on the benchmark box (docs/performance.md, "Newton steps") and removed: the linear
extrapolation in time 2cⁿ − c^{n−1} (clipped to the bounds, and taken only as far along as a
secant model of the residual drops), and the combination of the last four levels that
minimises the step's linearised residual. Neither lowered the iterations or the cost at
Courant 1 or 10, with backward Euler or BDF2: a front crosses a cell or more per step and
k c Δt is 1–14, so the residual at any of those starts was as large as at cⁿ or larger.
"""

from __future__ import annotations

from fe3d._typing import FloatArray

__all__ = ["remember_step"]


def remember_step(system_key: object, old: FloatArray, new: FloatArray) -> None:
    """Nothing to remember: Newton starts from the step's own start (module docstring).
    Kept only while fe3d/transport/run.py (checkpoint resume) still calls it."""
    del system_key, old, new
