"""Outlines the plan triangulation follows (fe3d.mesh.plan_lines, theory.md M5): exact plane
geometry of segments (hand-checked cases), no tolerance beyond the mesher's plan tolerance."""

from __future__ import annotations

from fe3d.mesh.plan_lines import plan_outlines

SQUARE = [(0.0, 0.0), (10.0, 0.0), (10.0, 10.0), (0.0, 10.0)]
TOL = 1e-9


def test_points_on_a_side_are_inserted_in_order():
    out = plan_outlines([], {"a": SQUARE}, [(7.0, 0.0), (3.0, 0.0), (5.0, 5.0), (0.0, 0.0)],
                        TOL)
    assert out.polygons == [[(0.0, 0.0), (3.0, 0.0), (7.0, 0.0), (10.0, 0.0), (10.0, 10.0),
                             (0.0, 10.0)]]
    assert out.left_out == []


def test_equal_boxes_are_kept_once_and_crossing_ones_left_out():
    """Box a crosses the lens (and b, equal to a, with it); c lies apart and is kept."""
    lens = [(5.0, 5.0), (20.0, 5.0), (20.0, 20.0)]
    far = [(30.0, 30.0), (40.0, 30.0), (40.0, 40.0), (30.0, 40.0)]
    out = plan_outlines([lens], {"a": SQUARE, "b": list(SQUARE), "c": far}, [], TOL)
    assert out.polygons == [lens, far]
    assert [line.split(":")[0] for line in out.left_out] == ["source a", "source b"]


def test_outlines_sharing_a_side_or_touching_meet():
    beside = [(10.0, 0.0), (20.0, 0.0), (20.0, 10.0), (10.0, 10.0)]  # shares the side x = 10
    corner = [(10.0, 10.0), (20.0, 10.0), (20.0, 20.0), (10.0, 20.0)]  # one shared vertex
    touching = [(10.0, 5.0), (20.0, 5.0), (20.0, 8.0)]  # a vertex on the square's side
    assert plan_outlines([SQUARE], {"b": beside}, [], TOL).left_out
    assert not plan_outlines([SQUARE], {"c": corner}, [], TOL).left_out
    assert plan_outlines([SQUARE], {"t": touching}, [], TOL).left_out
