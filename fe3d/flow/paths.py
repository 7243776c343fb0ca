"""Travel paths: forward from sources to receptors, backward from extraction wells."""

from __future__ import annotations

import itertools
import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from fe3d._typing import BoolArray, FloatArray
from fe3d.case.parts import TravelInputs
from fe3d.case.schema import Source
from fe3d.flow.solve import FlowField
from fe3d.flow.tracking import Pathline, Tracker
from fe3d.mesh.site_mesh import SiteMesh

__all__ = ["ReceptorArrival", "TravelPaths", "travel_paths"]

_BLOCK = 1 << 18
"""Cells per block when forming cell centres (a 24 MiB gather)."""


@dataclass(frozen=True)
class ReceptorArrival:
    """Shortest advective travel time [s] of water from a source to a receptor.

    The time is taken where a source pathline comes closest (in plan, within the receptor's
    vertical extent) to the receptor; ``time`` is None when no pathline from the source
    passes within ``reach`` [m] of it.
    """

    source: str
    receptor: str
    time: float | None
    closest: float
    reach: float


@dataclass(frozen=True)
class TravelPaths:
    """Pathlines from sources (forward) and from extraction wells (backward)."""

    forward: dict[str, list[Pathline]]
    backward: dict[str, list[Pathline]]
    arrivals: list[ReceptorArrival]


def _source_seeds(inputs: TravelInputs, src: Source) -> FloatArray:
    if src.points is not None:  # a point or line source: start at its vertices
        return np.array(src.points, dtype=float).T
    rng = []
    xs = [p[0] for p in inputs.outline]
    ys = [p[1] for p in inputs.outline]
    full = {"x": (min(xs), max(xs)), "y": (min(ys), max(ys)), "z": inputs.elevation_range}
    for axis in ("x", "y", "z"):
        lo, hi = getattr(src, axis) or full[axis]
        rng.append(np.linspace(lo + 0.25 * (hi - lo), hi - 0.25 * (hi - lo), 2)
                   if hi > lo else np.array([lo]))
    seeds = np.array(list(itertools.product(*rng))).T
    if src.shape == "face_patch" and src.face in set(inputs.edge_names):
        # a patch on a lateral face: start on the face, not inside the open range
        edges = [i for i, n in enumerate(inputs.edge_names) if n == src.face]
        for j in range(seeds.shape[1]):
            seeds[:2, j] = _nearest_on_edges(seeds[:2, j], inputs.outline, edges)
    return np.unique(seeds, axis=1)


def _nearest_on_edges(p: FloatArray, verts: Sequence[tuple[float, float]],
                      edges: list[int]) -> FloatArray:
    """The point of the polygon edges ``edges`` (edge i: vertex i → i + 1) nearest to the
    plan point ``p`` [m]."""
    best, out = math.inf, p
    for i in edges:
        a, b = np.array(verts[i]), np.array(verts[(i + 1) % len(verts)])
        q = a + np.clip(np.dot(p - a, b - a) / np.dot(b - a, b - a), 0.0, 1.0) * (b - a)
        if np.hypot(*(p - q)) < best:
            best, out = float(np.hypot(*(p - q))), q
    return out


def _receptors(inputs: TravelInputs) -> list[tuple[str, float, float, float, float]]:
    """(name, x, y, z_top, z_bottom) of receptor observation points and extraction wells."""
    out = []
    for o in inputs.observation_points:
        if o.kind == "receptor":
            top, bottom = o.screen if o.screen is not None else (o.z, o.z)
            out.append((o.name, o.x, o.y, top, bottom))
    for w in inputs.wells:
        if w.kind == "extraction":
            out.append((w.name, w.x, w.y, max(t for t, _ in w.screens),
                        min(b for _, b in w.screens)))
    return out


def _capture_mask(site: SiteMesh, inputs: TravelInputs) -> BoolArray | None:
    """Cells whose centre lies within half the reach of an extraction well's screen (they
    take the water of the forward particles that reach them), or None when there are none.
    The centres are formed a block of cells at a time (no ``(3, 4, n_cells)`` gather)."""
    wells = [w for w in inputs.wells if w.kind == "extraction"]
    if not wells:
        return None
    half = 0.5 * inputs.reach
    is_capture = np.zeros(site.n_cells, dtype=np.bool_)
    for first in range(0, site.n_cells, _BLOCK):
        block = slice(first, first + _BLOCK)
        centres = site.points[:, site.cells[:, block]].mean(axis=1)
        for w in wells:
            near = np.hypot(centres[0] - w.x, centres[1] - w.y) <= half
            for top, bottom in w.screens:
                is_capture[block] |= (near & (centres[2] <= top + half)
                                      & (centres[2] >= bottom - half))
    return is_capture if is_capture.any() else None


def travel_paths(site: SiteMesh, flow: FlowField, inputs: TravelInputs) -> TravelPaths:
    """Track water particles for a quick check of arrival times (theory.md F8).

    The tracker (cell adjacency, node-averaged velocity) lives only inside this call: the
    result holds the pathlines and nothing of the tracker."""
    tracker = Tracker(site.points, site.cells, flow.darcy_flux, porosity=flow.porosity)
    reach = inputs.reach
    # forward particles end in a cell near an extraction well's screen (it takes their water)
    capture = _capture_mask(site, inputs)
    forward: dict[str, list[Pathline]] = {}
    done: dict[bytes, list[Pathline]] = {}  # sources sharing a region share their pathlines
    for s in inputs.sources:
        seeds = _source_seeds(inputs, s)
        key = seeds.tobytes()
        if key not in done:
            done[key] = [tracker.track(x, capture_cells=capture) for x in seeds.T]
        forward[s.name] = done[key]
    backward: dict[str, list[Pathline]] = {}
    for w in inputs.wells:
        if w.kind != "extraction":
            continue
        seeds = []
        r = 0.5 * reach
        for top, bottom in w.screens:
            for z in np.linspace(top, bottom, 3):
                for a in np.linspace(0, 2 * math.pi, 8, endpoint=False):
                    seeds.append((w.x + r * math.cos(a), w.y + r * math.sin(a), z))
        backward[w.name] = [tracker.track(np.array(x), backward=True, max_time=inputs.end)
                            for x in seeds]
    del tracker  # the arrivals below need the pathlines only
    arrivals = []
    for name, lines in forward.items():
        for rec, rx, ry, top, bottom in _receptors(inputs):
            best_t, closest = None, math.inf
            for line in lines:
                d = np.hypot(line.points[0] - rx, line.points[1] - ry)
                inside = (line.points[2] <= top + reach) & (line.points[2] >= bottom - reach)
                if not np.any(inside):
                    continue
                d_in = np.where(inside, d, np.inf)
                j = int(np.argmin(d_in))
                closest = min(closest, float(d_in[j]))
                if d_in[j] <= reach:  # time at the point of closest approach
                    t = float(line.times[j])
                    best_t = t if best_t is None else min(best_t, t)
            arrivals.append(ReceptorArrival(name, rec, best_t, closest, reach))
    return TravelPaths(forward=forward, backward=backward, arrivals=arrivals)
