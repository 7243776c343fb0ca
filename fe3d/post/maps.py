"""Geometry behind the plan maps and sections (pure numpy; drawing is in
:mod:`fe3d.post.map_figures`): the site's features in plan, the largest value over depth
at each plan position, the mean flow direction, a vertical section of a P1 field and the
area swept by a well's backward pathlines."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from fe3d._typing import BoolArray, FloatArray, IndexArray
from fe3d.case.schema import Case
from fe3d.flow.boundaries import in_polygon
from fe3d.post.cut_grid import crossing_grid

__all__ = [
    "PlanField",
    "PlanLayout",
    "PlanMark",
    "PlanShape",
    "Section",
    "SiteFeatures",
    "horizontal_section",
    "mean_flow_direction",
    "plan_columns",
    "plan_layout",
    "plan_maximum",
    "section_marks",
    "section_through",
    "site_features",
    "swept_area",
    "vertical_section",
]


@dataclass(frozen=True)
class PlanShape:
    """A named plan polyline or polygon [m], shape ``(2, k)``; ``closed`` for a polygon."""

    name: str
    xy: FloatArray
    closed: bool


@dataclass(frozen=True)
class PlanMark:
    """A named plan point [m] of a kind (``source``, ``extraction``, ``injection``,
    ``observation``, ``monitoring``, ``receptor``)."""

    name: str
    x: float
    y: float
    kind: str


@dataclass(frozen=True)
class SiteFeatures:
    """What a plan map shows besides the field: the site outline, the edges held at a fixed
    head, streams and drains, lenses, source areas, and points (wells, observation points,
    point and line sources)."""

    site: str
    outline: PlanShape
    fixed_head_edges: tuple[PlanShape, ...]
    streams: tuple[PlanShape, ...]
    lenses: tuple[PlanShape, ...]
    source_areas: tuple[PlanShape, ...]
    marks: tuple[PlanMark, ...]


def site_features(case: Case) -> SiteFeatures:
    """The plan features of ``case`` (SI, metres)."""
    verts, edge_names = case.outline()
    outline = np.array(verts, dtype=float).T
    held = {h.face for h in case.fixed_heads}
    edges = tuple(PlanShape(name, outline[:, [i, (i + 1) % len(verts)]], closed=False)
                  for i, name in enumerate(edge_names) if name in held)
    streams = tuple(PlanShape(f"{z.name} ({z.kind})", np.array(z.zone, dtype=float).T,
                              closed=True) for z in case.head_dependent if z.zone is not None)
    lenses = tuple(PlanShape(lens.name, np.array(lens.polygon, dtype=float).T, closed=True)
                   for lens in case.lenses)
    areas, marks = [], []
    for s in case.sources:
        if s.points is not None:
            marks += [PlanMark(s.name, p[0], p[1], "source") for p in s.points[:1]]
            if len(s.points) > 1:
                areas.append(PlanShape(s.name, np.array(s.points, dtype=float)[:, :2].T,
                                       closed=False))
        elif s.x is not None and s.y is not None:
            (x0, x1), (y0, y1) = s.x, s.y
            areas.append(PlanShape(s.name, np.array([[x0, x1, x1, x0], [y0, y0, y1, y1]]),
                                   closed=True))
    marks += [PlanMark(w.name, w.x, w.y, w.kind) for w in case.wells]
    marks += [PlanMark(o.name, o.x, o.y, o.kind) for o in case.observation_points]
    return SiteFeatures(case.site or case.title, PlanShape("site outline", outline, True),
                        edges, streams, lenses, _unique_areas(areas), tuple(marks))


def _unique_areas(areas: list[PlanShape]) -> tuple[PlanShape, ...]:
    """Sources sharing one area (several species from one leak) drawn once, names joined."""
    out: dict[bytes, PlanShape] = {}
    for a in areas:
        key = a.xy.tobytes()
        out[key] = PlanShape(f"{out[key].name}, {a.name}", a.xy, a.closed) if key in out else a
    return tuple(out.values())


@dataclass(frozen=True)
class PlanField:
    """A field on plan positions: ``x``, ``y`` [m] ``(k,)``, plan triangles ``(3, t)``
    (inside the site outline) and values ``(k,)``."""

    x: FloatArray
    y: FloatArray
    triangles: IndexArray
    values: FloatArray


@dataclass(frozen=True)
class PlanLayout:
    """Where a mesh's node columns stand in plan: the first node of each column ``(k,)``,
    each node's column ``(n,)`` and the plan triangles ``(3, t)`` between the columns that
    lie inside the site outline. Fixed by the mesh, so made once per run."""

    first: IndexArray
    column: IndexArray
    triangles: IndexArray


def plan_layout(points: FloatArray, outline: FloatArray) -> PlanLayout:
    """The :class:`PlanLayout` of the nodes ``(3, n)`` [m]: columns by
    :func:`plan_columns`, their Delaunay triangles, those whose centre lies outside
    ``outline`` ``(2, k)`` [m] (a concave site) dropped."""
    from scipy.spatial import Delaunay

    first, column = plan_columns(points)
    x, y = points[0, first], points[1, first]
    tri = Delaunay(np.column_stack([x, y])).simplices.T
    cx, cy = x[tri].mean(axis=0), y[tri].mean(axis=0)
    inside = in_polygon(cx, cy, [tuple(p) for p in outline.T])
    return PlanLayout(first, column, np.ascontiguousarray(tri[:, inside]))


def plan_maximum(points: FloatArray, values: FloatArray, outline: FloatArray, *,
                 layout: PlanLayout | None = None) -> PlanField:
    """The largest nodal value over depth at each plan position of the mesh's nodes.

    fe3d's meshes are extruded from a plan triangulation: the nodes stand in vertical columns
    joined by vertical edges, along which a P1 field is linear between nodes, so the column's
    largest nodal value is the field's largest value on that vertical (exact there).
    Positions are grouped to 1e-9 of the site's size. ``outline`` ``(2, k)`` [m] masks the
    Delaunay triangles outside a concave site. ``layout``: the columns and triangles made
    once by :func:`plan_layout` for these ``points`` and ``outline`` (made here if not).
    """
    layout = layout or plan_layout(points, outline)
    top = np.full(layout.first.size, -np.inf)
    np.maximum.at(top, layout.column, values)
    return PlanField(points[0, layout.first], points[1, layout.first], layout.triangles, top)


def plan_columns(points: FloatArray) -> tuple[IndexArray, IndexArray]:
    """The vertical columns of the nodes ``(3, n)`` [m]: the first node of each distinct
    plan position ``(k,)`` and each node's column ``(n,)``, positions grouped to 1e-9 of
    the site's size (one integer key per position: x key × (y range + 1) + y key)."""
    lo = points[:2].min(axis=1, keepdims=True)
    size = float(np.ptp(points[:2], axis=1).max()) or 1.0
    keys = np.round((points[:2] - lo) / (1e-9 * size)).astype(np.int64)
    key = keys[0] * (int(keys[1].max()) + 1) + keys[1]  # < 1e18: fits int64
    _, first, column = np.unique(key, return_index=True, return_inverse=True)
    return first, column.ravel()


def mean_flow_direction(darcy_flux: FloatArray, cell_volumes: FloatArray) -> FloatArray:
    """Unit plan vector ``(2,)`` of the volume-weighted mean horizontal Darcy flux
    (``(3, n_cells)`` [m/s]); +x when the mean is zero."""
    mean = (darcy_flux[:2] * cell_volumes).sum(axis=1)
    norm = float(np.hypot(*mean))
    return mean / norm if norm > 0 else np.array([1.0, 0.0])


def section_through(origin: tuple[float, float], direction: FloatArray,
                    outline: FloatArray) -> tuple[FloatArray, FloatArray]:
    """Plan end points [m] ``(2,)`` of the line through ``origin`` along ``direction``,
    clipped to the site ``outline`` ``(2, k)`` (first and last crossing of its edges)."""
    o, d = np.asarray(origin, dtype=float), np.asarray(direction, dtype=float)
    a, b = outline, np.roll(outline, -1, axis=1)
    e = b - a
    den = d[0] * e[1] - d[1] * e[0]
    ok = np.abs(den) > 1e-12 * np.hypot(*e)
    w = a - o[:, None]
    with np.errstate(divide="ignore", invalid="ignore"):
        t = (w[0] * e[1] - w[1] * e[0]) / den  # along the line
        u = (w[0] * d[1] - w[1] * d[0]) / den  # along the edge
    hit = ok & (u >= -1e-12) & (u <= 1 + 1e-12)
    if not np.any(hit):
        msg = f"the line through {tuple(o)} along {tuple(d)} misses the site outline"
        raise ValueError(msg)
    return o + t[hit].min() * d, o + t[hit].max() * d


@dataclass(frozen=True)
class Section:
    """A vertical section: distance along it ``s`` [m] and elevation ``z`` [m] of the cut's
    vertices ``(k,)``, its triangles ``(3, t)``, the field's values there ``(k,)`` (the P1
    field restricted exactly to the plane), and its plan end points [m] ``(2,)``."""

    s: FloatArray
    z: FloatArray
    triangles: IndexArray
    values: FloatArray
    start: FloatArray
    end: FloatArray


def vertical_section(points: FloatArray, cells: IndexArray, values: FloatArray,
                     start: FloatArray, end: FloatArray) -> Section:
    """Cut the tetrahedra by the vertical plane through the plan segment ``start``–``end``
    [m] and keep the part between them. The values at the cut's vertices are interpolated
    linearly along the cut edges, which is the P1 field itself."""
    d = (end - start) / float(np.hypot(*(end - start)))
    normal = (float(-d[1]), float(d[0]), 0.0)
    grid = crossing_grid(points, cells, (points[0] - start[0]) * normal[0]
                         + (points[1] - start[1]) * normal[1], {"v": values})
    cut = None if grid is None else grid.slice(
        normal=normal, origin=(float(start[0]), float(start[1]), 0.0), generate_triangles=True)
    if cut is None or cut.n_points == 0:
        msg = "the section plane misses the mesh"
        raise ValueError(msg)
    xyz = np.asarray(cut.points).T
    s = (xyz[0] - start[0]) * d[0] + (xyz[1] - start[1]) * d[1]
    tri = np.asarray(cut.faces).reshape(-1, 4)[:, 1:].T
    length = float(np.hypot(*(end - start)))
    keep = (s[tri].max(axis=0) >= 0) & (s[tri].min(axis=0) <= length)
    return Section(s, xyz[2], np.ascontiguousarray(tri[:, keep]),
                   np.asarray(cut.point_data["v"]), np.asarray(start), np.asarray(end))


def swept_area(lines: list[FloatArray], centre: tuple[float, float], gx: FloatArray,
               gy: FloatArray) -> BoolArray:
    """Raster ``(len(gy), len(gx))`` of the plan area swept by a well's backward pathlines
    (each ``(3, k)`` or ``(2, k)`` [m], starting around ``centre``): the union of the
    regions between pathlines whose starts are neighbours in angle around the well.

    The water between two neighbouring pathlines flows to the well between them, so the
    union is the well's capture zone within the time the lines were tracked, resolved to
    the spacing of the starts (with n starts equally spaced in angle, the far upstream
    width in a uniform flow is (1 − 2/n) of the true one: see docs/outputs.md).
    """
    px, py = np.meshgrid(gx, gy)
    inside = np.zeros(px.shape, dtype=bool)
    usable = [_thinned(p[:2], 200) for p in lines if p.shape[1] >= 2]
    angle = [math.atan2(p[1, 0] - centre[1], p[0, 0] - centre[0]) for p in usable]
    order = np.argsort(angle, kind="stable")
    for i, j in zip(order, np.roll(order, -1), strict=True):
        ring = np.hstack([usable[i], usable[j][:, ::-1]])
        inside |= in_polygon(px, py, [(float(a), float(b)) for a, b in ring.T])
    return inside


def horizontal_section(points: FloatArray, cells: IndexArray, values: FloatArray,
                       elevation: float) -> PlanField:
    """The P1 field on the horizontal plane z = ``elevation`` [m] (cut as in
    :func:`vertical_section`): plan positions, triangles and values of the cut."""
    grid = crossing_grid(points, cells, points[2] - elevation, {"v": values})
    cut = None if grid is None else grid.slice(
        normal=(0.0, 0.0, 1.0), origin=(0.0, 0.0, float(elevation)), generate_triangles=True)
    if cut is None or cut.n_points == 0:
        msg = f"the plane z = {elevation:g} m misses the mesh"
        raise ValueError(msg)
    xyz = np.asarray(cut.points).T
    tri = np.asarray(cut.faces).reshape(-1, 4)[:, 1:].T
    return PlanField(xyz[0], xyz[1], np.ascontiguousarray(tri), np.asarray(cut.point_data["v"]))


def section_marks(case: Case, start: FloatArray, end: FloatArray, *, within: float
                  ) -> tuple[tuple[str, tuple[float, float], float, float, str], ...]:
    """Well screens, screened observation points and source boxes within ``within`` [m] of
    the section's plan trace, as (name, (s_from, s_to) [m] along it, top, bottom [m], kind)
    for :func:`fe3d.post.map_figures.plot_section`."""
    d = (end - start) / float(np.hypot(*(end - start)))

    def along(x: float, y: float) -> tuple[float, float]:
        return (x - start[0]) * d[0] + (y - start[1]) * d[1], \
            abs(-(x - start[0]) * d[1] + (y - start[1]) * d[0])

    marks = []
    for w in case.wells:
        s, off = along(w.x, w.y)
        marks += [(w.name, (s, s), top, bottom, w.kind) for top, bottom in w.screens
                  if off <= within]
    for o in case.observation_points:
        s, off = along(o.x, o.y)
        if off <= within and o.screen is not None:
            marks.append((o.name, (s, s), o.screen[0], o.screen[1], o.kind))
    for src in case.sources:
        if src.x is None or src.y is None or src.z is None:
            continue
        corners = [along(x, y) for x in src.x for y in src.y]
        if min(c[1] for c in corners) <= within:
            s_all = [c[0] for c in corners]
            marks.append((src.name, (min(s_all), max(s_all)), max(src.z), min(src.z),
                          "source"))
    return tuple(dict.fromkeys(marks))


def _thinned(line: FloatArray, most: int) -> FloatArray:
    """At most ``most`` vertices of a polyline ``(2, k)``, evenly picked, ends kept."""
    if line.shape[1] <= most:
        return line
    keep = np.unique(np.linspace(0, line.shape[1] - 1, most).round().astype(int))
    return line[:, keep]
