"""Peak and crossing times read from a history stored at the steps: against exact curves.

References: Ogata, A. & Banks, R.B. (1961), *A solution of the differential equation of
longitudinal dispersion in porous media*, USGS Prof. Paper 411-A (the continuous inlet,
``test_column.reference``); the instantaneous release in 1D uniform flow,
c = M/(θ√(4πDt)) exp(−(x − vt)²/(4Dt)) (e.g. Bear, J. 1972, *Dynamics of fluids in porous
media*, §10.6 — from memory; it is the Gaussian solution of the 1D advection–dispersion
equation, checked here by nothing else than its form).

A run stores its receptors at every step. Between two steps the rising tail of a
breakthrough curve grows nearly exponentially, so fe3d interpolates a crossing in log c; a
smooth peak between steps is the vertex of the parabola through the three largest samples
(fe3d.post.probes.breakthrough). These tests sample the exact curves as a run with 0.5 d
steps would store them and compare the times and values read back with the exact ones.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import brentq
from test_column import reference as ogata_banks

from fe3d.post.probes import breakthrough

pytestmark = pytest.mark.verification

STEP = 0.5  # [d], the stored steps


def _linear_first(times: np.ndarray, values: np.ndarray, limit: float) -> float:
    """The crossing by linear interpolation (fe3d's former estimate), for comparison."""
    i = int(np.argmax(values > limit))
    t0, t1, c0, c1 = times[i - 1], times[i], values[i - 1], values[i]
    return float(t0 + (limit - c0) / (c1 - c0) * (t1 - t0))


@pytest.mark.parametrize("ratio", [1e-2, 1e-3, 2.5e-4])
def test_first_time_above_a_low_limit_on_the_rising_tail(ratio: float) -> None:
    """At 12 m in the Ogata–Banks column (test_column's parameters) the first time above a
    limit of ``ratio`` × c0 read from 0.5 d samples is within 1 % of a step of the exact time
    (Brent on the exact curve, to 1e-10 d): small against the run's own time error, which
    is of the order of a step. Measured 0.0006, 0.0010, 0.0020 d; linear interpolation in c
    puts it 0.016, 0.035, 0.067 d early (asserted ≥ 10× worse)."""
    x = np.array([12.0])
    times = np.arange(0.0, 40.0 + STEP / 2, STEP)
    values = np.array([float(ogata_banks(x, t)[0]) if t > 0 else 0.0 for t in times])
    exact = brentq(lambda t: float(ogata_banks(x, t)[0]) - ratio, 1e-3, 40.0, xtol=1e-10)
    got = breakthrough(times, values, ratio).first_above_limit
    assert got is not None
    assert abs(got - exact) <= 0.01 * STEP
    assert abs(_linear_first(times, values, ratio) - exact) >= 10 * abs(got - exact)


def test_peak_between_steps_of_a_released_pulse() -> None:
    """A pulse released at x = 0 passes x = 30 m (v = 1 m/d, D = 0.5 m²/d): sampled every
    0.5 d with the exact peak midway between two samples, the parabola's vertex gives the
    peak to 1e-4 relative and its time to 0.01 d, where the largest sample is off by
    half a step and ~1e-3 of the peak."""
    v, d, x = 1.0, 0.5, 30.0

    def pulse(t: np.ndarray) -> np.ndarray:
        return np.exp(-(x - v * t) ** 2 / (4 * d * t)) / np.sqrt(4 * np.pi * d * t)

    fine = np.linspace(20.0, 40.0, 200_001)
    exact_t = float(fine[np.argmax(pulse(fine))])
    exact_c = float(pulse(np.array([exact_t]))[0])
    times = exact_t + STEP / 2 + np.arange(-40, 41) * STEP  # the peak midway between samples
    b = breakthrough(times, pulse(times), 0.1 * exact_c)
    assert b.peak == pytest.approx(exact_c, rel=1e-4)
    assert abs(b.peak_time - exact_t) <= 0.01
    stored = pulse(times)
    assert abs(stored.max() - exact_c) > 5e-4 * exact_c  # what the vertex improves on


def test_a_kink_keeps_the_stored_peak() -> None:
    """A history that rises linearly and falls at once (a source stopping) has its peak at
    the kink: the stored value and time stay (no parabola above the samples)."""
    times = np.arange(0.0, 10.0)
    values = np.where(times <= 6.0, times, 6.0 - 3.0 * (times - 6.0))
    b = breakthrough(times, values, 1.0)
    assert (b.peak, b.peak_time) == (6.0, 6.0)
