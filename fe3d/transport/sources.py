"""Where and how strongly the sources act on the mesh (theory.md T3a–T3f), built once.

:class:`SourceGeometry` holds, per source, the nodes a fixed concentration holds, the nodal
weights of inflow patches and mass loadings, and per species the load of injection wells;
:meth:`SourceGeometry.step_terms` turns them into the held values and the nodal load of one
step. :func:`initial_fields` gives the fields at t = 0.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass

import numpy as np

from fe3d._typing import FloatArray, IndexArray
from fe3d.case.schema import Case, Source
from fe3d.errors import MeshError
from fe3d.flow.solve import FlowField
from fe3d.mesh.locate import locate_points
from fe3d.mesh.site_mesh import SiteMesh
from fe3d.p1 import BoundaryFacets

__all__ = ["HeldValues", "SourceGeometry", "build_source_geometry", "initial_fields"]


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
    ``inflow_weights``: inflow patch → nodal (−q·n)⁺ weights [m³/s] (T3b);
    ``loading_weights``: mass loading → nodal weights summing to 1 (T3f);
    ``injection``: species → nodal load of injection wells [kg/s] (T3d)."""

    sources: tuple[Source, ...]
    held_nodes: dict[str, IndexArray]
    inflow_weights: dict[str, FloatArray]
    loading_weights: dict[str, FloatArray]
    injection: dict[str, FloatArray]

    def held(self, species: str, t0: float, t1: float) -> HeldValues:
        """The fixed concentrations of ``species`` active over the step (t0, t1) [s]."""
        n = self.injection[species].size
        tmid = 0.5 * (t0 + t1)
        active = tuple(src.name for src in self.sources if src.species == species
                       and src.kind == "fixed_concentration" and _on(src, tmid))
        start, end = np.zeros(n), np.zeros(n)
        for src in self.sources:
            if src.name in active:
                nodes = self.held_nodes[src.name]
                start[nodes] = np.maximum(start[nodes], src.strength(t0, t0))
                end[nodes] = np.maximum(end[nodes], src.strength(t1, t1))
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


def build_source_geometry(site: SiteMesh, flow: FlowField, case: Case, *,
                          node_volume: FloatArray, spacing: float) -> SourceGeometry:
    """Nodes and weights of every source of ``case`` on ``site`` (``node_volume`` [m³]:
    lumped nodal volumes; ``spacing`` [m]: sampling step along a line source)."""
    n = site.n_nodes
    q = flow.darcy_flux
    held = {src.name: _source_nodes(site, src) for src in case.sources if src.points is None}
    inflow = {src.name: _inflow_weights(site, src, q) for src in case.sources
              if src.kind == "inflow_concentration"}
    loading = {}
    for src in case.sources:
        if src.kind == "mass_loading" and src.points is not None:
            loading[src.name] = _point_load_weights(site, src.points, spacing=spacing)
        elif src.kind == "mass_loading":
            w = np.zeros(n)
            w[held[src.name]] = node_volume[held[src.name]]
            loading[src.name] = w / w.sum()
    injection = {name: sum((np.clip(flow.exchange[w.name], 0.0, None)
                            * w.injection_concentration[name]
                            for w in case.wells if name in w.injection_concentration
                            and w.name in flow.exchange), np.zeros(n))
                 for name in case.species}
    return SourceGeometry(sources=tuple(case.sources), held_nodes=held, inflow_weights=inflow,
                          loading_weights=loading, injection=injection)


def initial_fields(case: Case, site: SiteMesh, geometry: SourceGeometry,
                   ) -> dict[str, FloatArray]:
    """Fields [kg/m³] at t = 0: each species' initial value, raised to the initial plumes."""
    conc = {name: np.full(site.n_nodes, spec.initial_concentration)
            for name, spec in case.species.items()}
    for src in case.sources:
        if src.kind == "initial_plume":
            nodes = geometry.held_nodes[src.name]
            values = _plume_values(src, site.points[:, nodes])
            conc[src.species][nodes] = np.maximum(conc[src.species][nodes], values)
    return conc


def _inflow_weights(site: SiteMesh, src: Source, q: FloatArray) -> FloatArray:
    """Nodal (−q·n)⁺ weights [m³/s] of the face triangles of an inflow patch (T3b)."""
    assert src.face is not None
    face = BoundaryFacets.of(site.points, site.cells, site.faces[src.face])
    mid = site.points[:, face.tri].mean(axis=1)
    keep = np.ones(face.area.size, dtype=bool)
    for axis, rng in enumerate((src.x, src.y, src.z)):
        if rng is not None:
            keep &= (mid[axis] >= rng[0]) & (mid[axis] <= rng[1])
    if not keep.any():
        msg = f"source {src.name!r}: no face triangle of {src.face!r} in its ranges"
        raise MeshError(msg)
    inlet = face.subset(keep)
    return inlet.load(np.clip(-inlet.normal_flux(q), 0.0, None), site.n_nodes)


def _source_nodes(site: SiteMesh, src: Source) -> IndexArray:
    """Mesh nodes held at the source concentration."""
    p = site.points
    if src.shape == "face_patch":
        assert src.face is not None
        cand = site.face_nodes(src.face)
    else:
        cand = np.arange(site.n_nodes)
    keep = np.ones(cand.size, dtype=bool)
    for axis, rng in enumerate((src.x, src.y, src.z)):
        if rng is not None:
            tol = 1e-9 * max(1.0, abs(rng[1] - rng[0]))
            keep &= (p[axis, cand] >= rng[0] - tol) & (p[axis, cand] <= rng[1] + tol)
    nodes = cand[keep]
    if nodes.size == 0:
        msg = (f"source {src.name!r} contains no mesh node; enlarge it or set a smaller "
               "mesh.fine_cell_size / mesh.layer_cell_thickness")
        raise MeshError(msg)
    return nodes


def _point_load_weights(site: SiteMesh, points: list[tuple[float, float, float]], *,
                        spacing: float) -> FloatArray:
    """Nodal weights (summing to 1) of a unit load at a point, or spread evenly along a
    polyline: the Galerkin load φ_j(x_s) of a point source (T3f); a line is sampled at the
    midpoints of sub-segments no longer than ``spacing``, each weighted by its length."""
    p = np.array(points, dtype=float).T  # (3, k)
    if p.shape[1] == 1:
        xs, lengths = p, np.ones(1)
    else:
        chunks, lens = [], []
        for a, b in itertools.pairwise(p.T):
            seg = float(np.linalg.norm(b - a))
            k = max(1, math.ceil(seg / spacing))
            f = (np.arange(k) + 0.5) / k
            chunks.append(a[:, None] + (b - a)[:, None] * f)
            lens.append(np.full(k, seg / k))
        xs, lengths = np.hstack(chunks), np.concatenate(lens)
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
