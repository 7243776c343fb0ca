"""Case sections for site geometry and geology: the plan-view boundary polygon with named
edges, borehole picks and gridded surface points, lenses, and refinement lines.

Also the pure-Python plan geometry the checks need (point in polygon, self-intersection,
polygon area) and the readers of the borehole and surface-point CSV files. Values are SI
(metres) after validation; CSV files hold plain numbers in metres.
"""

from __future__ import annotations

import csv
import io
import itertools
import math
import statistics
from pathlib import Path
from typing import Annotated, Literal

from pydantic import Field, model_validator

from fe3d.case.data_files import read_text, shown_cell
from fe3d.case.plausible import MAX_COORDINATE_M
from fe3d.case.schema_types import (
    Length,
    Name,
    NonNegativeLength,
    PlanPoint,
    PlanPolygon,
    PositiveLength,
    Section,
)
from fe3d.errors import CaseError

__all__ = [
    "Borehole",
    "Boundary",
    "Lens",
    "RefinementLine",
    "Stratigraphy",
    "SurfaceGrid",
    "point_in_polygon",
    "polygon_area",
    "read_borehole_file",
    "read_grid_file",
    "read_surface_file",
    "self_intersection",
]

BOX_EDGE_NAMES: tuple[str, str, str, str] = ("south", "east", "north", "west")


class Boundary(Section):
    """Plan-view model boundary: polygon vertices and one name per edge.

    Edge ``i`` runs from vertex ``i`` to vertex ``i + 1`` (the last one back to the first).
    Consecutive edges may share a name; each distinct name becomes a lateral boundary face.
    ``top`` is a flat ground elevation, used only when no borehole picks give the ground.
    """

    vertices: PlanPolygon
    edge_names: list[Name] = Field(min_length=3)
    top: Length | None = None


class Borehole(Section):
    """Picks at one borehole: ground elevation and the base elevation of each unit present.

    A unit missing from ``bases`` (or given as ``None``) is absent at this borehole.
    """

    name: Annotated[str, Field(min_length=1, max_length=64)]
    x: Length
    y: Length
    ground: Length
    bases: dict[Name, Length | None] = Field(default_factory=dict)


class SurfaceGrid(Section):
    """A surface on a regular plan grid: node x [m] (increasing), node y [m] (increasing) and
    elevations ``z[j][i]`` [m] at (x[i], y[j]); bilinear between the nodes."""

    x: Annotated[list[Length], Field(min_length=2)]
    y: Annotated[list[Length], Field(min_length=2)]
    z: list[list[Length]]


class Stratigraphy(Section):
    """Where the layer surfaces come from and how they are interpolated.

    ``interpolation``: ``linear`` (linear on the Delaunay triangulation of the data points,
    continued outside their convex hull by the value at the nearest hull point) or
    ``thin_plate`` (thin-plate spline radial basis function with a linear polynomial part,
    scipy ``RBFInterpolator``; it also extrapolates). Both pass through every data point.
    ``min_thickness``: a unit thinner than this at a plan node is removed there (see
    docs/theory.md, mesh section). ``grid_files`` (surface name → grid CSV file) and
    ``grids`` give a surface (``ground`` or a unit's base) on a regular grid instead, taken
    bilinearly from the grid alone (picks of that surface are not used).
    """

    borehole_file: str | None = None
    boreholes: list[Borehole] = Field(default_factory=list)
    surface_files: dict[Name, str] = Field(default_factory=dict)
    surface_points: dict[Name, list[tuple[Length, Length, Length]]] = Field(
        default_factory=dict)
    grid_files: dict[Name, str] = Field(default_factory=dict)
    grids: dict[Name, SurfaceGrid] = Field(default_factory=dict)
    interpolation: Literal["linear", "thin_plate"] = "linear"
    min_thickness: NonNegativeLength = 0.1


class LensPick(Section):
    """Top and bottom [m] of a lens where a borehole crosses it."""

    borehole: Annotated[str, Field(min_length=1, max_length=64)]
    top: Length
    bottom: Length


class Lens(Section):
    """A body of its own material inside a host unit: plan polygon, top and bottom [m].

    ``top`` and ``bottom`` are given directly, or by ``picks`` in the boreholes that cross
    the lens; lenses are modelled flat, so the picks are averaged (mean top, mean bottom)
    and ``pick_spread`` [m] records how far they scatter around that mean.
    """

    name: Name
    material: Name
    host: Name
    polygon: PlanPolygon
    top: Length | None = None
    bottom: Length | None = None
    picks: list[LensPick] = Field(default_factory=list)

    @model_validator(mode="after")
    def _top_and_bottom(self) -> Lens:
        if self.picks and (self.top is not None or self.bottom is not None):
            msg = "give either top and bottom, or picks from boreholes, not both"
            raise ValueError(msg)
        if not self.picks:
            if self.top is None or self.bottom is None:
                msg = "needs top and bottom, or picks from the boreholes that cross it"
                raise ValueError(msg)
            return self
        object.__setattr__(self, "top", statistics.fmean(p.top for p in self.picks))
        object.__setattr__(self, "bottom", statistics.fmean(p.bottom for p in self.picks))
        return self

    @property
    def pick_spread(self) -> float:
        """Largest distance [m] of a pick from the mean top or bottom (0 without picks)."""
        if not self.picks:
            return 0.0
        assert self.top is not None and self.bottom is not None
        return max(max(abs(p.top - self.top), abs(p.bottom - self.bottom)) for p in self.picks)


class RefinementLine(Section):
    """A named plan polyline (e.g. a stream) near which the plan cells are ``cell_size``."""

    name: Name
    points: Annotated[list[PlanPoint], Field(min_length=2)]
    cell_size: PositiveLength
    radius: NonNegativeLength = 0.0


# ----------------------------------------------------------------------------- plan geometry


def polygon_area(vertices: list[tuple[float, float]]) -> float:
    """Signed area [m²] by the shoelace formula (positive when counter-clockwise)."""
    n = len(vertices)
    s = 0.0
    for i in range(n):
        x0, y0 = vertices[i]
        x1, y1 = vertices[(i + 1) % n]
        s += x0 * y1 - x1 * y0
    return 0.5 * s


def point_in_polygon(x: float, y: float, vertices: list[tuple[float, float]], *,
                     tol: float = 1e-9) -> bool:
    """True if (x, y) lies inside the polygon or within ``tol`` [m] of its edges."""
    n = len(vertices)
    inside = False
    for i in range(n):
        x0, y0 = vertices[i]
        x1, y1 = vertices[(i + 1) % n]
        if _segment_distance(x, y, x0, y0, x1, y1) <= tol:
            return True
        if (y0 > y) != (y1 > y):
            xc = x0 + (y - y0) * (x1 - x0) / (y1 - y0)
            if xc > x:
                inside = not inside
    return inside


def _segment_distance(px: float, py: float, x0: float, y0: float, x1: float,
                      y1: float) -> float:
    dx, dy = x1 - x0, y1 - y0
    L2 = dx * dx + dy * dy
    t = 0.0 if L2 == 0 else max(0.0, min(1.0, ((px - x0) * dx + (py - y0) * dy) / L2))
    return math.hypot(px - x0 - t * dx, py - y0 - t * dy)


def _cross(ax: float, ay: float, bx: float, by: float) -> float:
    return ax * by - ay * bx


def _segments_meet(p: tuple[float, float], q: tuple[float, float], r: tuple[float, float],
                   s: tuple[float, float], scale: float) -> bool:
    """True if closed segments pq and rs share a point (collinear overlaps included)."""
    eps = 1e-12 * scale * scale
    d1 = _cross(q[0] - p[0], q[1] - p[1], r[0] - p[0], r[1] - p[1])
    d2 = _cross(q[0] - p[0], q[1] - p[1], s[0] - p[0], s[1] - p[1])
    d3 = _cross(s[0] - r[0], s[1] - r[1], p[0] - r[0], p[1] - r[1])
    d4 = _cross(s[0] - r[0], s[1] - r[1], q[0] - r[0], q[1] - r[1])
    if ((d1 > eps and d2 < -eps) or (d1 < -eps and d2 > eps)) and (
            (d3 > eps and d4 < -eps) or (d3 < -eps and d4 > eps)):
        return True
    tol = 1e-9 * scale
    return any(_segment_distance(*a, *b, *c) <= tol
               for a, b, c in ((r, p, q), (s, p, q), (p, r, s), (q, r, s)))


def self_intersection(vertices: list[tuple[float, float]]) -> tuple[int, int] | None:
    """The first pair of non-adjacent edges (i, j) that touch or cross, else ``None``.

    Also reports repeated vertices (a zero-length edge touches its neighbours' ends).
    """
    n = len(vertices)
    xs = [v[0] for v in vertices]
    ys = [v[1] for v in vertices]
    scale = max(max(xs) - min(xs), max(ys) - min(ys), 1.0)
    for i in range(n):
        a, b = vertices[i], vertices[(i + 1) % n]
        if math.hypot(b[0] - a[0], b[1] - a[1]) <= 1e-9 * scale:
            return (i, i)
    for i in range(n):
        for j in range(i + 2, n):
            if i == 0 and j == n - 1:
                continue  # adjacent through the closing vertex
            if _segments_meet(vertices[i], vertices[(i + 1) % n], vertices[j],
                              vertices[(j + 1) % n], scale):
                return (i, j)
    return None


# ------------------------------------------------------------------------------- CSV readers


def _number(text: str, key: str, where: str) -> float:
    try:
        v = float(text)
    except ValueError:
        raise CaseError(key, shown_cell(text), f"must be a number in metres ({where})") \
            from None
    if not math.isfinite(v) or abs(v) > MAX_COORDINATE_M:
        raise CaseError(key, shown_cell(text), f"must be a finite number in metres, at most "
                        f"{MAX_COORDINATE_M:g} in size ({where})")
    return v


def _rows(path: Path, key: str) -> tuple[list[str], list[list[str]], list[int]]:
    """Header cells, data rows (cells stripped) and the file line number of every row
    (header first); blank lines and lines starting with ``#`` are skipped. The file must be
    a regular UTF-8 text file of bounded size (:func:`fe3d.case.data_files.read_text`)."""
    rows, nums = [], []
    reader = csv.reader(io.StringIO(read_text(path, key=key), newline=""))
    try:
        for r in reader:
            if r and any(c.strip() for c in r) and not r[0].lstrip().startswith("#"):
                rows.append(r)
                nums.append(reader.line_num)
    except csv.Error as exc:  # e.g. a field longer than csv's limit, a quote left open
        raise CaseError(key, path.name, f"is not a readable CSV (line {reader.line_num}: "
                        f"{exc})") from None
    if not rows:
        raise CaseError(key, path.name, "has no header row")
    header = [c.strip() for c in rows[0]]
    return header, [[c.strip() for c in r] for r in rows[1:]], nums


def read_borehole_file(path: Path, *, key: str = "stratigraphy.borehole_file",
                       ) -> list[Borehole]:
    """Read borehole picks: columns ``borehole, x, y, ground``, then one column per unit
    holding the elevation of that unit's base [m]; an empty cell means the unit is absent.
    Lines starting with ``#`` are comments.
    """
    header, rows, nums = _rows(path, key)
    lower = [h.lower() for h in header]
    if lower[:4] != ["borehole", "x", "y", "ground"]:
        found = ", ".join(shown_cell(h) for h in header[:4])
        raise CaseError(key, path.name, "must start with the header columns borehole, x, y, "
                                        f"ground (found {found})")
    units = header[4:]
    out: list[Borehole] = []
    seen: set[str] = set()
    for k, r in zip(nums[1:], rows, strict=True):
        name = r[0] if r else ""
        where = f"{path.name} line {k}"
        if not name:
            raise CaseError(f"{key}[line {k}].borehole", name, "must name the borehole")
        # a name or unit that is not a plain word is not echoed: the line number is
        shown = name if shown_cell(name) == name else f"line {k}"
        if name in seen:
            raise CaseError(f"{key}[{shown}]", shown, "borehole names must be unique")
        seen.add(name)
        if len(r) > len(header):
            raise CaseError(f"{key}[{shown}]", f"{len(r)} columns",
                            f"must have at most the {len(header)} header columns ({where})")
        r = r + [""] * (len(header) - len(r))
        x, y, g = (_number(r[i], f"{key}[{shown}].{lower[i]}", where) for i in (1, 2, 3))
        bases = {u: (_number(v, f"{key}[{shown}].{shown_cell(u)}", where) if v else None)
                 for u, v in zip(units, r[4:], strict=True)}
        # values are already numbers in metres: build without the unit-text validators
        out.append(Borehole.model_construct(name=name, x=x, y=y, ground=g, bases=bases))
    return out


def read_surface_file(path: Path, *, key: str) -> list[tuple[float, float, float]]:
    """Read surface points: a header ``x, y, z`` then one point per row [m]."""
    header, rows, nums = _rows(path, key)
    if [h.lower() for h in header[:3]] != ["x", "y", "z"]:
        raise CaseError(key, path.name, "must have the header x, y, z")
    pts = []
    for k, r in zip(nums[1:], rows, strict=True):
        where = f"{path.name} line {k}"
        if len(r) < 3:
            raise CaseError(f"{key}[line {k}]", f"{len(r)} columns", f"needs x, y and z ({where})")
        pts.append(tuple(_number(r[i], f"{key}[line {k}]", where) for i in range(3)))
    return pts  # type: ignore[return-value]


def read_grid_file(path: Path, *, key: str) -> SurfaceGrid:
    """Read a grid CSV: the header row holds any label, then the node x coordinates [m]; each
    following row holds a node y coordinate [m], then the elevation [m] at every x. x and y
    must be strictly increasing or strictly decreasing; rows come back sorted increasing.
    Lines starting with ``#`` are comments.
    """
    header, rows, nums = _rows(path, key)
    if len(header) < 3:
        raise CaseError(key, path.name, "the header row must hold a label, then at least two "
                                        "x coordinates in metres")
    xs = [_number(h, f"{key}[line {nums[0]}]", f"{path.name} line {nums[0]}")
          for h in header[1:]]
    ys: list[float] = []
    zs: list[list[float]] = []
    for k, r in zip(nums[1:], rows, strict=True):
        where = f"{path.name} line {k}"
        if len(r) != len(header):
            raise CaseError(f"{key}[line {k}]", f"{len(r)} columns",
                            f"must have a y coordinate and one elevation per x ({len(header)} "
                            f"columns, {where})")
        ys.append(_number(r[0], f"{key}[line {k}]", where))
        zs.append([_number(c, f"{key}[line {k}]", where) for c in r[1:]])
    if len(ys) < 2:
        raise CaseError(key, path.name, "needs at least two rows of elevations (y values)")
    for what, v in (("x", xs), ("y", ys)):
        d = [b - a for a, b in itertools.pairwise(v)]
        if not (all(x > 0 for x in d) or all(x < 0 for x in d)):
            raise CaseError(key, path.name, f"the {what} coordinates must be strictly "
                                            "increasing or strictly decreasing")
    if xs[0] > xs[-1]:
        xs, zs = xs[::-1], [row[::-1] for row in zs]
    if ys[0] > ys[-1]:
        ys, zs = ys[::-1], zs[::-1]
    return SurfaceGrid.model_construct(x=xs, y=ys, z=zs)


# ------------------------------------------------------------------- outline and case checks


def plan_outline(case: object) -> tuple[list[tuple[float, float]], list[str]]:
    """Plan boundary of a case: counter-clockwise vertices [m] and one name per edge.

    A box gives the rectangle with edges named south, east, north, west.
    """
    box = getattr(case, "box", None)
    boundary = getattr(case, "boundary", None)
    if boundary is not None:
        verts = [(float(x), float(y)) for x, y in boundary.vertices]
        names = list(boundary.edge_names)
        if polygon_area(verts) < 0:  # make it counter-clockwise; edge k ↔ old edge n-1-k
            n = len(verts)
            verts = [verts[0], *verts[:0:-1]]
            names = [names[n - 1 - k] for k in range(n)]
        return verts, names
    if box is None:
        return [], []
    (x0, x1), (y0, y1) = box.x, box.y
    return [(x0, y0), (x1, y0), (x1, y1), (x0, y1)], list(BOX_EDGE_NAMES)


def face_names(case: object) -> list[str]:
    """Names of the boundary faces the geometry defines: edge names, top, bottom."""
    _, names = plan_outline(case)
    if getattr(case, "boundary", None) is None:
        names = ["west", "east", "south", "north"]  # the box's faces, in their usual order
    return [*dict.fromkeys(names), "top", "bottom"]


def plan_origin(case: object) -> tuple[float, float]:
    """South-west corner of the outline's bounding box [m] (origin of planar gradients)."""
    verts, _ = plan_outline(case)
    return min(v[0] for v in verts), min(v[1] for v in verts)


def ground_top(case: object) -> float | None:
    """Highest ground elevation [m]: box or boundary top, else the highest ground pick."""
    box = getattr(case, "box", None)
    boundary = getattr(case, "boundary", None)
    strat = getattr(case, "stratigraphy", None)
    if strat is not None and "ground" in strat.grids:
        return max(max(row) for row in strat.grids["ground"].z)
    if strat is not None and (strat.boreholes or "ground" in strat.surface_points):
        z = [b.ground for b in strat.boreholes]
        z += [p[2] for p in strat.surface_points.get("ground", [])]
        return max(z)
    if box is not None:
        return float(box.top)
    if boundary is not None and boundary.top is not None:
        return float(boundary.top)
    return None


def base_bottom(case: object) -> float | None:
    """Lowest elevation of the model base [m] (outline vertices for a planar base, else picks)."""
    layers = getattr(case, "layers", [])
    if not layers:
        return None
    last = layers[-1]
    verts, _ = plan_outline(case)
    if last.bottom is not None and verts:
        x0, y0 = plan_origin(case)
        return min(last.bottom_at(x, y, x0, y0) for x, y in verts)
    strat = getattr(case, "stratigraphy", None)
    if strat is None:
        return None
    if last.name in strat.grids:
        return min(min(row) for row in strat.grids[last.name].z)
    z = [v for b in strat.boreholes for v in b.bases.values() if v is not None]
    z += [p[2] for pts in strat.surface_points.values() for p in pts]
    return min(z) if z else None


def _boundary_checks(case: object, errs: list[CaseError]) -> None:
    box = getattr(case, "box", None)
    boundary = getattr(case, "boundary", None)
    if box is None and boundary is None:
        errs.append(CaseError("box", _Missing(), "is required (or give a boundary polygon)"))
        return
    if box is not None and boundary is not None:
        errs.append(CaseError("boundary", "{…}", "give either box or boundary, not both"))
        return
    if boundary is None:
        return
    n = len(boundary.vertices)
    if len(boundary.edge_names) != n:
        errs.append(CaseError("boundary.edge_names", f"{len(boundary.edge_names)} names",
                              f"must give one name per edge ({n} vertices, {n} edges)"))
    bad = [e for e in boundary.edge_names if e in ("top", "bottom")]
    if bad:
        errs.append(CaseError("boundary.edge_names", bad[0],
                              "'top' and 'bottom' are reserved for the top and base faces"))
    verts = [(float(x), float(y)) for x, y in boundary.vertices]
    hit = self_intersection(verts)
    if hit is not None:
        i, j = hit
        what = (f"edge {i} has zero length" if i == j else
                f"edges {i} and {j} touch or cross (edge k runs from vertex k to vertex k+1)")
        errs.append(CaseError("boundary.vertices", f"{n} vertices",
                              f"must form a simple polygon: {what}"))


class _Missing:
    def __repr__(self) -> str:
        return "(missing)"

    __str__ = __repr__


def _inside(case: object, x: float, y: float) -> bool:
    verts, _ = plan_outline(case)
    if not verts:
        return True
    scale = max(max(v[0] for v in verts) - min(v[0] for v in verts),
                max(v[1] for v in verts) - min(v[1] for v in verts))
    return point_in_polygon(x, y, verts, tol=1e-9 * scale)


def _stratigraphy_checks(case: object, errs: list[CaseError]) -> None:
    strat = getattr(case, "stratigraphy", None)
    layers = getattr(case, "layers", [])
    units = [ly.name for ly in layers]
    picked = set()
    if strat is not None:
        seen: set[str] = set()
        for b in strat.boreholes:
            key = f"stratigraphy.boreholes[{shown_cell(b.name)}]"
            if b.name in seen:
                errs.append(CaseError(f"{key}.name", shown_cell(b.name),
                                      "borehole names must be unique"))
            seen.add(b.name)
            if not _inside(case, b.x, b.y):
                errs.append(CaseError(key, f"x = {b.x:g} m, y = {b.y:g} m",
                                      "the borehole lies outside the model boundary"))
            for u, z in b.bases.items():
                if u not in units:
                    errs.append(CaseError(f"{key}.{shown_cell(u)}", shown_cell(u),
                                          f"must name a unit: {units}"))
                elif z is not None and z > b.ground + 1e-9:
                    errs.append(CaseError(f"{key}.{shown_cell(u)}", f"{z:g} m",
                                          f"a unit base must not lie above the ground "
                                          f"({b.ground:g} m)"))
            picked |= {u for u, z in b.bases.items() if z is not None}
        for u, pts in strat.surface_points.items():
            if u != "ground" and u not in units:
                errs.append(CaseError(f"stratigraphy.surface_points.{u}", u,
                                      f"must be 'ground' or a unit: {units}"))
            for x, y, _z in pts:
                if not _inside(case, x, y):
                    errs.append(CaseError(f"stratigraphy.surface_points.{u}",
                                          f"x = {x:g} m, y = {y:g} m",
                                          "the point lies outside the model boundary"))
                    break
        _grid_checks(case, strat, layers, errs)
        need = 3  # both methods need three points not on one line (a plane)
        n_ground = len(strat.boreholes) + len(strat.surface_points.get("ground", []))
        if n_ground < need and "ground" not in strat.grids and getattr(
                case, "box", None) is None and (
                getattr(case, "boundary", None) is None or case.boundary.top is None):  # type: ignore[attr-defined]
            errs.append(CaseError("stratigraphy.boreholes", f"{n_ground} ground picks",
                                  f"{strat.interpolation} interpolation needs at least {need} "
                                  "points not on one line"))
        for ly in layers:
            if ly.bottom is not None or ly.name in strat.grids:
                continue
            # a borehole without this unit still fixes its base (at the surface above)
            n = len(strat.boreholes) + len(strat.surface_points.get(ly.name, []))
            if ly.name in picked and n < need:
                errs.append(CaseError(f"layers[{ly.name}]", f"{n} picks",
                                      f"{strat.interpolation} interpolation of its base needs "
                                      f"at least {need} boreholes or surface points"))
    for ly in layers:
        if ly.bottom is None and (strat is None or (
                ly.name not in picked and ly.name not in strat.surface_points
                and ly.name not in strat.grids)):
            errs.append(CaseError(f"layers[{ly.name}].bottom", _Missing(),
                                  "give a bottom, or borehole picks, surface points or a grid "
                                  "for it"))
        if ly.sublayers is not None and ly.cell_thickness is not None:
            errs.append(CaseError(f"layers[{ly.name}].sublayers", ly.sublayers,
                                  "give either sublayers or cell_thickness, not both"))


def _grid_checks(case: object, strat: Stratigraphy, layers: list, errs: list[CaseError],
                 ) -> None:
    """Grid surfaces: a known surface given once, a regular shape, covering the outline."""
    units = [ly.name for ly in layers]
    verts, _ = plan_outline(case)
    for name, g in strat.grids.items():
        key = (f"stratigraphy.grid_files.{name}" if name in strat.grid_files
               else f"stratigraphy.grids.{name}")
        if name != "ground" and name not in units:
            errs.append(CaseError(key, name, f"must be 'ground' or a unit: {units}"))
            continue
        if name in strat.surface_points:
            errs.append(CaseError(key, name, "give a surface either as a grid or as surface "
                                             "points, not both"))
        if name != "ground" and layers[units.index(name)].bottom is not None:
            errs.append(CaseError(key, name, f"layers[{name}] has a bottom: give either a "
                                             "bottom or a grid, not both"))
        if len(g.z) != len(g.y) or any(len(row) != len(g.x) for row in g.z):
            errs.append(CaseError(f"{key}.z", f"{len(g.z)} rows",
                                  f"must hold one row per y ({len(g.y)}) of one elevation per "
                                  f"x ({len(g.x)})"))
            continue
        if any(b <= a for a, b in itertools.pairwise(g.x)) or any(
                b <= a for a, b in itertools.pairwise(g.y)):
            errs.append(CaseError(key, name, "grid x and y must be strictly increasing"))
            continue
        tol = 1e-9 * max(g.x[-1] - g.x[0], g.y[-1] - g.y[0])
        out = [v for v in verts if not (g.x[0] - tol <= v[0] <= g.x[-1] + tol
                                        and g.y[0] - tol <= v[1] <= g.y[-1] + tol)]
        if out:
            errs.append(CaseError(key, f"x {g.x[0]:g}–{g.x[-1]:g} m, y {g.y[0]:g}–{g.y[-1]:g} m",
                                  f"the grid must cover the model boundary (vertex x = "
                                  f"{out[0][0]:g} m, y = {out[0][1]:g} m lies outside it)"))


def _lens_checks(case: object, errs: list[CaseError]) -> None:
    layers = getattr(case, "layers", [])
    materials = getattr(case, "materials", {})
    units = [ly.name for ly in layers]
    seen: set[str] = set(units)
    for lens in getattr(case, "lenses", []):
        key = f"lenses[{lens.name}]"
        if lens.name in seen:
            errs.append(CaseError(f"{key}.name", lens.name,
                                  "lens names must differ from each other and from the units"))
        seen.add(lens.name)
        if lens.host not in units:
            errs.append(CaseError(f"{key}.host", lens.host, f"must name a unit: {units}"))
        if lens.material not in materials:
            errs.append(CaseError(f"{key}.material", lens.material,
                                  f"must be one of the materials: {sorted(materials)}"))
        names = {b.name: b for b in getattr(getattr(case, "stratigraphy", None), "boreholes",
                                            [])}
        verts_l = [(float(x), float(y)) for x, y in lens.polygon]
        for p in lens.picks:
            b = names.get(p.borehole)
            if b is None:
                errs.append(CaseError(f"{key}.picks", p.borehole,
                                      f"must name a borehole of the stratigraphy: "
                                      f"{sorted(names)}"))
            elif not point_in_polygon(b.x, b.y, verts_l, tol=1e-6):
                errs.append(CaseError(f"{key}.picks", p.borehole,
                                      "the borehole must lie inside the lens polygon"))
            if not p.top > p.bottom:
                errs.append(CaseError(f"{key}.picks", p.borehole,
                                      "each pick's top must lie above its bottom"))
        assert lens.top is not None and lens.bottom is not None
        if not lens.top > lens.bottom:
            errs.append(CaseError(f"{key}.bottom", f"{lens.bottom:g} m",
                                  f"must lie below the lens top ({lens.top:g} m)"))
        verts = [(float(x), float(y)) for x, y in lens.polygon]
        if self_intersection(verts) is not None:
            errs.append(CaseError(f"{key}.polygon", f"{len(verts)} vertices",
                                  "must form a simple polygon"))
        elif not all(_inside(case, x, y) for x, y in verts):
            errs.append(CaseError(f"{key}.polygon", f"{len(verts)} vertices",
                                  "must lie inside the model boundary"))


def geology_checks(case: object) -> list[CaseError]:
    """Cross-section rules of the geometry and geology sections (one error per problem)."""
    errs: list[CaseError] = []
    _boundary_checks(case, errs)
    if errs:
        return errs
    _stratigraphy_checks(case, errs)
    _lens_checks(case, errs)
    faces = face_names(case)
    for w in getattr(case, "wells", []):
        if not _inside(case, w.x, w.y):
            errs.append(CaseError(f"wells[{w.name}]", f"x = {w.x:g} m, y = {w.y:g} m",
                                  "the well lies outside the model boundary"))
        for s in w.screens:
            if not s[0] > s[1]:
                errs.append(CaseError(f"wells[{w.name}].screens", f"[{s[0]:g}, {s[1]:g}] m",
                                      "each screen must be [top, bottom] with top > bottom"))
    allowed = "must be one of: " + ", ".join(repr(f) for f in faces[:-1]) + f" or {faces[-1]!r}"
    for i, fh in enumerate(getattr(case, "fixed_heads", [])):
        if fh.face not in faces:
            errs.append(CaseError(f"fixed_heads[{i}].face", fh.face, allowed))
    for s in getattr(case, "sources", []):
        if s.face is not None and s.face not in faces:
            errs.append(CaseError(f"sources[{s.name}].face", s.face, allowed))
    for line in getattr(case, "refinement_lines", []):
        if not all(_inside(case, x, y) for x, y in line.points):
            errs.append(CaseError(f"refinement_lines[{line.name}].points",
                                  f"{len(line.points)} points",
                                  "must lie inside the model boundary or on it"))
    return errs
