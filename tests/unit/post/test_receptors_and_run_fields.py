"""Receptor statistics and the fields over the run (post-processing, no physics); behaviour
tests on hand-made series unless a docstring names a reference."""

from __future__ import annotations

import numpy as np
import pytest

from fe3d.post.receptors import ReceptorRow, receptor_result, time_above
from fe3d.transport.run_wide import RunWideField

TIMES = np.array([0.0, 1.0, 2.0, 3.0, 4.0])
VALUES = np.array([0.0, 1.0, 3.0, 1.0, 0.0])


def test_time_above_counts_the_interpolated_crossings():
    """Above 2 between the crossings on the parabola in log c, 2 ∓ √(1 − ln 2/ln 3) (by
    hand, see below); above 0.5 from 0.5 to 3.5 (the crossings next to the zeros are linear:
    no log there); never above 5, always above −1."""
    half = np.sqrt(1.0 - np.log(2.0) / np.log(3.0))
    assert time_above(TIMES, VALUES, 2.0) == pytest.approx(2.0 * half, abs=1e-12)
    assert time_above(TIMES, VALUES, 5.0) == 0.0
    assert time_above(TIMES, VALUES, -1.0) == pytest.approx(4.0, abs=1e-12)
    assert time_above(TIMES, VALUES, 0.5) == pytest.approx(3.0, abs=1e-12)  # 0.5 to 3.5


def _rows(values: np.ndarray) -> list[ReceptorRow]:
    return [ReceptorRow("PW", "well", "x", t, 2.0, c, 2.0 * c, 10.0 * t)
            for t, c in zip(TIMES, values, strict=True)]


def test_receptor_result_states_peak_crossings_and_mass():
    r = receptor_result(_rows(VALUES), 2.0)
    assert (r.peak, r.peak_time, r.peak_mass_flux) == (3.0, 2.0, 6.0)
    # crossings on the parabola in log c through (1, 1), (2, 3), (3, 1) (fe3d.post.probes):
    # ln c = ln 3 (1 − (t − 2)²) is ln 2 at t = 2 ∓ √(1 − ln 2/ln 3), by hand
    half = np.sqrt(1.0 - np.log(2.0) / np.log(3.0))
    assert r.first_above_limit == pytest.approx(2.0 - half, abs=1e-12)
    assert r.last_above_limit == pytest.approx(2.0 + half, abs=1e-12)
    assert r.time_above_limit == pytest.approx(2.0 * half, abs=1e-12)
    assert r.mass_out == 40.0  # the last row's cumulative mass
    never = receptor_result(_rows(VALUES), 5.0)
    assert never.first_above_limit is None and never.last_above_limit is None
    assert never.time_above_limit == 0.0


def test_run_wide_field_keeps_the_largest_and_the_first_crossing():
    """Three output times at nodes that rise, fall and stay clean: the largest value and its
    time, the first time above 1 interpolated linearly (0.5 → 2 crosses 1 at a third of the
    way from t = 10 to t = 20), 0 where above at the start, NaN where never above."""
    f = RunWideField.start(4)
    fields = [(0.0, np.array([0.5, 1.5, 0.0, 0.0])), (10.0, np.array([0.5, 0.2, 0.0, 0.9])),
              (20.0, np.array([2.0, 0.1, 0.0, 0.7]))]
    previous = None
    for t, c in fields:
        f = f.add(c, t, 1.0, previous)
        previous = (c, t)
    np.testing.assert_array_equal(f.largest, [2.0, 1.5, 0.0, 0.9])
    np.testing.assert_array_equal(f.time_of_largest, [20.0, 0.0, 0.0, 10.0])
    np.testing.assert_allclose(f.first_above[:2], [10.0 + 10.0 / 3.0, 0.0], rtol=1e-14)
    assert np.isnan(f.first_above[2:]).all()
