r"""The plume corridor: where the mesh must be fine, from the pathlines of a first flow solve.

Pure numpy on arrays (:func:`plan_corridor`), plus one adapter that reads the units and
dispersivities along the pathlines from a mesh and a case (:func:`site_corridor`). Nothing
here calls gmsh or solves anything; :mod:`fe3d.pipeline` composes the two passes (first mesh →
flow → pathlines → corridor → final mesh) and :func:`fe3d.mesh.build.build_mesh` turns the
:class:`Corridor` into size fields and cell-layer thicknesses (docs/theory.md, "Plume
corridor", M1–M4).

Along a pathline of arc length s from its source, in the unit crossed at s (dispersivities
α_L, α_T, α_TV of that unit):

* plan cell size h(s) = Pe* · α_L(s), so that the grid Péclet number h/α_L along the flow is
  at most the target Pe* (M1);
* half-width r(s) = w₀ + m σ_T(s), σ_T(s)² = ∫₀ˢ 2 α_T ds′ (M2): w₀ covers the source's own
  extent, and m = :data:`SPREAD` standard deviations reach the compliance limit (below);
* length: to where the pathline leaves the model, or to where the fastest species the source
  makes is at the end time (the water's travel × its retardation) plus m σ_L of longitudinal
  spread ahead of it, σ_L² = ∫ 2 α_L ds (M3);
* cell-layer thickness of each unit crossed: σ_V(s_ref) / :data:`CELLS_PER_SPREAD` × Pe*/2
  with σ_V² = ∫ 2 α_TV ds, taken at half the corridor length L or at the nearest receptor
  inside the corridor (M4; at the default target 2 layers per σ_V, more with a finer
  target, so refinement studies refine layers too).
  fe3d extrudes one cell-layer thickness per unit, so this thickness applies to the whole
  unit, not only inside the corridor (the node estimate counts it so).

Why m = 3.5: across a plume far from a wide source the transverse profile is c/c_max =
exp(−d²/(2σ²)) (Gaussian spreading, e.g. Bear 1972, *Dynamics of fluids in porous media*,
§10.6, from memory); near the edge of a wide source it is ½ erfc(d/(√2 σ)). A limit of c0/4000
is reached where erfc(d/(√2σ)) = 1/2000, d ≈ 3.5 σ (erfc(2.48) ≈ 5e-4), or where the Gaussian
falls to 1/4000, d ≈ 4.1 σ. Since c_max < c0 downstream, the part above c0/4000 ends about
3.5 σ out: our estimate, no source for the rule itself.
"""

from __future__ import annotations

import itertools
import logging
import math
from collections.abc import Sequence
from dataclasses import asdict, dataclass, replace
from typing import TYPE_CHECKING, Any

import numpy as np

from fe3d._typing import FloatArray, IndexArray
from fe3d.case.parts import Ground

if TYPE_CHECKING:
    from fe3d.case.schema import Case
    from fe3d.mesh.site_mesh import SiteMesh

__all__ = ["CELLS_PER_SPREAD", "FINE_SIZE_MARGIN", "SPREAD", "Corridor", "CorridorPiece",
           "PathSample", "ReceptorSpread", "UnitColumn", "corridor_gap", "corridor_zones",
           "plan_corridor", "project_to_edges", "site_corridor"]

logger = logging.getLogger(__name__)

SPREAD = 3.5
"""Standard deviations of spreading out to the c0/4000 iso-line (module docstring; estimate)."""

CELLS_PER_SPREAD = 2.0
"""Cell layers per vertical standard deviation σ_V (the ±3.5σ_V band then holds about 14
layers): common practice, no source."""

MAX_ASPECT = 10.0
"""A corridor cell layer is at least 1/MAX_ASPECT of the corridor's plan cell size (a cap on
the cell aspect ratio where α_TV is tiny): common practice, no source."""

FINE_SIZE_MARGIN = 0.8
"""Fraction of a fine target size requested from gmsh, so measured edges stay below it
(gmsh's edges overshoot its size field by up to ~20 %, measured in fe3d.mesh.build)."""

_BREAKS = 8  # arc-length pieces per pathline: s_stop · 2^-j, j = 0..7 (radius per piece)


@dataclass(frozen=True)
class PathSample:
    """One forward pathline with the dispersivities of the unit at each of its points.

    Attributes
    ----------
    points
        Positions [m], shape ``(3, k)``, from the source.
    times
        Travel time [s] of the fastest species the source makes (the water's time × its
        retardation in each unit crossed), shape ``(k,)``.
    alpha_l, alpha_t, alpha_tv
        Longitudinal, horizontal-transverse and vertical-transverse dispersivity [m] of the
        unit at each point (used for the segment that starts there), shape ``(k,)``.
    unit
        Unit index at each point, shape ``(k,)``.
    half_width
        Plan distance [m] from the pathline's start that its corridor must cover at the
        source (the part of the source's outline nearest to this pathline).
    """

    points: FloatArray
    times: FloatArray
    alpha_l: FloatArray
    alpha_t: FloatArray
    alpha_tv: FloatArray
    unit: IndexArray
    half_width: float


@dataclass(frozen=True)
class UnitColumn:
    """A unit as the extrusion sees it: name, largest thickness [m], cell-layer thickness
    the case asks [m], and whether the case fixes its number of cell layers."""

    name: str
    thickness: float
    cell_thickness: float
    fixed: bool = False


@dataclass(frozen=True)
class CorridorPiece:
    """A stretch of a pathline in plan: polyline [m], half-width [m] and cell size [m]."""

    points: tuple[tuple[float, float], ...]
    radius: float
    cell_size: float


@dataclass(frozen=True)
class ReceptorSpread:
    """The plume's spread where a receptor (observation point or extraction well) lies in
    the corridor: its ``name``, the arc length ``along`` [m] from the source to the nearest
    pathline point, the transverse and vertical standard deviations ``sigma_t``,
    ``sigma_v`` [m] there and the corridor's plan ``cell_size`` [m] there. σ_V = √(∫ 2α_TV
    ds) (M4); σ_T = √(∫ 2α_T ds + w²/3) (M2) with the source's own half-width w (a uniform
    strip of half-width w has variance w²/3)."""

    name: str
    along: float
    sigma_t: float
    sigma_v: float
    cell_size: float

    def line(self) -> str:
        """One report line with units."""
        return (f"plume corridor at {self.name}: {self.along:.0f} m down the path, spread "
                f"σ_T {self.sigma_t:.3g} m across and σ_V {self.sigma_v:.3g} m vertically, "
                f"corridor cells {self.cell_size:.3g} m")

    @property
    def thin(self) -> bool:
        """Fewer than one corridor cell per σ_T: the plume reads low there (verification
        N30: 16 % low at 0.7 cells per σ_T)."""
        return self.sigma_t < self.cell_size

    def thin_warning(self) -> str:
        """The one warning line for a :attr:`thin` plume (``fe3d mesh`` and the run's
        report say the same)."""
        return (f"{self.name}: the plume there is narrower than a corridor cell (σ_T "
                f"{self.sigma_t:.3g} m across, cells {self.cell_size:.3g} m); concentrations "
                "there may read low (an outside check read a point source's plume 16 % low at "
                "0.7 cells per σ_T: docs/verification.md N30): refine (mesh.corridor_peclet) "
                "and compare")


@dataclass(frozen=True)
class Corridor:
    """Where the mesh is refined along the plume's path, and what it costs.

    Attributes
    ----------
    pieces
        Plan stretches with their half-width and cell size.
    layer_thickness
        Cell-layer thickness [m] by unit name, for the units crossed where it is thinner
        than what the case asks (applies to the whole unit).
    peclet_target, peclet_reached
        Grid Péclet number h/α_L asked and reached (larger when the node budget coarsened
        the corridor).
    length
        Longest corridor along a pathline [m].
    width_range
        Smallest and largest full width 2r [m] over the pieces.
    cell_size_range
        Smallest and largest plan cell size [m] over the pieces.
    expected_nodes
        Estimated node count of the mesh with the corridor.
    note
        One line when the node budget coarsened the corridor ('' otherwise).
    receptors
        The plume's spread at each receptor inside the corridor (M4).
    """

    pieces: tuple[CorridorPiece, ...]
    layer_thickness: dict[str, float]
    peclet_target: float
    peclet_reached: float
    length: float
    width_range: tuple[float, float]
    cell_size_range: tuple[float, float]
    expected_nodes: int
    note: str = ""
    receptors: tuple[ReceptorSpread, ...] = ()

    def as_dict(self) -> dict[str, Any]:
        """JSON-ready form (stored in ``mesh.json`` and hashed into the mesh-cache key)."""
        out = asdict(self)
        out["pieces"] = [{"points": [list(p) for p in pc.points], "radius": pc.radius,
                          "cell_size": pc.cell_size} for pc in self.pieces]
        out["width_range"] = list(self.width_range)
        out["cell_size_range"] = list(self.cell_size_range)
        out["receptors"] = [asdict(r) for r in self.receptors]
        return out

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> Corridor:
        """Inverse of :meth:`as_dict`."""
        pieces = tuple(CorridorPiece(points=tuple((float(x), float(y)) for x, y in p["points"]),
                                     radius=float(p["radius"]), cell_size=float(p["cell_size"]))
                       for p in data["pieces"])
        return cls(**{**data, "pieces": pieces,
                      "layer_thickness": {k: float(v) for k, v in
                                          data["layer_thickness"].items()},
                      "width_range": tuple(data["width_range"]),
                      "cell_size_range": tuple(data["cell_size_range"]),
                      "receptors": tuple(ReceptorSpread(**r)
                                         for r in data.get("receptors", ()))})

    def lines(self) -> list[str]:
        """Report lines with units (for ``fe3d mesh``): the corridor, its layers, and the
        plume's spread at each receptor inside it."""
        lo, hi = self.cell_size_range
        sizes = f"{lo:.3g} m" if math.isclose(lo, hi, rel_tol=1e-3) else f"{lo:.3g}–{hi:.3g} m"
        layers = ", ".join(f"{k} {v:.3g} m" for k, v in self.layer_thickness.items())
        return [f"plume corridor: {self.length:.0f} m long, {self.width_range[0]:.0f}–"
                f"{self.width_range[1]:.0f} m wide, plan cells {sizes} (grid Péclet "
                f"{self.peclet_reached:.3g}, target {self.peclet_target:.3g})",
                "plume corridor: cell layers "
                + (layers or "as the case asks (already fine enough)")
                + f"; about {self.expected_nodes:,} nodes expected",
                *(r.line() for r in self.receptors)]


def _sig(x: float, digits: int = 4) -> float:
    """``x`` rounded to ``digits`` significant digits (a stable cache key across reruns whose
    flow differs by round-off)."""
    return float(f"{x:.{digits}g}")


def _along(path: PathSample) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray]:
    """Arc length [m] and the cumulative ∫2α ds [m²] (L, T, TV) at every point."""
    seg = np.linalg.norm(np.diff(path.points, axis=1), axis=0)
    s = np.concatenate([[0.0], np.cumsum(seg)])

    def cum(alpha: FloatArray) -> FloatArray:
        return np.concatenate([[0.0], np.cumsum(2.0 * alpha[:-1] * seg)])

    return s, cum(path.alpha_l), cum(path.alpha_t), cum(path.alpha_tv)


def _stop_length(path: PathSample, s: FloatArray, var_l: FloatArray, end_time: float) -> float:
    """Arc length [m] where the corridor ends: the water's position at ``end_time`` plus
    SPREAD σ_L ahead of it, or the end of the pathline (M3)."""
    if path.times[-1] <= end_time:
        return float(s[-1])
    s_end = float(np.interp(end_time, path.times, s))
    ahead = SPREAD * math.sqrt(float(np.interp(s_end, s, var_l)))
    return min(float(s[-1]), s_end + ahead)


def _pieces(path: PathSample, *, peclet: float, end_time: float,
            receptors: Sequence[tuple[str, float, float]],
            ) -> tuple[list[CorridorPiece], float, float, FloatArray,
                       list[tuple[float, ReceptorSpread]]]:
    """Pieces of one pathline, its corridor length [m], σ_V where the layers are sized [m],
    the units it crosses within the corridor, and the receptors inside it with their plan
    distance [m] from the pathline (:func:`_receptor_spreads`)."""
    s, var_l, var_t, var_v = _along(path)
    stop = _stop_length(path, s, var_l, end_time)
    breaks = sorted({0.0, *(stop * 0.5**j for j in range(_BREAKS))})
    out = []
    for a, b in itertools.pairwise(breaks):
        inner = (s > a) & (s < b)
        xy = np.column_stack([np.interp([a], s, path.points[k]) for k in (0, 1)])
        xy = np.vstack([xy, path.points[:2, inner].T,
                        np.column_stack([np.interp([b], s, path.points[k]) for k in (0, 1)])])
        j0 = max(0, int(np.searchsorted(s, a, side="right")) - 1)
        j1 = max(j0 + 1, int(np.searchsorted(s, b, side="left")))
        size = peclet * float(path.alpha_l[j0:j1].min())
        radius = path.half_width + SPREAD * math.sqrt(float(np.interp(b, s, var_t)))
        out.append(CorridorPiece(points=tuple(map(tuple, xy.tolist())),
                                 radius=max(radius, 2.0 * size), cell_size=size))
    spreads = _receptor_spreads(path, (s, var_t, var_v), stop, receptors, out)
    # M4: layers sized at half the corridor, or at a nearer receptor at least a cell out
    # (nearer, the source's own extent, not σ_V, sets the plume's thickness)
    at = min([0.5 * stop] + [r.along for _, r in spreads if r.along >= out[0].cell_size])
    sigma_v = math.sqrt(float(np.interp(at, s, var_v)))
    return out, stop, sigma_v, np.unique(path.unit[s <= stop]), spreads


def _receptor_spreads(path: PathSample, along: tuple[FloatArray, FloatArray, FloatArray],
                      stop: float, receptors: Sequence[tuple[str, float, float]],
                      pieces: Sequence[CorridorPiece]) -> list[tuple[float, ReceptorSpread]]:
    """The receptors (name, x, y [m]) inside this pathline's corridor, each with its plan
    distance [m] from the pathline point nearest to it and the plume's spread there;
    ``along`` holds the arc length and the cumulative ∫2α_T ds and ∫2α_TV ds [m²]."""
    s, var_t, var_v = (a[along[0] <= stop] for a in along)
    xy = path.points[:2, :s.size]
    out = []
    for name, rx, ry in receptors:
        d = np.hypot(xy[0] - rx, xy[1] - ry)
        j = int(np.argmin(d))
        cell = min((p.cell_size for p in pieces
                    if min(math.dist(q, (rx, ry)) for q in p.points) <= p.radius),
                   default=pieces[-1].cell_size)
        if d[j] <= max(path.half_width + SPREAD * math.sqrt(float(var_t[j])), cell):
            out.append((float(d[j]), ReceptorSpread(
                name=name, along=_sig(float(s[j])),
                sigma_t=_sig(math.sqrt(float(var_t[j]) + path.half_width**2 / 3.0)),
                sigma_v=_sig(math.sqrt(float(var_v[j]))), cell_size=cell)))
    return out


def _inside(px: FloatArray, py: FloatArray, outline: FloatArray) -> np.ndarray:
    """Even-odd test of points against a polygon ``(2, nv)`` [m]."""
    inside = np.zeros(px.shape, dtype=bool)
    x0, y0 = outline
    x1, y1 = np.roll(outline, -1, axis=1)
    for ax, ay, bx, by in zip(x0, y0, x1, y1, strict=True):
        crosses = (ay > py) != (by > py)
        with np.errstate(divide="ignore", invalid="ignore"):
            xc = ax + (py - ay) * (bx - ax) / (by - ay)
        inside ^= crosses & (px < xc)
    return inside


def _piece_sizes(pieces: Sequence[CorridorPiece], outline: FloatArray, spacing: float,
                 ) -> tuple[FloatArray, float]:
    """Plan cell size [m] at the points of a raster of ``spacing`` [m] covered by the
    corridor inside ``outline`` (the smallest over the pieces covering it), and the area
    [m²] of one raster cell."""
    lo, hi = outline.min(axis=1), outline.max(axis=1)
    gx, gy = (np.arange(lo[k] + 0.5 * spacing, hi[k], spacing) for k in (0, 1))
    px, py = (a.ravel() for a in np.meshgrid(gx, gy))
    keep = _inside(px, py, outline)
    px, py = px[keep], py[keep]
    size = np.full(px.shape, np.inf)
    for pc in pieces:
        d = _distance_near(pc.points, px, py, reach=pc.radius)
        size = np.where(d <= pc.radius, np.minimum(size, pc.cell_size), size)
    return size[np.isfinite(size)], spacing * spacing


#: Segments per stretch of a polyline whose bounding box :func:`_distance_near` tests.
SEGMENTS_PER_BOX = 8


def _distance_near(points: Sequence[tuple[float, float]], px: FloatArray, py: FloatArray,
                   *, reach: float) -> FloatArray:
    """Plan distance [m] from points ``(px, py)`` (any shape) to a polyline, exact where it
    is at most ``reach`` [m]; elsewhere some value above ``reach`` (``inf`` far off).

    Only the points in a bounding box widened by ``reach`` are measured: the polyline's
    box, then the boxes of its stretches of :data:`SEGMENTS_PER_BOX` segments. A point
    within ``reach`` of a segment lies in its stretch's widened box, and the distance to
    the polyline is the least over the segments, so the exact value is found there."""
    xy = np.asarray(points, dtype=float).T
    d = np.full(np.shape(px), np.inf)
    near = _in_box(xy, px, py, reach)
    qx, qy, dn = px[near], py[near], d[near]
    for k in range(0, max(xy.shape[1] - 1, 1), SEGMENTS_PER_BOX):
        stretch = xy[:, k:k + SEGMENTS_PER_BOX + 1]
        inside = _in_box(stretch, qx, qy, reach)
        dn[inside] = np.minimum(dn[inside], _polyline_distance(
            [tuple(p) for p in stretch.T], qx[inside], qy[inside]))
    d[near] = dn
    return d


def _in_box(xy: FloatArray, px: FloatArray, py: FloatArray, reach: float) -> np.ndarray:
    """Which points ``(px, py)`` [m] lie in the bounding box of ``xy`` ``(2, k)`` [m]
    widened by ``reach`` [m] and a further 1e-9 of its size (so that rounding cannot drop
    a point at exactly ``reach``)."""
    lo, hi = xy.min(axis=1), xy.max(axis=1)
    pad = reach + 1e-9 * (float((hi - lo).max()) + reach)
    return ((px >= lo[0] - pad) & (px <= hi[0] + pad)
            & (py >= lo[1] - pad) & (py <= hi[1] + pad))


def _polyline_distance(points: Sequence[tuple[float, float]], px: FloatArray,
                       py: FloatArray) -> FloatArray:
    """Plan distance [m] from points ``(px, py)`` (any shape) to a polyline."""
    d = np.full(np.shape(px), np.inf)
    for (ax, ay), (bx, by) in itertools.pairwise(points):
        dx, dy = bx - ax, by - ay
        ll = dx * dx + dy * dy
        t = np.clip(((px - ax) * dx + (py - ay) * dy) / ll, 0, 1) if ll > 0 else 0.0
        d = np.minimum(d, np.hypot(px - ax - t * dx, py - ay - t * dy))
    return d


def corridor_gap(corridor: Corridor, px: FloatArray, py: FloatArray, *,
                 within: float = math.inf) -> FloatArray:
    """Signed plan distance [m] from points ``(px, py)`` (any shape) to the corridor's edge:
    negative inside, positive outside (for drawing its outline).

    ``within`` [m]: the distance is exact where it lies within ±``within``; farther out it
    is some value above ``within``, farther in some value below −``within`` (points known
    to be that deep inside are not measured again, and only a strip along each piece is
    measured). The outline, the zero level, is the same for any ``within`` of at least a
    raster step times √2: the distance changes by at most the step between neighbouring
    raster points, so the raster cells the outline crosses have exact corners."""
    gap = np.full(np.size(px), np.inf)
    fx, fy = np.ravel(px), np.ravel(py)
    for pc in corridor.pieces:
        open_ = np.flatnonzero(gap >= -within)  # not yet known to be deep inside
        gap[open_] = np.minimum(gap[open_], _distance_near(
            pc.points, fx[open_], fy[open_], reach=pc.radius + within) - pc.radius)
    return gap.reshape(np.shape(px))


def _node_estimate(sizes: FloatArray, cell_area: float, plan_nodes: int, background: float,
                   levels: int) -> int:
    """Nodes of the mesh: the plan nodes of the first mesh plus the extra ones of an
    equilateral triangulation of edge FINE_SIZE_MARGIN·h over the corridor (nodes per area
    2/(√3 h²)), times the number of levels."""
    def density(h: FloatArray | float) -> FloatArray | float:
        return 2.0 / (math.sqrt(3.0) * h * h)

    extra = float(np.sum(np.maximum(density(FINE_SIZE_MARGIN * sizes) - density(background),
                                    0.0))) * cell_area
    return int((plan_nodes + extra) * levels)


def _levels(units: Sequence[UnitColumn], thickness: dict[str, float]) -> int:
    """Number of node levels of the extrusion (cell layers of every unit, plus one)."""
    return 1 + sum(max(1, math.ceil(u.thickness / thickness.get(u.name, u.cell_thickness)
                                    - 1e-9)) for u in units)


def plan_corridor(
    paths: Sequence[PathSample], *, peclet: float, end_time: float, outline: FloatArray,
    background_size: float, plan_nodes: int, units: Sequence[UnitColumn], max_nodes: int,
    receptors: Sequence[tuple[str, float, float]] = (),
) -> Corridor | None:
    """The corridor of ``paths`` (docs/theory.md M1–M4), coarsened to fit ``max_nodes``.

    Parameters
    ----------
    paths
        Forward pathlines with the dispersivities along them.
    peclet
        Target grid Péclet number h/α_L along the flow [-].
    end_time
        End of the simulated period [s] (the corridor ends where the water is then, plus
        the longitudinal spread).
    outline
        Plan boundary of the model [m], shape ``(2, n_vertices)``.
    background_size
        Plan cell size away from the corridor [m].
    plan_nodes
        Plan nodes of the mesh without the corridor.
    units
        The units top down, with their thickness and asked cell-layer thickness.
    max_nodes
        Node budget: above it, the corridor's plan cells and layers are coarsened by one
        common factor until the estimate fits (a warning line says so).
    receptors
        Name and plan position (x, y) [m] of the observation points and extraction wells: a
        unit's layers resolve σ_V at the nearest of them inside the corridor, not only at
        half its length (M4), and the record gives the plume's spread at each.

    Returns
    -------
    Corridor or None
        ``None`` when no path gives a corridor finer than the mesh already is.
    """
    pieces: list[CorridorPiece] = []
    length, thick = 0.0, {}
    nearest: dict[str, tuple[float, ReceptorSpread]] = {}
    for path in paths:
        if path.points.shape[1] < 2:
            continue
        got, stop, sigma_v, crossed, spreads = _pieces(path, peclet=peclet, end_time=end_time,
                                                       receptors=receptors)
        for d, spread in spreads:  # the pathline passing nearest to each receptor
            if d < nearest.get(spread.name, (math.inf,))[0]:
                nearest[spread.name] = (d, replace(spread, cell_size=min(spread.cell_size,
                                                                         background_size)))
        # α_L = 0 (diffusion only) gives no size: the grid Péclet number is then not h/α_L
        pieces += [p for p in got if 0.0 < p.cell_size < background_size]
        length = max(length, stop)
        finest = min(p.cell_size for p in got)
        if finest <= 0.0:
            continue
        for k in crossed[crossed < len(units)]:  # lenses keep the host's layers
            # scaled with the Péclet target, so a refinement study refines layers too
            dz = max(sigma_v / CELLS_PER_SPREAD * peclet / 2.0, finest / MAX_ASPECT)
            thick[int(k)] = min(thick.get(int(k), math.inf), dz)
    pieces = _distinct(pieces)
    if not pieces:
        return None
    layer_thickness = {units[k].name: dz for k, dz in sorted(thick.items())
                       if not units[k].fixed and dz < units[k].cell_thickness}
    spacing = 0.5 * min(p.cell_size for p in pieces)
    spacing = max(spacing, math.sqrt(float(np.ptp(outline, axis=1).prod()) / 4e6))
    sizes, cell_area = _piece_sizes(pieces, outline, spacing)

    def estimate(factor: float) -> int:
        dz = {k: min(v * factor, next(u.cell_thickness for u in units if u.name == k))
              for k, v in layer_thickness.items()}
        return _node_estimate(np.minimum(sizes * factor, background_size), cell_area,
                              plan_nodes, background_size, _levels(units, dz))

    factor, note = 1.0, ""
    wanted = estimate(1.0)
    if wanted > max_nodes:
        lo, hi = 1.0, background_size / min(p.cell_size for p in pieces)
        if estimate(hi) > max_nodes:
            factor = hi
        else:
            for _ in range(40):
                mid = math.sqrt(lo * hi)
                lo, hi = (mid, hi) if estimate(mid) > max_nodes else (lo, mid)
            factor = hi
        note = (f"plume corridor: about {wanted:,} nodes at grid Péclet {peclet:g} exceed "
                f"mesh.max_nodes = {max_nodes:,}; cells coarsened by {factor:.3g}× to grid "
                f"Péclet {_sig(peclet * factor, 3):g} (about {estimate(factor):,} nodes)")
        logger.warning("%s", note)
    return _finish(pieces, layer_thickness, units, factor=factor, peclet=peclet,
                   length=length, expected=estimate(factor), note=note,
                   receptors=tuple(r for _, r in nearest.values()))


def _distinct(pieces: list[CorridorPiece]) -> list[CorridorPiece]:
    """Pieces rounded to a stable key (coordinates to 1e-3 of the cell size, sizes to four
    significant digits), duplicates dropped (pathlines from seeds above one another)."""
    out: dict[tuple[Any, ...], CorridorPiece] = {}
    for p in pieces:
        q = 1e-3 * p.cell_size
        pts = tuple((_sig(round(x / q) * q, 8), _sig(round(y / q) * q, 8)) for x, y in p.points)
        r = CorridorPiece(points=pts, radius=_sig(p.radius), cell_size=_sig(p.cell_size))
        key = (tuple(np.round(np.array(pts) / (0.5 * r.cell_size)).astype(int).ravel()),
               r.radius, r.cell_size)
        out.setdefault(key, r)
    return list(out.values())


def _finish(pieces: list[CorridorPiece], layer_thickness: dict[str, float],
            units: Sequence[UnitColumn], *, factor: float, peclet: float, length: float,
            expected: int, note: str, receptors: tuple[ReceptorSpread, ...]) -> Corridor:
    """The corridor record, with sizes multiplied by the budget ``factor``."""
    asked = {u.name: u.cell_thickness for u in units}
    scaled = [replace(p, cell_size=_sig(p.cell_size * factor),
                      radius=_sig(max(p.radius, 2.0 * p.cell_size * factor))) for p in pieces]
    dz = {k: _sig(min(v * factor, asked[k])) for k, v in layer_thickness.items()
          if v * factor < asked[k]}
    widths = [2.0 * p.radius for p in scaled]
    cells = [p.cell_size for p in scaled]
    return Corridor(pieces=tuple(scaled), layer_thickness=dz, peclet_target=peclet,
                    peclet_reached=_sig(peclet * factor, 3), length=_sig(length),
                    width_range=(min(widths), max(widths)),
                    cell_size_range=(min(cells), max(cells)), expected_nodes=expected,
                    note=note, receptors=tuple(replace(r, cell_size=_sig(r.cell_size * factor))
                                               for r in receptors))


def corridor_zones(corridor: Corridor) -> list[tuple[list[tuple[float, float]], float, float]]:
    """(plan polyline [m], cell size [m], radius [m]) of every piece, for the mesher."""
    return [(list(p.points), p.cell_size, p.radius) for p in corridor.pieces]


def project_to_edges(p: tuple[float, float], verts: list[tuple[float, float]],
                      which: list[int]) -> tuple[float, float]:
    """The point of the polygon edges ``which`` (edge i: vertex i → i + 1) nearest to the
    plan point ``p`` [m]."""
    best, out = math.inf, p
    for i in which:
        (ax, ay), (bx, by) = verts[i], verts[(i + 1) % len(verts)]
        dx, dy = bx - ax, by - ay
        t = max(0.0, min(1.0, ((p[0] - ax) * dx + (p[1] - ay) * dy) / (dx * dx + dy * dy)))
        q = (ax + t * dx, ay + t * dy)
        d = math.hypot(p[0] - q[0], p[1] - q[1])
        if d < best:
            best, out = d, q
    return out


def _source_half_widths(case: Case, seeds: FloatArray, name: str) -> float:
    """Largest plan distance [m] from a corner of the source to the nearest seed."""
    src = next(s for s in case.sources if s.name == name)
    if src.points is not None:
        pts = np.array(src.points, dtype=float)[:, :2]
    else:
        verts, names = case.outline()
        v = np.array(verts, dtype=float)
        x0, x1 = src.x if src.x is not None else (v[:, 0].min(), v[:, 0].max())
        y0, y1 = src.y if src.y is not None else (v[:, 1].min(), v[:, 1].max())
        corners = [(x0, y0), (x1, y0), (x1, y1), (x0, y1)]
        if src.shape == "face_patch" and src.face in names:  # its trace on that face
            which = [i for i, n in enumerate(names) if n == src.face]
            corners = [project_to_edges(c, verts, which) for c in corners]
        pts = np.array(corners, dtype=float)
    d = np.hypot(pts[:, None, 0] - seeds[None, 0], pts[:, None, 1] - seeds[None, 1])
    return float(d.min(axis=1).max())


def _fastest_retardation(case: Case, source: str, mats: Sequence[Any],
                         keys: Sequence[str]) -> FloatArray:
    """Smallest linear retardation R = 1 + ρ_b K_d/θ per unit [-] over the species a source
    releases and every species its decay makes (M3): the corridor reaches as far as the
    fastest of them can travel. A nonlinear isotherm or a user reaction law counts as R = 1
    (no retardation assumed: the corridor is then as long as the water's travel)."""
    src = next((s for s in case.sources if s.name == source), None)
    names = set() if src is None else {src.species}
    while True:  # the decay chain below the source's species
        more = {n for n, sp in case.species.items() if sp.parent in names} - names
        if not more:
            break
        names |= more
    r = np.ones(len(mats))
    if src is None or case.user_reactions is not None:
        return r
    for k, (mat, key) in enumerate(zip(mats, keys, strict=True)):
        r[k] = min((1.0 + mat.bulk_density * case.species[n].kd_of(key) / mat.porosity
                    if case.species[n].sorption == "linear" else 1.0) for n in names)
    return r


def site_corridor(case: Case, site: SiteMesh,
                  pathlines: dict[str, list[tuple[FloatArray, FloatArray, IndexArray]]],
                  ) -> Corridor | None:
    """The corridor of ``case`` from forward pathlines tracked on ``site`` (the first mesh).

    ``pathlines`` maps a source name to its pathlines as (points ``(3, k)`` [m], the water's
    travel times ``(k,)`` [s], the cell of ``site`` the particle moves through from each
    point ``(k,)``, as the tracker recorded it). Reads the unit of each stretch, the
    source extents, the
    retardation of the fastest species the source makes (:func:`_fastest_retardation`) and
    the ``[mesh]`` settings; returns ``None`` when nothing needs refining.
    """
    from fe3d.mesh.materials import unit_materials

    mats, keys = unit_materials(Ground.of(case), site)
    alpha = np.array([[m.longitudinal_dispersivity, m.transverse_dispersivity,
                       m.alpha_vertical] for m in mats])
    samples = []
    for name, lines in pathlines.items():
        seeds = np.array([p[:, 0] for p, _, _ in lines]).T if lines else np.zeros((3, 0))
        half = _source_half_widths(case, seeds, name) if lines else 0.0
        retardation = _fastest_retardation(case, name, mats, keys)
        for points, water_times, cells in lines:
            unit = site.cell_layer[np.maximum(cells, 0)]  # −1: a start outside the mesh
            a = alpha[unit]
            times = np.concatenate([[0.0], np.cumsum(retardation[unit[:-1]]
                                                     * np.diff(water_times))])
            samples.append(PathSample(points=points, times=times, alpha_l=a[:, 0],
                                      alpha_t=a[:, 1], alpha_tv=a[:, 2], unit=unit,
                                      half_width=half))
    mc = case.mesh
    report = site.report
    assert report is not None and report.plan is not None
    surf = report.plan.surfaces
    units = [UnitColumn(name=ly.name, thickness=float((surf[k] - surf[k + 1]).max()),
                        cell_thickness=ly.cell_thickness or mc.layer_cell_thickness,
                        fixed=ly.sublayers is not None) for k, ly in enumerate(case.layers)]
    verts, _ = case.outline()
    receptors = [(p.name, p.x, p.y) for p in case.observation_points] + [
        (w.name, w.x, w.y) for w in case.wells if w.kind == "extraction"]
    return plan_corridor(samples, peclet=mc.corridor_peclet, end_time=case.time.end,
                         outline=np.array(verts, dtype=float).T,
                         background_size=mc.cell_size, plan_nodes=int(report.plan.xy.shape[1]),
                         units=units, max_nodes=mc.max_nodes, receptors=receptors)
