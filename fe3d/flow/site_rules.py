"""Rules of a case that depend on its mesh, checked against the mesh: one
:class:`~fe3d.errors.CaseError` per problem, naming the key, the value and what is allowed.

The flow solve applies the rules on its items (:func:`head_dependent_problems`,
:func:`recharge_problems`, :func:`screened_unit_problems`); :func:`mesh_rule_problems`
gathers every rule, those of the sources and observation points too, so that
``fe3d check`` reports them before a run meets them (:func:`check_mesh_rules`).
"""

from __future__ import annotations

import itertools
import math
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from fe3d._typing import BoolArray, FloatArray, IndexArray
from fe3d.errors import CaseError, CaseErrors, MeshError
from fe3d.flow.boundaries import in_polygon
from fe3d.mesh.locate import locate_points, sample_operator, screen_points
from fe3d.mesh.site_mesh import SiteMesh

if TYPE_CHECKING:
    from fe3d.case.hydro import HeadDependent, Recharge, Well
    from fe3d.case.schema import Case, ObservationPoint, Source
    from fe3d.mesh.corridor import Corridor

__all__ = ["check_mesh_rules", "head_dependent_problems", "line_sample_points",
           "mesh_rule_problems", "patch_triangles", "recharge_mask", "recharge_problems",
           "screened_unit_problems", "source_nodes", "zone_mask"]


def zone_mask(site: SiteMesh, hd: HeadDependent) -> BoolArray:
    """Triangles of the head-dependent item's face whose centre lies in its zone (all of
    them without a zone), shape ``(n_facets,)``."""
    tri = site.faces[hd.face]
    if hd.zone is None:
        return np.ones(tri.shape[1], dtype=bool)
    cen = site.points[:, tri].mean(axis=1)
    return in_polygon(cen[0], cen[1], hd.zone)


def head_dependent_problems(site: SiteMesh, hd: HeadDependent) -> list[CaseError]:
    """The zone must cover a triangle of its face, and the stage must not lie below the
    bottom of the top cells under the zone (on the top face) or below the zone's lowest
    point (on another face): a stage lower than that would drain cells that hold no water
    above it in a confined model."""
    key = f"head_dependent[{hd.name}]"
    if hd.face not in site.faces:
        return [CaseError(f"{key}.face", hd.face, f"must be one of the faces {list(site.faces)}")]
    tri = site.faces[hd.face]
    mask = zone_mask(site, hd)
    if not mask.any():
        return [CaseError(f"{key}.zone", "(polygon)",
                          f"must cover at least one triangle of the face {hd.face!r}")]
    if hd.face == "top":
        floor, where = _top_cell_bottom(site, tri[:, mask]), \
            "the bottom of the top cells under the zone"
    else:
        floor, where = float(site.points[2, tri[:, mask]].min()), \
            "the lowest point of the zone on its face"
    if hd.stage < floor:
        return [CaseError(f"{key}.stage", f"{hd.stage:g} m",
                          f"must not lie below {where} ({floor:.3g} m)")]
    return []


def _top_cell_bottom(site: SiteMesh, tri: IndexArray) -> float:
    """Highest bottom elevation [m] of the cells under the given top triangles."""
    z = site.points[2]
    is_top = np.zeros(site.n_nodes, dtype=bool)
    is_top[np.unique(tri)] = True
    touching = np.any(is_top[site.cells], axis=0)
    return float(np.max(z[site.cells[:, touching]].min(axis=0)))


def recharge_mask(site: SiteMesh, rc: Recharge) -> BoolArray | None:
    """Top triangles whose centre lies in the recharge zone (``None``: the whole top)."""
    if rc.zone is None:
        return None
    top = site.faces["top"]
    cen = site.points[:, top].mean(axis=1)
    return in_polygon(cen[0], cen[1], rc.zone)


def recharge_problems(site: SiteMesh, rc: Recharge) -> list[CaseError]:
    """A recharge zone must cover at least one top face of the mesh."""
    mask = recharge_mask(site, rc)
    if mask is not None and not mask.any():
        return [CaseError(f"recharge[{rc.name}].zone", "(polygon)",
                          "must cover at least one top face of the mesh")]
    return []


def screened_unit_problems(site: SiteMesh, well: Well,
                           screen_cells: IndexArray) -> list[CaseError]:
    """Every screen sample must lie in the well's named unit (theory.md F7)."""
    key = f"wells[{well.name}].unit"
    if well.unit is None:
        return []
    if well.unit not in site.layer_names:
        return [CaseError(key, well.unit, f"must be one of the units: {list(site.layer_names)}")]
    u = site.layer_names.index(well.unit)
    found = site.cell_layer[screen_cells]
    if np.all(found == u):
        return []
    # is the unit present at all in the column under the well?
    col = np.nonzero(np.hypot(site.points[0] - well.x, site.points[1] - well.y) < 1e-6)[0]
    present = False
    if col.size >= 2:
        z = np.sort(site.points[2, col])
        mid = 0.5 * (z[1:] + z[:-1])
        pts = np.vstack([np.full(mid.size, well.x), np.full(mid.size, well.y), mid])
        _, cells = sample_operator(site.points, site.cells, pts)
        present = bool(np.any(site.cell_layer[cells] == u))
    if not present:
        return [CaseError(key, well.unit, "this unit is pinched out (absent) at the well; "
                          "screen another unit")]
    others = sorted({site.layer_names[i] for i in np.unique(found) if i != u})
    return [CaseError(key, well.unit, f"the screens also reach {others}; keep them inside "
                      f"{well.unit!r} at the well")]


def source_nodes(site: SiteMesh, src: Source) -> IndexArray:
    """Mesh nodes inside a box source or on a face patch (its ranges, inclusive to 1e-9 of
    their width); empty when the mesh has none there."""
    p = site.points
    cand = site.face_nodes(src.face) if src.shape == "face_patch" and src.face is not None \
        else np.arange(site.n_nodes)
    keep = np.ones(cand.size, dtype=bool)
    for axis, rng in enumerate((src.x, src.y, src.z)):
        if rng is not None:
            tol = 1e-9 * max(1.0, abs(rng[1] - rng[0]))
            keep &= (p[axis, cand] >= rng[0] - tol) & (p[axis, cand] <= rng[1] + tol)
    return cand[keep]


def patch_triangles(site: SiteMesh, src: Source) -> BoolArray:
    """Triangles of a face patch's face whose centre lies in its x, y and z ranges, shape
    ``(n_facets,)``."""
    assert src.face is not None
    tri = site.faces[src.face]
    mid = site.points[:, tri].mean(axis=1)
    keep = np.ones(tri.shape[1], dtype=bool)
    for axis, rng in enumerate((src.x, src.y, src.z)):
        if rng is not None:
            keep &= (mid[axis] >= rng[0]) & (mid[axis] <= rng[1])
    return keep


def line_sample_points(points: list[tuple[float, float, float]], spacing: float,
                       ) -> tuple[FloatArray, FloatArray]:
    """Sample points ``(3, k)`` [m] and their lengths ``(k,)`` [m] of a point source (the
    point, length 1) or a polyline (midpoints of sub-segments no longer than ``spacing``)."""
    p = np.array(points, dtype=float).T
    if p.shape[1] == 1:
        return p, np.ones(1)
    chunks, lens = [], []
    for a, b in itertools.pairwise(p.T):
        seg = float(np.linalg.norm(b - a))
        k = max(1, math.ceil(seg / spacing))
        f = (np.arange(k) + 0.5) / k
        chunks.append(a[:, None] + (b - a)[:, None] * f)
        lens.append(np.full(k, seg / k))
    return np.hstack(chunks), np.concatenate(lens)


def _outside(site: SiteMesh, xs: FloatArray) -> bool:
    try:
        locate_points(site.points, site.cells, xs)
    except MeshError:
        return True
    return False


def _source_problems(site: SiteMesh, src: Source, spacing: float) -> list[CaseError]:
    key = f"sources[{src.name}]"
    if src.points is not None:
        xs, _ = line_sample_points(src.points, spacing)
        if _outside(site, xs):
            return [CaseError(f"{key}.points", src.points, "must lie inside the model's "
                              "mesh (a point is outside every cell)")]
        return []
    if source_nodes(site, src).size == 0:
        ranges = ", ".join(f"{n} {list(r)} m" for n, r in zip("xyz", (src.x, src.y, src.z),
                                                                strict=True) if r is not None)
        return [CaseError(key, f"{src.shape}: {ranges or 'no ranges'}",
                          "must contain at least one mesh node; enlarge it or set a smaller "
                          "mesh.fine_cell_size / mesh.layer_cell_thickness")]
    if src.kind == "inflow_concentration" and src.face is not None \
            and not patch_triangles(site, src).any():
        return [CaseError(f"{key}.face", src.face, "must have at least one mesh triangle "
                          "whose centre lies in the source's x, y and z ranges")]
    return []


def _observation_problems(site: SiteMesh, o: ObservationPoint,
                          spacing: float) -> list[CaseError]:
    if o.screen is not None:
        xs = screen_points(o.x, o.y, o.screen[0], o.screen[1], spacing=spacing)
        value: object = list(o.screen)
        field = "screen"
    else:
        xs = np.array([[o.x], [o.y], [o.z if o.z is not None else np.nan]])
        value, field = o.z, "z"
    if _outside(site, xs):
        return [CaseError(f"observation_points[{o.name}].{field}", value,
                          f"must lie inside the model's mesh at x = {o.x:g} m, "
                          f"y = {o.y:g} m (between its base and top there)")]
    return []


def _well_problems(site: SiteMesh, well: Well, spacing: float) -> list[CaseError]:
    for i, (top, bottom) in enumerate(well.screens):
        if _outside(site, screen_points(well.x, well.y, top, bottom, spacing=spacing)):
            return [CaseError(f"wells[{well.name}].screens[{i}]", [top, bottom],
                              "must lie inside the model's mesh at the well (between its "
                              "base and top there)")]
    pts = np.hstack([screen_points(well.x, well.y, t, b, spacing=spacing)
                     for t, b in well.screens])
    cells, _ = locate_points(site.points, site.cells, pts)
    return screened_unit_problems(site, well, cells)


def mesh_rule_problems(case: Case, site: SiteMesh) -> list[CaseError]:
    """Every rule of the case that depends on its mesh: head-dependent stages and zones,
    recharge zones, well screens (inside the mesh, in their named unit), sources (a node
    inside, a face triangle in an inflow patch, points inside the mesh) and observation
    points (inside the mesh)."""
    spacing = case.mesh.sample_spacing
    problems: list[CaseError] = []
    for hd in case.head_dependent:
        problems += head_dependent_problems(site, hd)
    for rc in case.recharge:
        problems += recharge_problems(site, rc)
    for well in case.wells:
        problems += _well_problems(site, well, spacing)
    for src in case.sources:
        problems += _source_problems(site, src, spacing)
    for o in case.observation_points:
        problems += _observation_problems(site, o, spacing)
    return problems


def check_mesh_rules(case: Case, folders: list[Path], *,
                     corridor: Corridor | None = None) -> SiteMesh:
    """The case's mesh (refined along ``corridor`` when given; reused from the first of
    ``folders`` holding it in the mesh cache, else built in memory; nothing is written),
    checked by :func:`mesh_rule_problems`.

    Raises
    ------
    CaseErrors
        One line per broken rule.
    MeshError
        When the mesh cannot be built (its message names the key).
    """
    from fe3d.mesh.build import obtain_mesh

    site, _ = obtain_mesh(case, folders, corridor=corridor)
    problems = mesh_rule_problems(case, site)
    if problems:
        raise CaseErrors(problems)
    return site
