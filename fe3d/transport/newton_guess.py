"""Where Newton starts a step (theory.md R14c): extrapolated in time from the two levels the
step is given, as far along the extrapolation as lowers the residual.

Only the steps of a multistep scheme carry the level before (BDF2, T13); the one-step schemes
start from cⁿ. Both functions are pure: the start depends on the step's inputs alone, so a
run resumed from a checkpoint repeats its steps bit for bit.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from fe3d._typing import FloatArray

__all__ = ["along_extrapolation", "extrapolated", "remember_step"]


def extrapolated(old: FloatArray, older: FloatArray, ratio: float,
                 upper: float) -> FloatArray:
    """cⁿ + ω (cⁿ − c^{n−1}) [kg/m³], ω = Δt_n/Δt_{n−1} = ``ratio``, clipped to the physical
    bounds [0, ``upper``] (a linear extrapolation in time overshoots where a front has just
    passed). A new array."""
    return np.clip(old + ratio * (old - older), 0.0, max(upper, 0.0))


def along_extrapolation(residual: Callable[[FloatArray], FloatArray], start: FloatArray,
                        ahead: FloatArray) -> tuple[FloatArray, float]:
    """The point x₀ = xⁿ + β (x_e − xⁿ), β ∈ [0, 1], that minimises the secant model
    ‖R(xⁿ) + β (R(x_e) − R(xⁿ))‖₂ of the residual along the extrapolation from ``start``
    (xⁿ) to ``ahead`` (x_e), and ‖R(xⁿ)‖ (R14c). Where extrapolation in time overshoots, β
    falls towards 0; between two points within the bounds, x₀ is within them too. Costs two
    residuals."""
    r_start = residual(start)
    change = residual(ahead) - r_start
    size = float(change @ change)
    beta = 0.0 if size == 0.0 else float(np.clip(-(r_start @ change) / size, 0.0, 1.0))
    return start + beta * (ahead - start), float(np.linalg.norm(r_start))


def remember_step(system_key: object, old: FloatArray, new: FloatArray) -> None:
    """Nothing to remember: the start depends on the step's own inputs only (module
    docstring). Kept while fe3d/transport/run.py (checkpoint resume) still calls it; an
    earlier draft kept the last step per step system here, measured no gain at Courant 1
    and 10 (docs/performance.md, "Newton steps") and was removed."""
    del system_key, old, new
