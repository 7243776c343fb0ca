"""Build the site mesh: gmsh triangulates the plan-view boundary polygon with local refinement,
then the plan mesh is extruded through the layer surfaces into prisms split into tetrahedra.

This module is the only user of gmsh. The prism split follows the global plan-node order
(every quadrilateral side is cut from the lower-numbered node's bottom to the higher-numbered
node's top), so neighbouring columns always agree and the mesh is conforming. Every second cell
layer uses the mirror image of that rule (higher-numbered node's bottom to lower-numbered
node's top); neighbours within a cell layer still agree, and the levels between cell layers
are whole plan triangles, so the mesh stays conforming. One split of a prism is not symmetric
top to bottom: where the head curves strongly in plan (next to a well) it makes the heads at
the top and bottom of a column differ although the exact head does not vary with depth.
Mirroring alternate cell layers cancels most of that difference (measured on the Thiem check,
tests/verification/test_flow_sources.py: 1.09 % → 0.67 % of the drawdown from two fine
cells out with ten cell layers). Where a unit
has zero thickness the nodes of a column coincide; they are merged and the tetrahedra that
collapse are dropped, which keeps the mesh conforming (each collapsed side quad becomes a
triangle that both neighbouring columns cut the same way).
"""

from __future__ import annotations

import itertools
import logging
import math
from dataclasses import dataclass, replace
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
from scipy.sparse.csgraph import reverse_cuthill_mckee

from fe3d._typing import FloatArray, IndexArray
from fe3d.errors import MeshError
from fe3d.mesh.corridor import FINE_SIZE_MARGIN, Corridor, corridor_zones, project_to_edges
from fe3d.mesh.geometry import points_in_polygon
from fe3d.mesh.plan_lines import distance_to_side, plan_outlines
from fe3d.mesh.prisms import (
    boundary_triangles,
    order_by_lowest_node,
    orient_positive,
    split_prisms,
)
from fe3d.mesh.quality import quality_report
from fe3d.mesh.report import LensFit, MeshReport, PlanLayout
from fe3d.mesh.site_mesh import SiteMesh
from fe3d.mesh.stratigraphy import unit_surfaces
from fe3d.p1 import index_type, node_graph

if TYPE_CHECKING:
    from fe3d.case.schema import Case

__all__ = ["PlanMesh", "RefineZone", "build_mesh", "check_volumes", "extrude", "feature_points",
           "obtain_mesh", "plan_mesh"]

logger = logging.getLogger(__name__)

PLAN_TOLERANCE = 1e-9
"""Share of the plan's extent below which two plan points are one (a feature on a boundary
or an outline joins it)."""


@dataclass(frozen=True)
class RefineZone:
    """Plan points near which the cell size is ``size`` within ``radius``, growing linearly
    to the background size over four background cell sizes."""

    points: list[tuple[float, float]]
    size: float
    radius: float


@dataclass(frozen=True)
class PlanMesh:
    """A plan triangulation: nodes ``(2, n)``, triangles ``(3, m)``, named boundary edges
    (name → node pairs ``(2, k)``) and the node of every embedded point (by its key)."""

    xy: FloatArray
    tri: IndexArray
    edges: dict[str, IndexArray]
    point_nodes: dict[str, int]


def feature_points(case: Case) -> list[tuple[float, float]]:
    """Plan points (x, y) [m] where the mesh must be fine: source outlines, observation points
    and wells."""
    pts: list[tuple[float, float]] = []
    verts, names = case.outline()
    bx0, bx1 = min(v[0] for v in verts), max(v[0] for v in verts)
    by0, by1 = min(v[1] for v in verts), max(v[1] for v in verts)
    for s in case.sources:
        if s.points is not None:  # a point or line source: its vertices are plan nodes
            pts += [(px, py) for px, py, _ in s.points]
            continue
        x0, x1 = s.x if s.x is not None else (bx0, bx1)
        y0, y1 = s.y if s.y is not None else (by0, by1)
        corners = [(x0, y0), (x1, y0), (x1, y1), (x0, y1)]
        if s.shape == "face_patch" and s.face in names:
            # a patch on a lateral face: refine along its trace on that face
            which = [i for i, n in enumerate(names) if n == s.face]
            corners = [project_to_edges(c, verts, which) for c in corners]
        pts += corners
    pts += [(o.x, o.y) for o in case.observation_points]
    pts += [(w.x, w.y) for w in case.wells]
    return _unique(pts)


def _unique(pts: list[tuple[float, float]]) -> list[tuple[float, float]]:
    seen: set[tuple[float, float]] = set()
    out = []
    for p in pts:
        key = (round(p[0], 6), round(p[1], 6))
        if key not in seen:
            seen.add(key)
            out.append(p)
    return out


def _sample_polyline(points: list[tuple[float, float]], spacing: float,
                     ) -> list[tuple[float, float]]:
    out = [points[0]]
    for (ax, ay), (bx, by) in itertools.pairwise(points):
        k = max(1, math.ceil(math.hypot(bx - ax, by - ay) / spacing))
        out += [(ax + (bx - ax) * j / k, ay + (by - ay) * j / k) for j in range(1, k + 1)]
    return out


def plan_mesh(
    vertices: list[tuple[float, float]],
    edge_names: list[str],
    *,
    cell_size: float,
    zones: list[RefineZone],
    points: dict[str, tuple[float, float]],
    outlines: list[list[tuple[float, float]]] | None = None,
) -> PlanMesh:
    """Triangulate a plan polygon with gmsh (Frontal-Delaunay, size fields).

    Parameters
    ----------
    vertices, edge_names
        Counter-clockwise polygon [m] and the name of each edge (edge i: vertex i → i + 1).
    cell_size
        Background plan cell size [m].
    zones
        Refinement zones (minimum of their sizes applies).
    points
        Points that must be mesh nodes, by key (boreholes, wells, observation points, ...).
    outlines
        Closed polygons inside the boundary whose edges must be mesh edges (lens and source
        box outlines, :func:`fe3d.mesh.plan_lines.plan_outlines`: no two cross, and the
        ``points`` on their sides are among their vertices).
    """
    import gmsh

    xs, ys = [v[0] for v in vertices], [v[1] for v in vertices]
    scale = max(max(xs) - min(xs), max(ys) - min(ys))
    tol = PLAN_TOLERANCE * scale
    was_initialized = gmsh.isInitialized()
    if not was_initialized:
        gmsh.initialize(interruptible=False)
    try:
        gmsh.option.setNumber("General.Terminal", 0)
        gmsh.model.add("fe3d_plan")
        geo = gmsh.model.geo
        # points on the boundary become polygon vertices (their edge is split in two)
        nv0 = len(vertices)
        split: dict[int, list[tuple[float, tuple[float, float]]]] = {}
        for px, py in _unique(list(points.values())):
            if any(math.hypot(px - vx, py - vy) < tol for vx, vy in vertices):
                continue
            near = [distance_to_side((px, py), vertices[i], vertices[(i + 1) % nv0])
                    for i in range(nv0)]
            i = int(np.argmin([d for d, _ in near]))
            if near[i][0] < tol:
                split.setdefault(i, []).append((near[i][1], (px, py)))
        all_v: list[tuple[float, float]] = []
        for i in range(nv0):
            all_v.append(vertices[i])
            all_v += [p for _, p in sorted(split.get(i, []))]
        nv = len(all_v)
        placed: list[tuple[float, float, int]] = []

        def point(x: float, y: float) -> int:  # one geometry point per place
            for px, py, tag in placed:
                if math.hypot(px - x, py - y) < tol:
                    return tag
            placed.append((x, y, geo.addPoint(x, y, 0)))
            return placed[-1][2]

        corner = [point(x, y) for x, y in all_v]
        lines = [geo.addLine(corner[i], corner[(i + 1) % nv]) for i in range(nv)]
        surf = geo.addPlaneSurface([geo.addCurveLoop(lines)])
        inner_lines, on_lines = [], set(corner)
        for poly in outlines or []:
            pp = [point(x, y) for x, y in poly]
            on_lines.update(pp)
            inner_lines += [geo.addLine(pp[i], pp[(i + 1) % len(pp)]) for i in range(len(pp))]
        inner = [t for t in dict.fromkeys(point(px, py) for px, py in points.values())
                 if t not in on_lines]
        zone_tags = [[geo.addPoint(x, y, 0) for x, y in z.points] for z in zones]
        geo.synchronize()
        if inner:
            gmsh.model.mesh.embed(0, inner, 2, surf)
        if inner_lines:
            gmsh.model.mesh.embed(1, inner_lines, 2, surf)
        gmsh.option.setNumber("Mesh.MeshSizeExtendFromBoundary", 0)
        gmsh.option.setNumber("Mesh.MeshSizeFromPoints", 0)
        gmsh.option.setNumber("Mesh.MeshSizeFromCurvature", 0)
        gmsh.option.setNumber("Mesh.MeshSizeMax", cell_size)
        gmsh.option.setNumber("Mesh.Algorithm", 6)  # Frontal-Delaunay: well-shaped triangles
        field = gmsh.model.mesh.field
        thresholds = []
        for z, tags in zip(zones, zone_tags, strict=True):
            if not tags or z.size >= cell_size:
                continue
            dist = field.add("Distance")
            field.setNumbers(dist, "PointsList", tags)
            thr = field.add("Threshold")
            field.setNumber(thr, "InField", dist)
            # the case's fine sizes are upper bounds: gmsh's edges overshoot its size field by
            # up to ~20 % (measured), so it is asked for FINE_SIZE_MARGIN × the target
            field.setNumber(thr, "SizeMin", FINE_SIZE_MARGIN * z.size)
            field.setNumber(thr, "SizeMax", cell_size)
            field.setNumber(thr, "DistMin", z.radius)
            field.setNumber(thr, "DistMax", z.radius + 4.0 * cell_size)
            thresholds.append(thr)
        if thresholds:
            low = field.add("Min")
            field.setNumbers(low, "FieldsList", thresholds)
            field.setAsBackgroundMesh(low)
        try:
            gmsh.model.mesh.generate(2)
        except Exception as exc:  # gmsh raises bare Exceptions: one line naming the cause
            msg = (f"gmsh could not triangulate the plan view ({exc}); change mesh.cell_size "
                   "or mesh.fine_cell_size slightly, or move a feature off a boundary")
            raise MeshError(msg) from None
        gmsh.model.mesh.removeDuplicateNodes()
        tags, coords, _ = gmsh.model.mesh.getNodes()
        etypes, _, enodes = gmsh.model.mesh.getElements(2)
        if 2 not in list(etypes):
            msg = "gmsh produced no triangles for the plan view"
            raise MeshError(msg)
        tri_nodes = enodes[list(etypes).index(2)]
    finally:
        gmsh.model.remove()
        if not was_initialized:
            gmsh.finalize()
    index = np.full(int(tags.max()) + 1, -1, dtype=np.int64)
    index[tags.astype(np.int64)] = np.arange(tags.size)
    xy = coords.reshape(-1, 3)[:, :2].T.copy()
    tri = index[tri_nodes.astype(np.int64)].reshape(-1, 3).T
    used = np.unique(tri)
    if used.size != xy.shape[1]:  # drop orphan geometry points (refinement-zone points)
        remap = np.full(xy.shape[1], -1, dtype=np.int64)
        remap[used] = np.arange(used.size)
        xy, tri = xy[:, used], remap[tri]
    edges = _name_boundary_edges(xy, tri, vertices, edge_names, tol)
    from scipy.spatial import cKDTree

    tree = cKDTree(xy.T)
    point_nodes = {}
    for key, p in points.items():
        d, j = tree.query(p)
        if d > 1e3 * tol:
            msg = f"{key}: the point ({p[0]:g}, {p[1]:g}) m did not become a plan mesh node"
            raise MeshError(msg)
        point_nodes[key] = int(j)
    return PlanMesh(xy=xy, tri=tri, edges=edges, point_nodes=point_nodes)


def _name_boundary_edges(xy: FloatArray, tri: IndexArray, vertices: list[tuple[float, float]],
                         edge_names: list[str], tol: float) -> dict[str, IndexArray]:
    """Boundary edges of the plan triangulation grouped by the name of the polygon edge
    they lie on."""
    e = np.sort(np.hstack([tri[[0, 1]], tri[[1, 2]], tri[[0, 2]]]), axis=0)
    key, counts = np.unique(e, axis=1, return_counts=True)
    bnd = key[:, counts == 1]
    mid = 0.5 * (xy[:, bnd[0]] + xy[:, bnd[1]])  # (2, k)
    v = np.array(vertices, dtype=float)
    a, b = v, np.roll(v, -1, axis=0)  # (e, 2)
    ab = b - a
    rel = mid.T[:, None, :] - a[None]  # (k, e, 2)
    tt = np.clip(np.einsum("kej,ej->ke", rel, ab) / np.einsum("ej,ej->e", ab, ab), 0, 1)
    dist = np.linalg.norm(rel - tt[..., None] * ab[None], axis=2)
    which = np.argmin(dist, axis=1)
    if np.any(dist[np.arange(which.size), which] > 1e3 * tol):
        msg = "a plan boundary edge does not lie on the boundary polygon"
        raise MeshError(msg)
    names = np.array(edge_names)[which]
    return {n: bnd[:, names == n] for n in dict.fromkeys(edge_names)}


def extrude(
    xy: FloatArray,
    tri: IndexArray,
    z: FloatArray,
    layer_unit: IndexArray,
) -> tuple[FloatArray, IndexArray, IndexArray, IndexArray, IndexArray, IndexArray]:
    """Extrude a plan triangulation through level surfaces into tetrahedra.

    Parameters
    ----------
    xy
        Plan nodes [m], shape ``(2, n2)``.
    tri
        Plan triangles, shape ``(3, m2)``.
    z
        Elevation [m] of every level at every plan node, top down, shape ``(L, n2)``;
        non-increasing down each column. Equal consecutive values are merged into one node.
    layer_unit
        Unit index of the cells between level ``l`` and ``l + 1``, shape ``(L - 1,)``.

    Returns
    -------
    points, cells, cell_unit, cell_level, cell_tri, node_level
        Nodes ``(3, n)``; tetrahedra ``(4, m)``; unit, upper level and plan triangle of every
        cell; the (topmost) level of every node.
    """
    points, cells, cell_unit, cell_level, cell_tri, node_level, _plan = _extrude(
        xy, tri, z, layer_unit)
    return points, cells, cell_unit, cell_level, cell_tri, node_level


def _extrude(xy: FloatArray, tri: IndexArray, z: FloatArray, layer_unit: IndexArray,
             ) -> tuple[FloatArray, IndexArray, IndexArray, IndexArray, IndexArray, IndexArray,
                        IndexArray]:
    """:func:`extrude`, and the plan node of every node ``(n,)``."""
    n2 = xy.shape[1]
    n_levels = z.shape[0]
    own = np.arange(n_levels * n2, dtype=np.int64).reshape(n_levels, n2)
    canon = own.copy()
    for lv in range(1, n_levels):
        same = z[lv] == z[lv - 1]
        canon[lv] = np.where(same, canon[lv - 1], own[lv])
    # the split rule needs v0 < v1 < v2 (global plan order); compiled (fe3d/mesh/prisms.py)
    cells, unit, level, plan_tri = split_prisms(np.sort(tri, axis=0), canon, layer_unit)
    is_used = np.zeros(n_levels * n2, dtype=bool)
    is_used[cells.ravel()] = True
    used = np.flatnonzero(is_used)
    del is_used
    remap = np.full(n_levels * n2, -1, dtype=index_type(used.size))  # int32: remap[cells] too
    remap[used] = np.arange(used.size)
    lv_of, plan_of = np.divmod(used, n2)
    points = np.vstack([xy[:, plan_of], z[lv_of, plan_of][None]])
    return points, remap[cells], unit, level, plan_tri, lv_of.astype(np.int64), plan_of


def _node_areas(xy: FloatArray, tri: IndexArray) -> FloatArray:
    a, b, c = (xy[:, tri[i]] for i in range(3))
    area = 0.5 * np.abs((b[0] - a[0]) * (c[1] - a[1]) - (c[0] - a[0]) * (b[1] - a[1]))
    out = np.zeros(xy.shape[1])
    for i in range(3):
        np.add.at(out, tri[i], area / 3.0)
    return out


def _refine_zones(case: Case, corridor: Corridor | None) -> list[RefineZone]:
    mc = case.mesh
    zones = []
    feats = feature_points(case)
    if mc.fine_cell_size is not None and feats:
        zones.append(RefineZone(points=feats, size=mc.fine_cell_size,
                                radius=mc.fine_zone_radius))
    zones += _source_box_zones(case)
    for line in case.refinement_lines:
        zones.append(RefineZone(points=_sample_polyline(
            [(float(x), float(y)) for x, y in line.points], 0.5 * line.cell_size),
            size=line.cell_size, radius=line.radius))
    if corridor is not None:  # gmsh takes the smallest size: hand-set sizes stay where finer
        zones += [RefineZone(points=_sample_polyline(points, 0.5 * size), size=size,
                             radius=radius) for points, size, radius in corridor_zones(corridor)]
    return zones


def _source_box_zones(case: Case) -> list[RefineZone]:
    """One zone per source box (theory.md M6): plan cells of its shorter plan side divided
    by ``mesh.cells_across_source`` along its outline and over its inside, so that a box's
    load or held value reaches at most a cell beyond the box and that cell is a fraction
    of the box."""
    zones = []
    for src in case.sources:
        if src.shape != "box" or src.x is None or src.y is None:
            continue
        (x0, x1), (y0, y1) = src.x, src.y
        size = min(x1 - x0, y1 - y0) / case.mesh.cells_across_source
        outline = [(x0, y0), (x1, y0), (x1, y1), (x0, y1), (x0, y0)]
        zones.append(RefineZone(points=_sample_polyline(outline, 0.5 * size), size=size,
                                radius=0.5 * min(x1 - x0, y1 - y0)))
    return zones


def _embedded_points(case: Case) -> dict[str, tuple[float, float]]:
    pts: dict[str, tuple[float, float]] = {}
    for i, p in enumerate(feature_points(case)):
        pts[f"feature {i}"] = p
    if case.stratigraphy is not None:
        for b in case.stratigraphy.boreholes:
            pts[f"borehole {b.name}"] = (b.x, b.y)
    for w in case.wells:
        pts[f"well {w.name}"] = (w.x, w.y)
    return pts


def _sublayer_fractions(case: Case, surfaces: list[FloatArray], well_node: dict[str, int],
                        lens_levels: dict[int, list[float]],
                        corridor_dz: dict[str, float]) -> list[list[float]]:
    """Level fractions (0 = unit top, 1 = unit base) of every unit, with a level through
    each screen end at its well node and each lens top and bottom; a unit's cell layers are
    at most ``corridor_dz`` thick where the corridor asks [m] (not where ``sublayers`` is
    set)."""
    needs: dict[int, list[float]] = {k: list(v) for k, v in lens_levels.items()}
    for w in case.wells:
        j = well_node[w.name]
        ground, base = surfaces[0][j], surfaces[-1][j]
        for top, bot in w.screens:
            if top > ground + 1e-9 or bot < base - 1e-9:
                msg = (f"wells[{w.name}].screens = [{top:g}, {bot:g}] m lies outside the model at "
                       f"the well (ground {ground:.3f} m, base {base:.3f} m)")
                raise MeshError(msg)
            for ze in (top, bot):
                for k in range(len(case.layers)):
                    t, b = surfaces[k][j], surfaces[k + 1][j]
                    if t > b and b - 1e-9 <= ze <= t + 1e-9:
                        f = (t - ze) / (t - b)
                        if 1e-6 < f < 1 - 1e-6:
                            needs.setdefault(k, []).append(f)
                        break
    mc = case.mesh
    out = []
    for k, layer in enumerate(case.layers):
        thick = float((surfaces[k] - surfaces[k + 1]).max())
        if layer.sublayers is not None:
            n = layer.sublayers
        else:
            dz = min(layer.cell_thickness or mc.layer_cell_thickness,
                     corridor_dz.get(layer.name, math.inf))
            n = max(1, math.ceil(thick / dz - 1e-9))
        fr = [j / n for j in range(n + 1)]
        claimed: set[int] = set()
        for f in sorted(set(needs.get(k, []))):
            free = [i for i in range(1, n) if i not in claimed]
            if free:
                i = min(free, key=lambda i: abs(fr[i] - f))
                if abs(fr[i] - f) <= 0.5 / n:
                    fr[i] = f
                    claimed.add(i)
                    continue
            fr.append(f)
        out.append(sorted(set(fr)))
    return out


def build_mesh(case: Case, *, corridor: Corridor | None = None) -> SiteMesh:
    """Mesh the case's plan boundary and units, refined near sources, wells, observation
    points, refinement lines and along the plume ``corridor`` (from
    :func:`fe3d.mesh.corridor.site_corridor`; its plan sizes and cell layers apply where
    finer than the case's own); boreholes and wells are plan nodes.

    Raises
    ------
    MeshError
        On inverted or zero-volume cells, a screen outside the model, too few picks for the
        interpolation, a model thinner than the minimum thickness, or a gmsh failure.
    """
    if case.mesh.import_file is not None:
        return _imported(case)
    verts, names = case.outline()
    mc = case.mesh
    lens_polys = [[(float(x), float(y)) for x, y in lens.polygon] for lens in case.lenses]
    boxes = _source_boxes(case)
    points = _embedded_points(case)
    scale = max(np.ptp([v[0] for v in verts]), np.ptp([v[1] for v in verts]))
    outlines = plan_outlines(lens_polys, {name: [(x0, y0), (x1, y0), (x1, y1), (x0, y1)]
                                          for name, ((x0, x1), (y0, y1), _) in boxes.items()},
                             list(points.values()), PLAN_TOLERANCE * scale)
    for line in outlines.left_out:
        logger.warning("%s", line)
    plan = plan_mesh(verts, names, cell_size=mc.cell_size, zones=_refine_zones(case, corridor),
                     points=points, outlines=outlines.polygons)
    xy, tri = plan.xy, plan.tri
    node_area = _node_areas(xy, tri)
    boreholes = {k.split(" ", 1)[1]: v for k, v in plan.point_nodes.items()
                 if k.startswith("borehole ")}
    surfaces, applied = unit_surfaces(case, xy, node_area, boreholes)
    well_node = {k.split(" ", 1)[1]: v for k, v in plan.point_nodes.items()
                 if k.startswith("well ")}
    lens_in, lens_levels = _lens_nodes(case, xy, tri, surfaces)
    box_levels = _box_levels(boxes, xy, surfaces)
    for level in box_levels:
        lens_levels.setdefault(level.unit, []).append(level.fraction)
    fractions = _sublayer_fractions(case, surfaces, well_node, lens_levels,
                                    {} if corridor is None else corridor.layer_thickness)
    z_rows, layer_unit, level_frac = [surfaces[0]], [], []
    for k, fr in enumerate(fractions):
        top, bot = surfaces[k], surfaces[k + 1]
        for f in fr[1:]:
            z_rows.append(bot.copy() if f == 1.0 else top + (bot - top) * f)
            layer_unit.append(k)
            level_frac.append((k, f))
    z = _fit_boxes(np.array(z_rows), level_frac, box_levels)
    z, lens_notes = _fit_lenses(case, z, layer_unit, level_frac, surfaces, lens_in,
                                node_area)
    for note in lens_notes:
        logger.warning("%s", note.line)
    points, cells, cell_unit, cell_level, cell_tri, node_level, plan_of = _extrude(
        xy, tri, z, np.array(layer_unit, dtype=np.int64))
    cell_unit = _tag_lenses(case, xy, tri, z, layer_unit, level_frac, cell_unit, cell_level,
                            cell_tri, surfaces, lens_in)
    del cell_level, cell_tri
    # renumber nodes by reverse Cuthill-McKee: 2-4x faster sparse products (SOLVER-NOTES)
    n = points.shape[1]
    perm = reverse_cuthill_mckee(node_graph(cells, n), symmetric_mode=True)
    inv = np.empty_like(perm)
    inv[perm] = np.arange(n)
    points, node_level, plan_of = points[:, perm], node_level[perm], plan_of[perm]
    del perm
    # cells renumbered and in the order of their lowest node: an assembly pass over the
    # cells then writes near where it last wrote (at 5.9 M cells in extrusion order the
    # random writes made assembly several times slower, docs/performance.md)
    corder = order_by_lowest_node(cells, n, inv)
    cells, cell_unit = orient_positive(points, cells, corder, inv), cell_unit[corder]
    del corder, inv
    base_z = surfaces[-1]
    unit_names = tuple([ly.name for ly in case.layers] + [ls.name for ls in case.lenses])
    faces = _classify_faces(points, cells, node_level, plan_of, base_z, plan.edges)
    bare = SiteMesh(points=points, cells=cells, cell_layer=cell_unit, layer_names=unit_names,
                    faces=faces)
    check_volumes(bare)
    report = MeshReport(
        quality=quality_report(bare), origin="built",
        sublayers={ly.name: len(fr) - 1 for ly, fr in zip(case.layers, fractions, strict=True)},
        surface_rules=tuple(applied), lens_fits=tuple(lens_notes),
        plan=PlanLayout(xy=xy, tri=tri, surfaces=np.array(surfaces),
                        borehole_nodes=boreholes, well_nodes=well_node),
        corridor=corridor)
    site = replace(bare, report=report)
    logger.info("mesh: %d nodes, %d tetrahedra", site.n_nodes, site.n_cells)
    return site


def _imported(case: Case) -> SiteMesh:
    """Read ``mesh.import_file`` and check its units and faces against the case.

    Unit tags must name (or number) the case's layers and lenses. Faces come from the file's
    tagged triangles, which must then include every face of the case; a file without tagged
    triangles gets its faces from the case's boundary outline (:func:`faces_from_outline`).
    """
    from fe3d.mesh.io import faces_from_outline, read_site_mesh

    assert case.mesh.import_file is not None
    where = f"mesh.import_file = {case.mesh.import_file!r}"
    units = [ly.name for ly in case.layers] + [ls.name for ls in case.lenses]
    site = read_site_mesh(Path(case.mesh.import_file), key="mesh.import_file",
                          unit_names=units)
    unknown = [u for u in site.layer_names if u not in units]
    if unknown:
        msg = (f"{where}: unit tag {unknown[0]!r} of the mesh names no layer or lens of the "
               f"case ({units})")
        raise MeshError(msg)
    # unit index in case order, so materials follow the case's layers and lenses
    order = np.array([units.index(u) for u in site.layer_names], dtype=np.int64)
    needed = case.face_names()
    faces = site.faces
    if not faces:
        verts, names = case.outline()
        faces = faces_from_outline(site.points, site.cells, verts, names, where=where)
    missing = [f for f in needed if f not in faces]
    if missing:
        msg = (f"{where}: the mesh has no boundary face {missing[0]!r} (its tagged faces: "
               f"{sorted(faces)}; the case needs {needed})")
        raise MeshError(msg)
    site = replace(site, cell_layer=order[site.cell_layer], layer_names=tuple(units),
                   faces={**{f: faces[f] for f in needed}, **faces})
    check_volumes(site)
    assert site.report is not None  # read_site_mesh measured the shapes; units renamed here
    vol = site.cell_volumes()
    quality = replace(site.report.quality, volume_per_unit_m3={
        name: float(vol[site.cell_layer == i].sum()) for i, name in enumerate(units)})
    return replace(site, report=replace(site.report, quality=quality))


def obtain_mesh(case: Case, folders: list[Path], *, save_to: Path | None = None,
                corridor: Corridor | None = None) -> tuple[SiteMesh, bool]:
    """The case's mesh (refined along ``corridor``, see :func:`build_mesh`): reused from the
    first folder holding a cached mesh built from the same mesh inputs and corridor (hash),
    else built. Returns (mesh, reused).

    ``save_to`` always ends up holding the mesh cache (``mesh.npz`` and ``mesh.json``): a
    newly built mesh is saved there, and a mesh reused from another folder is copied there
    byte for byte, so that folder is complete on its own.
    """
    import shutil

    from fe3d.mesh.io import load_cached, mesh_inputs_hash, save_cached

    digest = mesh_inputs_hash(case)
    if corridor is not None:  # the corridor is rounded (Corridor docs): reruns give one key
        import hashlib
        import json

        text = json.dumps(corridor.as_dict(), sort_keys=True, separators=(",", ":"))
        digest = hashlib.sha256((digest + text).encode("utf-8")).hexdigest()
    if case.mesh.import_file is None:
        for folder in folders:
            site = load_cached(folder, digest)
            if site is None:
                continue
            if save_to is not None and not _same_folder(folder, save_to):
                save_to.mkdir(parents=True, exist_ok=True)
                for name in ("mesh.npz", "mesh.json"):
                    tmp = save_to / f"{name}.part"
                    shutil.copyfile(folder / name, tmp)
                    tmp.replace(save_to / name)
            logger.info("mesh reused from %s (mesh inputs unchanged)", folder)
            return site, True
    site = build_mesh(case, corridor=corridor)
    if save_to is not None:
        save_cached(site, save_to, digest)
    return site, False


def _same_folder(a: Path, b: Path) -> bool:
    try:
        return a.resolve() == b.resolve()
    except OSError:
        return False


def check_volumes(site: SiteMesh) -> None:
    """Stop with a clear message if any cell has zero or negative volume."""
    vol = site.cell_volumes()
    scale = float(np.ptp(site.points, axis=1).max()) ** 3
    bad = vol <= 1e-14 * scale
    if np.any(bad):
        i = int(np.argmin(vol))
        c = site.points[:, site.cells[:, i]].mean(axis=1)
        msg = (f"{int(bad.sum())} cells have zero or negative volume; the worst "
               f"({vol[i]:.3g} m³, unit {site.layer_names[site.cell_layer[i]]!r}) is near "
               f"x={c[0]:.2f} m, y={c[1]:.2f} m, z={c[2]:.2f} m")
        raise MeshError(msg)


def _classify_faces(points: FloatArray, cells: IndexArray, node_level: IndexArray,
                    plan_of: IndexArray, base_z: FloatArray, edges: dict[str, IndexArray],
                    ) -> dict[str, IndexArray]:
    """Boundary triangles by face: vertical ones by the named plan edge under them, the rest
    top (every node on the ground) or bottom (every node on the model base). ``plan_of`` is
    the plan node of every mesh node."""
    tri = boundary_triangles(cells, points.shape[1])
    pn = plan_of[tri]
    s = np.sort(pn, axis=0)
    vertical = (s[0] == s[1]) | (s[1] == s[2])
    on_top = np.all(node_level[tri] == 0, axis=0) & ~vertical
    on_base = np.all(points[2, tri] == base_z[pn], axis=0) & ~vertical & ~on_top
    out: dict[str, IndexArray] = {}
    n2 = np.int64(base_z.size)
    # plan edge of each vertical triangle: its two distinct plan nodes
    lo = s[0]
    hi = np.where(s[2] != s[0], s[2], s[1])
    code = lo * n2 + hi
    assigned = on_top | on_base
    for name, e in edges.items():
        ec = np.sort(e, axis=0)
        m = vertical & np.isin(code, ec[0] * n2 + ec[1])
        out[name] = tri[:, m]
        assigned |= m
    out["top"] = tri[:, on_top]
    out["bottom"] = tri[:, on_base]
    if not assigned.all():
        msg = f"{int((~assigned).sum())} boundary triangles belong to no named face"
        raise MeshError(msg)
    return out


def _source_boxes(case: Case) -> dict[str, tuple[tuple[float, float], ...]]:
    """The (x, y, z) ranges [m] of the source boxes that lie inside the plan outline, by
    source name: their plan sides become mesh edges (:func:`plan_outlines`) and cell levels
    go through their top and base (:func:`_box_levels`), so that a held box is the size it
    is (theory.md M5)."""
    from fe3d.case.geology import point_in_polygon

    verts = case.outline()[0]
    out = {}
    for s in case.sources:
        if s.shape != "box" or s.x is None or s.y is None or s.z is None:
            continue
        (x0, x1), (y0, y1) = s.x, s.y
        e = 1e-3  # [m]: a box touching the outline is left as it is
        corners = ((x0 - e, y0 - e), (x1 + e, y0 - e), (x1 + e, y1 + e), (x0 - e, y1 + e))
        if x1 > x0 and y1 > y0 and all(point_in_polygon(x, y, verts, tol=0.0)
                                       for x, y in corners):
            out[s.name] = (s.x, s.y, s.z)
    return out


@dataclass(frozen=True)
class BoxLevel:
    """A cell level through a source box's top or base: the unit and level fraction it
    takes (at the mean over the plan nodes ``inside`` the box), and the elevation [m] the
    level is moved to at those nodes."""

    unit: int
    fraction: float
    elevation: float
    inside: np.ndarray


def _box_levels(boxes: dict[str, tuple[tuple[float, float], ...]], xy: FloatArray,
                surfaces: list[FloatArray]) -> list[BoxLevel]:
    """The cell levels through each box's top and base (:class:`BoxLevel`)."""
    needs: list[BoxLevel] = []
    for (x0, x1), (y0, y1), zs in boxes.values():
        inside = (xy[0] >= x0 - 1e-9) & (xy[0] <= x1 + 1e-9) & (xy[1] >= y0 - 1e-9) & \
            (xy[1] <= y1 + 1e-9)
        if not inside.any():
            continue
        for ze in zs:
            for k in range(len(surfaces) - 1):
                t, b = surfaces[k][inside], surfaces[k + 1][inside]
                live = t > b
                if live.any() and np.all((b[live] - 1e-9 <= ze) & (ze <= t[live] + 1e-9)):
                    f = float(np.mean((t[live] - ze) / (t[live] - b[live])))
                    if 1e-6 < f < 1 - 1e-6:
                        needs.append(BoxLevel(k, f, float(ze), inside))
                    break
    return needs


def _fit_boxes(z: FloatArray, level_frac: list[tuple[int, float]],
               levels: list[BoxLevel]) -> FloatArray:
    """Move each box level to the box's own elevation at the plan nodes inside it, where
    that keeps the levels above and below in order (row i + 1 of ``z`` is level i)."""
    for lv in levels:
        if (lv.unit, lv.fraction) not in level_frac:
            continue
        r = level_frac.index((lv.unit, lv.fraction)) + 1
        ok = lv.inside & (z[r - 1] > lv.elevation)
        if r + 1 < z.shape[0]:
            ok &= z[r + 1] < lv.elevation
        z[r, ok] = lv.elevation
    return z


def _lens_nodes(case: Case, xy: FloatArray, tri: IndexArray, surfaces: list[FloatArray],
                ) -> tuple[list[np.ndarray], dict[int, list[float]]]:
    """Plan nodes inside (or on) each lens outline and the host-unit level fractions its top
    and bottom need (taken at the mean over those nodes)."""

    units = [ly.name for ly in case.layers]
    masks, needs = [], {}
    for lens in case.lenses:
        poly = [(float(x), float(y)) for x, y in lens.polygon]
        tol = 1e-7 * max(1.0, float(np.ptp(xy, axis=1).max()))
        m = points_in_polygon(xy, poly, tol=tol)
        if not m.any():
            msg = f"lenses[{lens.name}].polygon contains no plan mesh node"
            raise MeshError(msg)
        k = units.index(lens.host)
        t, b = surfaces[k][m], surfaces[k + 1][m]
        live = t > b
        if not live.any():
            msg = f"lenses[{lens.name}]: the host unit {lens.host!r} is absent under the lens"
            raise MeshError(msg)
        ft = float(np.mean(np.clip((t[live] - lens.top) / (t[live] - b[live]), 0, 1)))
        fb = float(np.mean(np.clip((t[live] - lens.bottom) / (t[live] - b[live]), 0, 1)))
        for f in (ft, fb):
            if 0.02 < f < 0.98:
                needs.setdefault(k, []).append(f)
        masks.append(m)
    return masks, needs


def _host_rows(layer_unit: list[int], k: int) -> tuple[int, int]:
    rows = [i for i, u in enumerate(layer_unit) if u == k]
    return rows[0], rows[-1] + 1


def _lens_rows(case: Case, li: int, z: FloatArray, layer_unit: list[int],
               level_frac: list[tuple[int, float]], surfaces: list[FloatArray],
               mask: np.ndarray) -> tuple[int, int, int, int, float, float]:
    lens = case.lenses[li]
    k = [ly.name for ly in case.layers].index(lens.host)
    r0, r1 = _host_rows(layer_unit, k)
    t, b = surfaces[k][mask], surfaces[k + 1][mask]
    live = t > b
    ft = float(np.mean(np.clip((t[live] - lens.top) / (t[live] - b[live]), 0, 1)))
    fb = float(np.mean(np.clip((t[live] - lens.bottom) / (t[live] - b[live]), 0, 1)))
    fr = [0.0] + [level_frac[i][1] for i in range(r0, r1)]

    def row(f: float, lo: int, hi: int) -> int:
        if f <= 0.02:
            return r0
        if f >= 0.98:
            return r1
        return r0 + min(range(lo, hi + 1), key=lambda i: abs(fr[i] - f))

    rt = row(ft, 0, r1 - r0)
    rb = max(row(fb, rt - r0, r1 - r0), rt + 1)
    return k, r0, r1, rt, min(rb, r1), 0.0


def _fit_lenses(case: Case, z: FloatArray, layer_unit: list[int],
                level_frac: list[tuple[int, float]], surfaces: list[FloatArray],
                lens_in: list[np.ndarray], node_area: FloatArray,
                ) -> tuple[FloatArray, list[LensFit]]:
    """Move the host-unit levels at the lens nodes so that two levels follow the lens top and
    bottom (clipped to the host unit); levels in between are spread linearly.

    Returns the levels and one record per lens side that does not lie where the case puts
    it (clipped to the host unit, or snapped to the host's top or base), for the report.
    """
    z = z.copy()
    notes: list[LensFit] = []
    for li, mask in enumerate(lens_in):
        lens = case.lenses[li]
        k, r0, r1, rt, rb, _ = _lens_rows(case, li, z, layer_unit, level_frac, surfaces, mask)
        top, bot = z[r0, mask], z[r1, mask]
        zt = np.clip(lens.top, bot, top) if rt != r0 else top
        zb = np.clip(lens.bottom, bot, zt) if rb != r1 else bot
        anchors = [(r0, top), (rt, zt), (rb, zb), (r1, bot)]
        for (ra, za), (rb_, zb_) in itertools.pairwise(anchors):
            for r in range(ra + 1, rb_):
                w = (r - ra) / (rb_ - ra)
                z[r, mask] = za + (zb_ - za) * w
        if rt != r0:
            z[rt, mask] = zt
        if rb != r1:
            z[rb, mask] = zb
        live = top > bot  # where the host is absent the lens is absent too
        for side, want, got in (("top", lens.top, zt), ("bottom", lens.bottom, zb)):
            shift = np.where(live, np.abs(np.asarray(got) - want), 0.0)
            outside = live & ((want > top + 1e-6) | (want < bot - 1e-6))
            snapped = live & ~outside & (shift > 1e-6)
            if outside.any() or snapped.any() or not live.all():
                notes.append(_lens_note(lens.name, lens.host, side, float(want),
                                        np.nonzero(mask)[0], outside, snapped, shift, live,
                                        node_area))
        del k
    return z, notes


def _lens_note(name: str, host: str, side: str, want: float, idx: IndexArray,
               outside: np.ndarray, snapped: np.ndarray, shift: FloatArray, live: np.ndarray,
               node_area: FloatArray) -> LensFit:
    """One report record of a lens side that does not lie where the case puts it."""
    parts = []
    if outside.any():
        parts.append(f"lies outside its host unit {host!r} at {int(outside.sum())} of "
                     f"{idx.size} plan nodes inside its outline and is clipped to the host "
                     "there")
    if snapped.any():
        parts.append(f"is snapped to the host's {'top' if side == 'top' else 'base'} at "
                     f"{int(snapped.sum())} nodes (within 2 % of the host's thickness)")
    if not live.all():
        parts.append(f"the host is absent at {int((~live).sum())} of the {idx.size} nodes "
                     "(no lens there)")
    text = (f"lens {name!r} {side} ({want:g} m): " + "; ".join(parts)
            + f"; moved by up to {float(shift.max()):.3g} m")
    where = idx[outside | snapped | ~live]
    return LensFit(lens=name, host=host, side="top" if side == "top" else "bottom",
                   n_clipped=int(outside.sum()), n_snapped=int(snapped.sum()),
                   n_host_absent=int((~live).sum()), n_lens_nodes=int(idx.size),
                   max_shift_m=float(shift.max()), area_m2=float(node_area[where].sum()),
                   line=text)


def _tag_lenses(case: Case, xy: FloatArray, tri: IndexArray, z: FloatArray,
                layer_unit: list[int], level_frac: list[tuple[int, float]],
                cell_unit: IndexArray, cell_level: IndexArray, cell_tri: IndexArray,
                surfaces: list[FloatArray], lens_in: list[np.ndarray]) -> IndexArray:
    """Give the lens's unit index to host cells inside its outline and between its levels."""

    out = cell_unit.copy()
    n_layers = len(case.layers)
    centre = xy[:, tri].mean(axis=1)  # (2, m2)
    for li, mask in enumerate(lens_in):
        lens = case.lenses[li]
        poly = [(float(x), float(y)) for x, y in lens.polygon]
        inside = points_in_polygon(centre, poly, tol=0.0)
        k, _r0, _r1, rt, rb, _ = _lens_rows(case, li, z, layer_unit, level_frac, surfaces,
                                           mask)
        sel = (cell_unit == k) & inside[cell_tri] & (cell_level >= rt) & (cell_level < rb)
        if not sel.any():
            msg = f"lenses[{lens.name}] holds no cell; make the mesh finer or the lens larger"
            raise MeshError(msg)
        out[sel] = n_layers + li
    return out
