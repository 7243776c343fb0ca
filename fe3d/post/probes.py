"""Breakthrough statistics from observation histories; pure numpy."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from fe3d._typing import FloatArray

__all__ = ["Breakthrough", "breakthrough"]


@dataclass(frozen=True)
class Breakthrough:
    """Peak and first exceedance of a limit at one observation point [s, kg/m³]."""

    peak: float
    peak_time: float
    first_above_limit: float | None
    last_above_limit: float | None


def breakthrough(times: FloatArray, values: FloatArray, limit: float) -> Breakthrough:
    """Peak value and time, and the first and last times above ``limit``.

    Crossing times are interpolated linearly between stored steps; ``None`` means the limit
    is never exceeded in the simulated period.
    """
    j = int(np.argmax(values))
    above = values > limit
    first = last = None
    if np.any(above):
        i = int(np.argmax(above))
        if i == 0:
            first = float(times[0])
        else:
            t0, t1, c0, c1 = times[i - 1], times[i], values[i - 1], values[i]
            first = float(t0 + (limit - c0) / (c1 - c0) * (t1 - t0))
        k = int(len(values) - 1 - np.argmax(above[::-1]))
        if k == len(values) - 1:
            last = float(times[-1])
        else:
            t0, t1, c0, c1 = times[k], times[k + 1], values[k], values[k + 1]
            last = float(t0 + (c0 - limit) / (c0 - c1) * (t1 - t0))
    return Breakthrough(peak=float(values[j]), peak_time=float(times[j]),
                        first_above_limit=first, last_above_limit=last)
