"""A breakthrough curve read from the rows of a CSV table, written out here apart from
fe3d.post.probes, so that the tests that compare a run's reported peaks and crossings with
its own CSV files do not reuse the code that made them."""

from __future__ import annotations

import numpy as np


def crossing_step(times: list[float], values: list[float], limit: float,
                  ) -> tuple[float, float] | None:
    """The two stored times around the first crossing of ``limit`` (the first time above it
    lies between them)."""
    for i, v in enumerate(values):
        if v > limit:
            return (times[0], times[0]) if i == 0 else (times[i - 1], times[i])
    return None


def peak_bracket(times: list[float], values: list[float],
                 ) -> tuple[tuple[float, float], tuple[float, float]]:
    """Where a peak read between samples must lie: its value between the largest stored
    value and the vertex of the parabola through it and its two neighbours (numpy's fit
    through three points is exact; a reading may keep the stored value, e.g. at a kink),
    and its time between those two neighbours."""
    j = int(np.argmax(values))
    stored = float(values[j])
    if not 0 < j < len(values) - 1:
        return (stored, stored), (times[j], times[j])
    t, c = np.array(times[j - 1:j + 2]), np.array(values[j - 1:j + 2])
    a, b, c0 = np.polyfit(t - t[1], c, 2)
    top = float(c0 - b * b / (4.0 * a)) if a < 0 else stored
    return (stored, max(stored, top)), (float(t[0]), float(t[2]))
