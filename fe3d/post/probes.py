"""Breakthrough statistics from observation histories; pure numpy."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from fe3d._typing import FloatArray

__all__ = ["Breakthrough", "breakthrough", "crossing_time"]


@dataclass(frozen=True)
class Breakthrough:
    """Peak and first exceedance of a limit at one observation point [s, kg/m³]."""

    peak: float
    peak_time: float
    first_above_limit: float | None
    last_above_limit: float | None


def breakthrough(times: FloatArray, values: FloatArray, limit: float) -> Breakthrough:
    """Peak value and time, and the first and last times above ``limit``.

    The peak is the vertex of the parabola through the largest stored value and its two
    neighbours when they bend down (a smooth peak between two steps; the stored largest
    value and its time otherwise, e.g. at the ends or at a kink where a source stops and
    the parabola would rise above both neighbours' line). A crossing between two stored steps
    is interpolated in log c when both values are positive (a rising or falling tail grows
    nearly exponentially between steps: linear interpolation puts a crossing of a limit far
    below the peak early by up to half a step), else linearly. ``None`` means the limit is
    never exceeded in the simulated period.
    """
    j = int(np.argmax(values))
    peak, peak_time = _vertex(times, values, j)
    above = values > limit
    first = last = None
    if np.any(above):
        i = int(np.argmax(above))
        first = float(times[0]) if i == 0 else crossing_time(times, values, i - 1, limit)
        k = int(len(values) - 1 - np.argmax(above[::-1]))
        last = float(times[-1]) if k == len(values) - 1 else crossing_time(times, values, k,
                                                                       limit)
    return Breakthrough(peak=peak, peak_time=peak_time, first_above_limit=first,
                        last_above_limit=last)


def crossing_time(times: FloatArray, values: FloatArray, i: int, limit: float) -> float:
    """Time [s] at which the history crosses ``limit`` between stored steps i and i + 1: on
    the parabola in log c through three positive samples (i, i + 1 and the neighbour before
    i, else the one after i + 1), on the line in log c through two, else on the line in c."""
    t0, t1, c0, c1 = (float(x) for x in (times[i], times[i + 1], values[i], values[i + 1]))
    if not (c0 > 0.0 and c1 > 0.0 and limit > 0.0):
        return t0 + (limit - c0) / (c1 - c0) * (t1 - t0)
    share = (np.log(limit) - np.log(c0)) / (np.log(c1) - np.log(c0))
    guess = t0 + float(share) * (t1 - t0)
    k = next((m for m in (i - 1, i + 2) if 0 <= m < len(values) and values[m] > 0.0), None)
    if k is None:
        return guess
    ts = np.array([times[i], times[i + 1], times[k]], dtype=float)
    a, b, c = np.polyfit(ts - t0, np.log(np.array([c0, c1, values[k]], dtype=float)), 2)
    roots = np.roots([a, b, c - np.log(limit)])
    real = [float(r.real) + t0 for r in roots if abs(r.imag) <= 1e-12 * (t1 - t0)
            and t0 <= r.real + t0 <= t1]
    return min(real, key=lambda t: abs(t - guess)) if real else guess


def _curvature(times: FloatArray, values: FloatArray, j: int) -> float:
    """Half the second divided difference of the samples j − 1, j, j + 1."""
    (ta, tb, tc), (ca, cb, cc) = times[j - 1:j + 2], values[j - 1:j + 2]
    return float(((cc - cb) / (tc - tb) - (cb - ca) / (tb - ta)) / (tc - ta))


def _vertex(times: FloatArray, values: FloatArray, j: int) -> tuple[float, float]:
    """Peak value and time from the stored largest value ``j`` and its neighbours: the
    vertex of their parabola when the peak is smooth (the curvature of the neighbouring
    triples is at least a quarter of the central one, as on any smooth top sampled finer
    than its width), else the stored value (an end, a kink where a source stops)."""
    c_j, t_j = float(values[j]), float(times[j])
    if j == 0 or j == len(values) - 1:
        return c_j, t_j
    k = _curvature(times, values, j)
    sides = [_curvature(times, values, m) for m in (j - 1, j + 1) if 0 < m < len(values) - 1]
    if not k < 0.0 or any(not side <= 0.25 * k for side in sides):
        return c_j, t_j
    ta, tb = float(times[j - 1]), float(times[j])
    d1 = (float(values[j]) - float(values[j - 1])) / (tb - ta)
    t_peak = 0.5 * (ta + tb) - d1 / (2.0 * k)
    if not ta <= t_peak <= float(times[j + 1]):
        return c_j, t_j
    return float(c_j + d1 * (t_peak - tb) + k * (t_peak - ta) * (t_peak - tb)), float(t_peak)
