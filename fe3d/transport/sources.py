"""Where and how strongly the sources act on the mesh (theory.md T3a–T3f), built once.

:class:`SourceGeometry` holds, per source, the nodes a fixed concentration holds and the
share of the source strength each is held at, the nodal weights of inflow patches and mass
loadings, and per species the load of injection wells; :meth:`SourceGeometry.held` and
:meth:`SourceGeometry.load` turn them into the held values and the nodal load of one step.
:func:`initial_fields` gives the fields at t = 0.

A face patch is weighted by the part of each face triangle inside it (T3a):
:func:`clip_polygon` (Sutherland–Hodgman clipping against the patch's ranges) gives the
exact part, and :func:`patch_integrals` the integrals ∫_P φ_i dA of the nodal basis
functions over the patch, so that the held values and the inflow weights carry the patch's
real area whether or not the mesh follows its outline.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from fe3d._typing import FloatArray, IndexArray
from fe3d.case.parts import TransportInputs
from fe3d.case.schema import Source
from fe3d.errors import MeshError
from fe3d.flow.site_rules import line_sample_points, patch_triangles, source_nodes
from fe3d.flow.solve import FlowField
from fe3d.mesh.locate import CellFinder, locate_points
from fe3d.mesh.site_mesh import SiteMesh
from fe3d.p1 import BoundaryFacets

__all__ = ["HeldValues", "SourceGeometry", "box_shares", "build_source_geometry",
           "clip_polygon", "initial_fields", "patch_integrals", "patch_shares"]

# A node is held when its share of the patch exceeds this: shares are ratios of areas
# computed to round-off (~1e-16 relative), so anything smaller is a triangle that only
# touches the outline along an edge or at a corner.
SHARE_FLOOR = 1e-12


@dataclass(frozen=True)
class HeldValues:
    """Fixed concentrations of one species over one step: the active sources' names, and
    the nodal values [kg/m³] at the step's start and end (zero where nothing is held)."""

    active: tuple[str, ...]
    start: FloatArray
    end: FloatArray


@dataclass(frozen=True)
class SourceGeometry:
    """The sources of a case on its mesh.

    ``held_nodes``: source name → nodes held at (fixed concentration) or filled with
    (initial plume) its concentration, or loaded evenly by volume (box mass loading);
    ``held_shares``: source name → the share of the source strength each of its
    ``held_nodes`` is held at (T3a: the part of a face patch in the node's face area, in
    (0, 1]; 1 for a box);
    ``inflow_weights``: inflow patch → nodal (−q·n)⁺ weights [m³/s] (T3b);
    ``loading_weights``: mass loading → nodal weights summing to 1 (T3f);
    ``injection``: species → nodal load of injection wells [kg/s] (theory.md T3, mass_loading);
    ``upper_bound``: species → the largest concentration [kg/m³] its sources can bring to
    each node (T16b): the injected and inflowing water's concentration, +inf where mass is
    loaded without water (a point load has no concentration of its own), 0 elsewhere."""

    sources: tuple[Source, ...]
    held_nodes: dict[str, IndexArray]
    held_shares: dict[str, FloatArray]
    inflow_weights: dict[str, FloatArray]
    loading_weights: dict[str, FloatArray]
    injection: dict[str, FloatArray]
    upper_bound: dict[str, FloatArray]

    def held(self, species: str, t0: float, t1: float) -> HeldValues:
        """The fixed concentrations of ``species`` active over the step (t0, t1) [s]."""
        n = self.injection[species].size
        tmid = 0.5 * (t0 + t1)
        active = tuple(src.name for src in self.sources if src.species == species
                       and src.kind == "fixed_concentration" and _on(src, tmid))
        start, end = np.zeros(n), np.zeros(n)
        for src in self.sources:
            if src.name in active:
                nodes, share = self.held_nodes[src.name], self.held_shares[src.name]
                start[nodes] = np.maximum(start[nodes], share * src.strength(t0, t0))
                end[nodes] = np.maximum(end[nodes], share * src.strength(t1, t1))
        return HeldValues(active=active, start=start, end=end)

    def load(self, species: str, t0: float, t1: float, ta: float, tb: float) -> FloatArray:
        """Nodal load [kg/s] of injection wells, mass loadings and inflow patches of
        ``species`` over the step (t0, t1), with strengths averaged over (ta, tb) [s]."""
        load = self.injection[species].copy()
        tmid = 0.5 * (t0 + t1)
        for src in self.sources:
            if src.species != species or not _on(src, tmid):
                continue
            if src.kind == "mass_loading":
                load += src.strength(ta, tb) * self.loading_weights[src.name]
            elif src.kind == "inflow_concentration":  # (−q·n)⁺ c_in on the patch (T3b)
                load += src.strength(ta, tb) * self.inflow_weights[src.name]
        return load


def _on(src: Source, t: float) -> bool:
    return src.start <= t and (src.stop is None or t <= src.stop)


def build_source_geometry(site: SiteMesh, flow: FlowField, inputs: TransportInputs, *,
                          spacing: float) -> SourceGeometry:
    """Nodes and weights of every source of ``inputs`` on ``site`` (``spacing`` [m]:
    sampling step along a line source)."""
    n = site.n_nodes
    q = flow.darcy_flux
    held, shares = {}, {}
    for src in inputs.sources:
        if src.points is None and src.kind != "mass_loading":
            held[src.name], shares[src.name] = _held_nodes(site, src)
    inflow = {src.name: _inflow_weights(site, src, q) for src in inputs.sources
              if src.kind == "inflow_concentration"}
    loading = {}
    for src in inputs.sources:
        if src.kind == "mass_loading" and src.points is not None:
            loading[src.name] = _point_load_weights(site, src.points, spacing=spacing)
        elif src.kind == "mass_loading":
            loading[src.name] = box_load_weights(site, src)
    injection = {name: sum((np.clip(flow.exchange[w.name], 0.0, None)
                            * w.injection_concentration[name]
                            for w in inputs.wells if name in w.injection_concentration
                            and w.name in flow.exchange), np.zeros(n))
                 for name in inputs.species}
    upper = {name: np.zeros(n) for name in inputs.species}
    for w in inputs.wells:  # the water of injection wells
        if w.name in flow.exchange:
            into = flow.exchange[w.name] > 0.0
            for name, c_inj in w.injection_concentration.items():
                upper[name][into] = np.maximum(upper[name][into], c_inj)
    for src in inputs.sources:
        if src.kind == "mass_loading":
            upper[src.species][loading[src.name] > 0.0] = np.inf
        elif src.kind == "inflow_concentration" and src.peak_concentration is not None:
            nodes = inflow[src.name] > 0.0
            upper[src.species][nodes] = np.maximum(upper[src.species][nodes],
                                                   src.peak_concentration)
    return SourceGeometry(sources=tuple(inputs.sources), held_nodes=held, held_shares=shares,
                          inflow_weights=inflow, loading_weights=loading,
                          injection=injection, upper_bound=upper)


def initial_fields(inputs: TransportInputs, site: SiteMesh, geometry: SourceGeometry,
                   ) -> dict[str, FloatArray]:
    """Fields [kg/m³] at t = 0: each species' initial value, raised to the initial plumes.

    A box plume raises node j by its share s_j of the box (:func:`box_shares`): c_j = c_b +
    s_j (c_p − c_b)⁺ with c_b the species' initial value and c_p the plume's value, so the
    lumped mass is the box's own (theory.md T3, ``initial_plume``) whether or not the mesh
    follows its faces; nodes whose cells lie wholly inside start at c_p."""
    conc = {name: np.full(site.n_nodes, spec.initial_concentration)
            for name, spec in inputs.species.items()}
    for src in inputs.sources:
        if src.kind != "initial_plume":
            continue
        if src.shape == "box":
            share = box_shares(site, src)
            nodes = np.flatnonzero(share > 0.0)
            share = share[nodes]
        else:
            nodes = geometry.held_nodes[src.name]
            share = np.ones(nodes.size)
        c = conc[src.species]
        rise = np.clip(_plume_values(src, site.points[:, nodes]) - c[nodes], 0.0, None)
        c[nodes] += share * rise
    return conc


BOX_SHARE_LATTICE = 6
"""Subdivisions per edge of the barycentric lattice that samples a tetrahedron cut by a
box's face in :func:`box_shares` ((m+1)(m+2)(m+3)/6 = 84 points; the share of a cut cell
is then within about 1/m of its own, and the errors of neighbouring cut cells cancel in
the sum: measured in tests/unit/transport/test_source_geometry.py)."""


def box_shares(site: SiteMesh, src: Source, *, lattice: int = BOX_SHARE_LATTICE,
               chunk: int = 20_000) -> FloatArray:
    """Share s_j = ∫_box φ_j dV / ∫ φ_j dV ∈ [0, 1] of every node's hat function inside the
    source's box: exactly 1 where every cell around the node lies inside, exactly 0 where
    none touches it, and for cells the box's faces cut, the cell's part inside sampled on a
    symmetric barycentric lattice (so Σ_j s_j ∫φ_j is the volume of the box inside the
    model, to the lattice's sampling of the cut cells)."""
    lo, hi = _ranges(src)
    corner = site.points[:, site.cells]  # (3, 4, cells)
    cmin, cmax = corner.min(axis=1), corner.max(axis=1)
    touching = np.all((cmax >= lo[:, None]) & (cmin <= hi[:, None]), axis=0)
    inside = np.all((cmin >= lo[:, None]) & (cmax <= hi[:, None]), axis=0)
    vol = site.cell_volumes()
    num = np.bincount(site.cells[:, inside].ravel(),  # (4, k) row by row: vertex 0 first
                      weights=np.tile(vol[inside] / 4.0, 4), minlength=site.n_nodes)
    lam = _barycentric_lattice(lattice)  # (4, N), permutation-symmetric
    cut = np.flatnonzero(touching & ~inside)
    for start in range(0, cut.size, chunk):
        ids = cut[start:start + chunk]
        x = np.einsum("dvk,vs->dks", corner[:, :, ids], lam)  # (3, k, N)
        held = np.all((x >= lo[:, None, None]) & (x <= hi[:, None, None]), axis=0)
        part = (held[:, None, :] * lam[None, :, :]).mean(axis=2)  # (k, 4): ∫φ_v / vol
        num += np.bincount(site.cells[:, ids].T.ravel(),
                           weights=(part * vol[ids, None]).ravel(), minlength=site.n_nodes)
    return np.clip(num / site.lumped(np.ones(site.n_cells)), 0.0, 1.0)


def _barycentric_lattice(m: int) -> FloatArray:
    """Barycentric coordinates ``(4, N)`` of the points ((a, b, c, d) + 1/4)/(m + 1), a + b +
    c + d = m: the centroids of the corner tetrahedra of the cell split m + 1 times along
    each edge. All lie strictly inside (a point on a face of the box would count for both
    cells beside it), and the set is symmetric under any swap of the vertices, so each
    coordinate's mean over the points is exactly 1/4 (a cell wholly inside gives each
    vertex vol/4)."""
    pts = [(a, b, c, m - a - b - c) for a in range(m + 1) for b in range(m + 1 - a)
           for c in range(m + 1 - a - b)]
    return (np.array(pts, dtype=float).T + 0.25) / (m + 1)


def _inflow_weights(site: SiteMesh, src: Source, q: FloatArray) -> FloatArray:
    """Nodal weights ∫_P (−q·n)⁺ φ_i dA [m³/s] of an inflow patch P (T3b): q·n is constant
    on each face triangle, so the weight is (−q·n)⁺ times the triangle's part of
    :func:`patch_integrals`."""
    assert src.face is not None
    if not patch_triangles(site, src).any():
        msg = f"source {src.name!r}: no face triangle of {src.face!r} in its ranges"
        raise MeshError(msg)
    face = BoundaryFacets.of(site.points, site.cells, site.faces[src.face])
    inflow = np.clip(-face.normal_flux(q), 0.0, None)
    return patch_integrals(site.points, face.tri, _ranges(src), n=site.n_nodes,
                           facet_weight=inflow)


def _ranges(src: Source) -> tuple[FloatArray, FloatArray]:
    """The source's x, y, z ranges as lower and upper corners [m] (±inf where not given)."""
    lo, hi = np.full(3, -np.inf), np.full(3, np.inf)
    for axis, rng in enumerate((src.x, src.y, src.z)):
        if rng is not None:
            lo[axis], hi[axis] = rng
    return lo, hi


def _held_nodes(site: SiteMesh, src: Source) -> tuple[IndexArray, FloatArray]:
    """Nodes of a box or face patch and the share of the strength each is held at.

    A box holds its nodes (bounds included) at the full strength. A face patch of a fixed
    concentration holds the nodes with a positive share of it (:func:`patch_shares`) at that
    share (T3a). The patch must still contain a mesh node (as ``fe3d check`` demands) lest
    it be smaller than the cells around it."""
    nodes = source_nodes(site, src)
    if nodes.size == 0:
        msg = (f"source {src.name!r} contains no mesh node; enlarge it or set a smaller "
               "mesh.fine_cell_size / mesh.layer_cell_thickness")
        raise MeshError(msg)
    if src.shape != "face_patch" or src.kind != "fixed_concentration":
        return nodes, np.ones(nodes.size)
    assert src.face is not None
    share = patch_shares(site.points, site.faces[src.face], _ranges(src), n=site.n_nodes)
    nodes = np.nonzero(share > SHARE_FLOOR)[0]
    return nodes, share[nodes]


def clip_polygon(poly: FloatArray, lo: FloatArray, hi: FloatArray) -> FloatArray:
    """The convex polygon ``poly`` ``(3, k)`` [m] clipped to the box lo ≤ x ≤ hi (bounds
    may be ±inf), by Sutherland–Hodgman clipping against one bounding plane at a time
    (Sutherland & Hodgman 1974); shape ``(3, m)``, ``m = 0`` when nothing is left.

    A vertex on a plane counts as inside, so a polygon that only touches the box keeps a
    zero-area sliver (an edge or a point)."""
    pts = [poly[:, i] for i in range(poly.shape[1])]
    for axis in range(3):
        for bound, sign in ((lo[axis], 1.0), (hi[axis], -1.0)):
            if not np.isfinite(bound) or not pts:
                continue
            out = []
            for a, b in zip(pts, pts[1:] + pts[:1], strict=True):
                da, db = sign * (a[axis] - bound), sign * (b[axis] - bound)
                if da >= 0.0:
                    out.append(a)
                if (da > 0.0 > db) or (da < 0.0 < db):  # the edge crosses the plane
                    out.append(a + (da / (da - db)) * (b - a))
            pts = out
    return np.array(pts, dtype=float).T if pts else np.zeros((3, 0))


def _area_and_centroid(poly: FloatArray) -> tuple[float, FloatArray]:
    """Area [m²] and centroid [m] of a planar convex polygon ``(3, k)`` (a fan of
    triangles from its first vertex)."""
    if poly.shape[1] < 3:
        return 0.0, poly.mean(axis=1) if poly.shape[1] else np.zeros(3)
    a = poly[:, :1]
    u, w = poly[:, 1:-1] - a, poly[:, 2:] - a
    areas = 0.5 * np.linalg.norm(np.cross(u, w, axis=0), axis=0)
    total = float(areas.sum())
    if total == 0.0:
        return 0.0, poly.mean(axis=1)
    centres = a + (u + w) / 3.0
    return total, centres @ areas / total


def _barycentric(corners: FloatArray, x: FloatArray) -> FloatArray:
    """Barycentric coordinates ``(3,)`` of the point ``x`` in the plane of the triangle
    ``corners`` ``(3, 3)`` (columns are the corners)."""
    e = corners[:, 1:] - corners[:, :1]
    lam = np.linalg.solve(e.T @ e, e.T @ (x - corners[:, 0]))
    return np.array([1.0 - lam.sum(), lam[0], lam[1]])


def _triangle_areas(points: FloatArray, tri: IndexArray) -> FloatArray:
    p0, p1, p2 = (points[:, tri[i]] for i in range(3))
    return 0.5 * np.linalg.norm(np.cross(p1 - p0, p2 - p0, axis=0), axis=0)


def patch_integrals(points: FloatArray, tri: IndexArray, box: tuple[FloatArray, FloatArray],
                    *, n: int, facet_weight: FloatArray | None = None) -> FloatArray:
    """∫_P g φ_i dA per node [m² × g] over the part P of the face triangles ``tri``
    ``(3, k)`` inside ``box`` = (lower, upper corner) [m], for ``g`` constant per triangle
    (``facet_weight``, default 1); shape ``(n,)``.

    A triangle inside the box gives g A/3 to each corner; one cut by the box is clipped
    (:func:`clip_polygon`), and since φ_i is linear, ∫_{T∩P} φ_i = |T∩P| φ_i(centroid of
    T∩P) exactly. The sum over the nodes is ∫_P g dA: the patch's real area for g = 1."""
    lo, hi = box
    g = np.ones(tri.shape[1]) if facet_weight is None else facet_weight
    corners = points[:, tri]  # (3, 3, k): coordinate, corner, triangle
    inside = np.all((corners >= lo[:, None, None]) & (corners <= hi[:, None, None]),
                    axis=(0, 1))
    outside = np.any(np.all(corners < lo[:, None, None], axis=1)
                     | np.all(corners > hi[:, None, None], axis=1), axis=0)
    area = _triangle_areas(points, tri)
    out = np.bincount(tri[:, inside].ravel(), weights=np.tile(g[inside] * area[inside] / 3.0, 3),
                      minlength=n).astype(float)
    for k in np.nonzero(~inside & ~outside)[0]:
        part, centre = _area_and_centroid(clip_polygon(corners[:, :, k], lo, hi))
        if part > 0.0:
            out[tri[:, k]] += g[k] * part * _barycentric(corners[:, :, k], centre)
    return out


def patch_shares(points: FloatArray, tri: IndexArray, box: tuple[FloatArray, FloatArray],
                 *, n: int) -> FloatArray:
    """Share [-] of each node's face area that lies in the patch: ∫_P φ_i dA / ∫ φ_i dA
    over the face triangles ``tri`` (the lumped projection of the patch's indicator onto
    the face's P1 functions; zero off the face); shape ``(n,)``.

    Σ share_i ∫ φ_i dA equals the patch's area exactly, so a patch held at c0 × share lets
    in c0 q A by advection through a face with uniform inflow q (T3a). A node on a straight
    outline gets ½ on a mesh symmetric about it, a corner node about ¼."""
    lumped = np.bincount(tri.ravel(), weights=np.tile(_triangle_areas(points, tri) / 3.0, 3),
                         minlength=n)
    inner = patch_integrals(points, tri, box, n=n)
    share = np.zeros(n)
    on = lumped > 0.0
    share[on] = np.minimum(inner[on] / lumped[on], 1.0)
    return share


BOX_SAMPLES_PER_CELL = 4
"""Midpoint samples per cell length along each axis when a box load is integrated (the
error of the nodal weights falls with its square; common practice, no source)."""

MAX_BOX_SAMPLES = 400_000
"""Upper bound on the sample points of one box (memory and time: about 0.5 s)."""


def box_load_weights(site: SiteMesh, src: Source) -> FloatArray:
    """Nodal weights (summing to 1) of a mass rate spread evenly over a box (theory.md T3,
    ``mass_loading``): the Galerkin load ∫_box φ_j dV / V, by the midpoint rule on a regular
    grid of the box, at :data:`BOX_SAMPLES_PER_CELL` points per length of the cells the box
    touches (and at least 4 per side). The midpoint rule integrates each φ_j exactly where φ_j
    is linear over a sample's volume, so the weights sum to 1 and their first moment is the
    box's centroid (P1 reproduces x, y, z) to round-off; the parts of the box outside the model
    (above the ground, beyond the site) carry no load. The weights vary smoothly with the mesh,
    unlike a share of the nodes that happen to lie inside the box."""
    lo, hi = _ranges(src)
    lo = np.maximum(lo, site.points.min(axis=1))
    hi = np.minimum(hi, site.points.max(axis=1))
    size = hi - lo
    corner = site.points[:, site.cells]  # (3, 4, cells)
    touching = np.all((corner.max(axis=1) >= lo[:, None]) & (corner.min(axis=1) <= hi[:, None]),
                      axis=0)
    if not np.any(size > 0) or not touching.any():
        msg = f"source {src.name!r}: its box lies outside the model"
        raise MeshError(msg)
    ids = np.nonzero(touching)[0]
    extent = corner[:, :, ids].max(axis=1) - corner[:, :, ids].min(axis=1)  # (3, k)
    h = np.median(extent, axis=1)  # a typical cell's length along each axis [m]
    count = np.maximum(4, np.ceil(BOX_SAMPLES_PER_CELL * size / np.maximum(h, 1e-12)))
    count = np.minimum(count, np.floor(MAX_BOX_SAMPLES ** (1 / 3))).astype(int)
    axes = [lo[k] + (np.arange(count[k]) + 0.5) * size[k] / count[k] for k in range(3)]
    xs = np.array([a.ravel() for a in np.meshgrid(*axes, indexing="ij")])
    found, bary = CellFinder(site.points, site.cells, ids).find(xs)
    inside = found >= 0
    if not inside.any():
        msg = f"source {src.name!r}: no part of its box lies inside the model"
        raise MeshError(msg)
    w = np.bincount(site.cells[:, found[inside]].ravel(), weights=bary[:, inside].ravel(),
                    minlength=site.n_nodes)
    return w / w.sum()


def _point_load_weights(site: SiteMesh, points: list[tuple[float, float, float]], *,
                        spacing: float) -> FloatArray:
    """Nodal weights (summing to 1) of a unit load at a point, or spread evenly along a
    polyline: the Galerkin load φ_j(x_s) of a point source (T3f); a line is sampled at the
    midpoints of sub-segments no longer than ``spacing``, each weighted by its length
    (:func:`fe3d.flow.site_rules.line_sample_points`)."""
    xs, lengths = line_sample_points(points, spacing)
    if lengths.sum() <= 0.0:
        msg = "a line source has zero length"
        raise MeshError(msg)
    ids, bary = locate_points(site.points, site.cells, xs)
    w = np.bincount(site.cells[:, ids].ravel(), weights=(bary * lengths).ravel(),
                    minlength=site.n_nodes)
    return w / w.sum()


def _plume_values(src: Source, at: FloatArray) -> FloatArray | float:
    """Initial-plume concentration [kg/m³] at points ``(3, k)``: the constant value, or the
    measured points interpolated linearly on their Delaunay tetrahedra and zero outside
    their hull (T3e)."""
    if src.concentration_points is None:
        assert src.concentration is not None
        return src.concentration
    from scipy.interpolate import LinearNDInterpolator

    pts = np.array(src.concentration_points, dtype=float)
    try:
        interp = LinearNDInterpolator(pts[:, :3], pts[:, 3], fill_value=0.0)
    except Exception as exc:  # Qhull: points in one plane or line
        msg = (f"source {src.name!r}: the concentration points span no volume (all in one "
               f"plane?), so they cannot be interpolated ({type(exc).__name__})")
        raise MeshError(msg) from None
    return np.asarray(interp(at.T), dtype=float)
