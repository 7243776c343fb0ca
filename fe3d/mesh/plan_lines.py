"""Lines the plan triangulation must follow: lens and source-box outlines (theory.md M5).

An outline becomes mesh edges only if gmsh can embed it: its vertices are points shared with
every other line and point at the same place, a point that must be a node and lies on one of
its sides splits that side, and no two outlines cross. :func:`plan_outlines` returns the
outlines so prepared; a box outline that would cross or run along another outline is left
out (the fine cells around sources still resolve it, M6) and named in the returned notes.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

__all__ = ["PlanOutlines", "distance_to_side", "plan_outlines"]

Point = tuple[float, float]


@dataclass(frozen=True)
class PlanOutlines:
    """Closed outlines ``polygons`` (vertices in order, the last joined to the first, with the
    points lying on their sides inserted) and one line per ``left_out`` box naming why."""

    polygons: list[list[Point]]
    left_out: list[str]


def plan_outlines(lenses: list[list[Point]], boxes: dict[str, list[Point]],
                  points: list[Point], tol: float) -> PlanOutlines:
    """Lens outlines (always kept) and box outlines (kept where they meet no other outline
    but at a shared vertex), each with the ``points`` on its sides inserted as vertices.

    Parameters
    ----------
    lenses
        Lens polygons [m].
    boxes
        Source-box rectangles [m] by source name; equal rectangles are kept once.
    points
        Points that must be mesh nodes [m].
    tol
        Distance [m] below which two points are the same and a point lies on a side.
    """
    kept: list[list[Point]] = [list(p) for p in lenses]
    left_out: list[str] = []
    for name, rect in boxes.items():
        if any(_same_polygon(rect, k, tol) for k in kept):
            continue
        if any(_outlines_meet(rect, k, tol) for k in kept):
            left_out.append(f"source {name}: its plan outline meets another outline, so its "
                            "sides are not mesh edges (the fine cells around it remain)")
            continue
        kept.append(list(rect))
    return PlanOutlines([_with_points_on_sides(k, points, tol) for k in kept], left_out)


def _sides(poly: list[Point]) -> list[tuple[Point, Point]]:
    return [(poly[i], poly[(i + 1) % len(poly)]) for i in range(len(poly))]


def _same_polygon(a: list[Point], b: list[Point], tol: float) -> bool:
    return len(a) == len(b) and all(any(_close(p, q, tol) for q in b) for p in a)


def _close(p: Point, q: Point, tol: float) -> bool:
    return math.hypot(p[0] - q[0], p[1] - q[1]) <= tol


def distance_to_side(p: Point, a: Point, b: Point) -> tuple[float, float]:
    """Distance from p to the side a–b and the parameter t ∈ [0, 1] of its nearest point."""
    dx, dy = b[0] - a[0], b[1] - a[1]
    t = ((p[0] - a[0]) * dx + (p[1] - a[1]) * dy) / (dx * dx + dy * dy)
    t = min(1.0, max(0.0, t))
    return math.hypot(p[0] - a[0] - t * dx, p[1] - a[1] - t * dy), t


def _outlines_meet(a: list[Point], b: list[Point], tol: float) -> bool:
    """True where a side of one outline crosses or touches the other anywhere but at a vertex
    both share."""
    for p, q in _sides(a):
        for r, s in _sides(b):
            shared = [v for v in (p, q) if _close(v, r, tol) or _close(v, s, tol)]
            if len(shared) == 2:  # the same side: the outlines run along each other
                return True
            ends = [v for v in (p, q, r, s) if not any(_close(v, w, tol) for w in shared)]
            if any(distance_to_side(v, *side)[0] <= tol for v in ends
                   for side in ((p, q), (r, s)) if v not in side):
                return True
            if not shared and _cross(p, q, r, s):
                return True
    return False


def _cross(p: Point, q: Point, r: Point, s: Point) -> bool:
    """Segments p–q and r–s cross at a point inside both."""
    def orient(a: Point, b: Point, c: Point) -> float:
        return (b[0] - a[0]) * (c[1] - a[1]) - (b[1] - a[1]) * (c[0] - a[0])

    return (orient(p, q, r) * orient(p, q, s) < 0.0) and (orient(r, s, p) * orient(r, s, q) < 0.0)


def _with_points_on_sides(poly: list[Point], points: list[Point], tol: float) -> list[Point]:
    """``poly`` with every point lying on a side (not at a vertex) inserted in order."""
    out: list[Point] = []
    for a, b in _sides(poly):
        out.append(a)
        on = sorted((t, p) for p in points
                    if not _close(p, a, tol) and not _close(p, b, tol)
                    for d, t in [distance_to_side(p, a, b)] if d <= tol)
        out += [p for _, p in on]
    return out
