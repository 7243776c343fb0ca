"""Quality warnings and breakthrough statistics (post-processing, no physics)."""

from __future__ import annotations

import numpy as np
import pytest

from fe3d.post.probes import breakthrough
from fe3d.post.report import RunSummary, quality_warnings


def _summary(**over: object) -> RunSummary:
    base = dict(  # noqa: C408 (keyword form reads like the record)
        title="t", site="s", n_nodes=1, n_cells=1, end_time=1.0, n_steps=1,
                observations=[], mass_balance_error={"x": 0.0}, flow_inflow=1.0,
                flow_discrepancy=0.0, max_grid_peclet={"x": 1.0}, max_courant={"x": 0.5},
                min_concentration={"x": 0.0}, min_concentration_at={"x": None},
                source_max={"x": 1.0}, travel_times=[], well_heads={}, wall_time=1.0,
                time_unit="d",
                concentration_unit="mg/L")
    base.update(over)
    return RunSummary(**base)  # type: ignore[arg-type]


def test_no_warning_for_a_resolved_run():
    assert quality_warnings(_summary()) == []


@pytest.mark.parametrize(("field", "value", "word"), [
    ("max_courant", {"x": 3.0}, "Courant"),
    ("max_grid_peclet", {"x": 8.0}, "Péclet"),
    ("min_concentration", {"x": -0.05}, "negative"),
])
def test_each_threshold_warns(field, value, word):
    """Thresholds: Courant 1, grid Péclet 2, undershoot 1 % of the source (common practice,
    no source)."""
    w = quality_warnings(_summary(**{field: value}))
    assert len(w) == 1
    assert word in w[0]


def test_breakthrough_interpolates_crossing_times():
    t = np.array([0.0, 1.0, 2.0, 3.0, 4.0])
    c = np.array([0.0, 1.0, 3.0, 1.0, 0.0])
    b = breakthrough(t, c, 2.0)
    assert b.peak == 3.0
    assert b.peak_time == 2.0
    assert b.first_above_limit == pytest.approx(1.5, abs=1e-12)
    assert b.last_above_limit == pytest.approx(2.5, abs=1e-12)
    assert breakthrough(t, c, 5.0).first_above_limit is None
