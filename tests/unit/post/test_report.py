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
                source_max={"x": 1.0}, plume={}, travel_times=[], well_heads={}, wall_time=1.0,
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
    ("limiting_blocked", {"x": 0.25}, "25% of the nodes"),
])
def test_each_threshold_warns(field, value, word):
    """Thresholds: Courant 1, grid Péclet 2, undershoot 1 % of the source (common practice,
    no source)."""
    w = quality_warnings(_summary(**{field: value}))
    assert len(w) == 1
    assert word in w[0]


def test_negative_values_advice_follows_the_scheme():
    """The advice names the monotone option, or, when it was on, backward Euler (T16)."""
    plain = quality_warnings(_summary(min_concentration={"x": -0.05}))[0]
    assert "set solver.monotone = true" in plain
    mono = quality_warnings(_summary(min_concentration={"x": -0.05}, monotone=True))[0]
    assert "backward Euler only" in mono and "set solver.monotone" not in mono


def test_breakthrough_interpolates_crossing_times():
    t = np.array([0.0, 1.0, 2.0, 3.0, 4.0])
    c = np.array([0.0, 1.0, 3.0, 1.0, 0.0])
    b = breakthrough(t, c, 2.0)
    assert b.peak == 3.0
    assert b.peak_time == 2.0
    assert b.first_above_limit == pytest.approx(1.5, abs=1e-12)
    assert b.last_above_limit == pytest.approx(2.5, abs=1e-12)
    assert breakthrough(t, c, 5.0).first_above_limit is None


def test_plume_extent_counts_nodes_above_the_limit(tmp_path):
    """Lumped volume, pore-volume mass and plan extent over the nodes above the limit; the
    contour surface of a linear field is the plane c = level (exact for P1)."""
    from skfem import MeshTet

    from fe3d.post.plume import plume_extent, write_isosurface

    m = MeshTet.init_tensor(np.linspace(0, 4, 5), np.linspace(0, 1, 2), np.linspace(0, 1, 2))
    pts, cells = m.p, m.t
    conc = 1.0 - pts[0] / 4.0  # 1 at x = 0, 0 at x = 4
    node_vol = np.full(pts.shape[1], 0.5)
    ext = plume_extent(pts, node_vol, 0.25 * node_vol, conc, 0.4, (0.0, 0.0))
    above = conc > 0.4  # x = 0, 1, 2 → 12 nodes
    assert ext.volume == pytest.approx(0.5 * above.sum())
    assert ext.dissolved_mass == pytest.approx(0.125 * conc[above].sum())
    assert ext.extent == pytest.approx(np.hypot(2.0, 1.0))
    assert plume_extent(pts, node_vol, node_vol, conc, 2.0, (0.0, 0.0)).volume == 0.0
    import pyvista as pv

    path = write_isosurface(tmp_path / "iso.vtp", pts, cells, conc, 0.5, name="c [mg/L]")
    surf = pv.read(path)
    np.testing.assert_allclose(surf.points[:, 0], 2.0, atol=1e-12)
    assert surf.area == pytest.approx(1.0, rel=1e-12)
