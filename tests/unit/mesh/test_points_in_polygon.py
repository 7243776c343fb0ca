"""The vectorised polygon test gives the point-by-point test's answer for every point."""

from __future__ import annotations

import numpy as np
import pytest

from fe3d.case.geology import point_in_polygon
from fe3d.mesh.geometry import points_in_polygon

POLYGON = [(400.0, 200.0), (550.0, 220.0), (520.0, 330.0), (460.0, 280.0), (380.0, 300.0)]


@pytest.mark.parametrize("tol", [0.0, 1e-4, 2.0])
def test_points_in_polygon_matches_point_by_point(tol: float) -> None:
    rng = np.random.default_rng(8)
    xy = rng.uniform([350.0, 180.0], [580.0, 350.0], (4000, 2)).T
    on_edges = np.array([[475.0, 210.0], [400.0, 200.0], [535.0, 275.0], [420.0, 290.0]]).T
    xy = np.hstack([xy, on_edges, np.round(xy[:, :200])])  # vertices, edges, grid points
    want = np.array([point_in_polygon(x, y, POLYGON, tol=tol) for x, y in xy.T])
    got = points_in_polygon(xy, POLYGON, tol=tol)
    np.testing.assert_array_equal(got, want)
    assert 0 < want.sum() < want.size
