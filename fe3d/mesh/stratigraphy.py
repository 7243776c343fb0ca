"""Layer surfaces at the plan nodes: interpolation of picks and the pinch-out and crossing rules.

Pure numpy/scipy; knows nothing of gmsh or finite elements. docs/theory.md (mesh section)
states the rules; every application is reported.

Interpolation methods (chosen per case, ``stratigraphy.interpolation``):

- ``linear``: linear on the Delaunay triangulation of the data points (scipy
  ``LinearNDInterpolator``). Outside the convex hull of the data the value is the one at the
  nearest point of the hull boundary (linear along that hull edge): continuous, never beyond
  the range of the data.
- ``thin_plate``: thin-plate spline radial basis function with a degree-1 polynomial part
  (scipy ``RBFInterpolator``, no smoothing); it reproduces planes and extrapolates smoothly.

Both pass through every data point (to round-off).

A surface given on a regular grid (``stratigraphy.grids`` / ``grid_files``) is taken from the
grid alone, bilinearly in each grid rectangle (:func:`grid_surface`); it equals the grid
values at the grid nodes.

Rules, applied top down at every plan node (t_min = ``stratigraphy.min_thickness``):

1. Crossing: a unit base above the unit's top is lowered onto the top (the surface above
   wins); the unit is absent there.
2. Pinch-out: a unit thinner than t_min (but not absent) is removed there: its base is raised
   to its top, so the sliver joins the unit below. For the lowest unit the sliver joins the
   nearest unit above instead (the model base never moves).
3. The whole model must be at least t_min thick at every node; otherwise the build stops.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

from fe3d._typing import FloatArray
from fe3d.errors import MeshError

if TYPE_CHECKING:
    from fe3d.case.schema import Case

__all__ = ["RuleApplied", "grid_surface", "interpolate_surface", "surface_data",
           "unit_surfaces"]


@dataclass(frozen=True)
class RuleApplied:
    """Where a surface rule changed the interpolated surfaces (plan nodes)."""

    unit: str
    rule: str  # "crossing" or "pinch_out"
    n_nodes: int
    area: float  # plan area [m²] of the nodes' shares of the plan triangles
    x_range: tuple[float, float]
    y_range: tuple[float, float]
    boreholes: tuple[str, ...]

    def line(self) -> str:
        """One line for the mesh report."""
        at = f" (boreholes {', '.join(self.boreholes)})" if self.boreholes else ""
        return (f"{self.rule.replace('_', '-')} rule applied to unit {self.unit!r} at "
                f"{self.n_nodes} plan nodes, {self.area:.4g} m², x {self.x_range[0]:.1f}–"
                f"{self.x_range[1]:.1f} m, y {self.y_range[0]:.1f}–{self.y_range[1]:.1f} m{at}")

    def as_dict(self) -> dict[str, Any]:
        """JSON-ready form."""
        return {"unit": self.unit, "rule": self.rule, "n_nodes": self.n_nodes,
                "area_m2": self.area, "x_range_m": list(self.x_range),
                "y_range_m": list(self.y_range), "boreholes": list(self.boreholes)}

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> RuleApplied:
        """Inverse of :meth:`as_dict`."""
        return cls(unit=data["unit"], rule=data["rule"], n_nodes=int(data["n_nodes"]),
                   area=float(data["area_m2"]), x_range=tuple(data["x_range_m"]),
                   y_range=tuple(data["y_range_m"]), boreholes=tuple(data["boreholes"]))


def interpolate_surface(data_xy: FloatArray, data_z: FloatArray, xy: FloatArray, *,
                        method: str, what: str) -> FloatArray:
    """Interpolate scattered elevations to plan points.

    Parameters
    ----------
    data_xy, data_z
        Data points [m], shape ``(2, k)``, and their elevations [m], shape ``(k,)``.
    xy
        Where to evaluate [m], shape ``(2, n)``.
    method
        ``"linear"`` or ``"thin_plate"`` (module docstring).
    what
        Name of the surface, for error messages.
    """
    from scipy.interpolate import LinearNDInterpolator, RBFInterpolator
    from scipy.spatial import ConvexHull, QhullError

    k = data_xy.shape[1]
    centre = data_xy.mean(axis=1, keepdims=True)
    scale = float(np.ptp(data_xy, axis=1).max()) or 1.0
    d = ((data_xy - centre) / scale).T
    q = ((xy - centre) / scale).T
    _, first = np.unique(np.round(d, 12), axis=0, return_index=True)
    if first.size < k:
        msg = f"surface {what!r}: two data points share the same plan position"
        raise MeshError(msg)
    try:
        if k < 3:
            raise QhullError
        if method == "thin_plate":
            z = RBFInterpolator(d, data_z, kernel="thin_plate_spline", degree=1)(q)
        else:
            lin = LinearNDInterpolator(d, data_z)
            z = lin(q)
            out = np.isnan(z)
            if out.any():
                z[out] = _hull_edge_values(d, data_z, ConvexHull(d), q[out])
    except (QhullError, np.linalg.LinAlgError, ValueError):
        msg = (f"surface {what!r}: {method} interpolation needs at least 3 data points not on "
               f"one line (found {k})")
        raise MeshError(msg) from None
    return np.asarray(z, dtype=float)


def grid_surface(x: FloatArray, y: FloatArray, z: FloatArray, xy: FloatArray) -> FloatArray:
    """Bilinear interpolation on a regular grid.

    Parameters
    ----------
    x, y
        Grid node coordinates [m], strictly increasing, shapes ``(nx,)`` and ``(ny,)``.
    z
        Elevations [m] at (x[i], y[j]), shape ``(ny, nx)``.
    xy
        Where to evaluate [m], shape ``(2, n)``; points outside the grid (round-off) take
        the value at the nearest point of the grid's edge.
    """
    x, y, z = (np.asarray(a, dtype=float) for a in (x, y, z))
    px = np.clip(xy[0], x[0], x[-1])
    py = np.clip(xy[1], y[0], y[-1])
    i = np.clip(np.searchsorted(x, px, side="right") - 1, 0, x.size - 2)
    j = np.clip(np.searchsorted(y, py, side="right") - 1, 0, y.size - 2)
    u = (px - x[i]) / (x[i + 1] - x[i])
    v = (py - y[j]) / (y[j + 1] - y[j])
    return ((1 - u) * (1 - v) * z[j, i] + u * (1 - v) * z[j, i + 1]
            + (1 - u) * v * z[j + 1, i] + u * v * z[j + 1, i + 1])


def _hull_edge_values(d: FloatArray, z: FloatArray, hull: Any, q: FloatArray) -> FloatArray:
    """Value at the nearest point of the hull boundary, linear along the hull edge."""
    a, b = d[hull.simplices[:, 0]], d[hull.simplices[:, 1]]  # (e, 2)
    ab = b - a
    L2 = np.einsum("ij,ij->i", ab, ab)
    t = np.einsum("qej,ej->qe", q[:, None, :] - a[None], ab) / L2
    t = np.clip(t, 0.0, 1.0)
    near = a[None] + t[..., None] * ab[None]
    dist = np.linalg.norm(q[:, None, :] - near, axis=2)
    e = np.argmin(dist, axis=1)
    te = t[np.arange(q.shape[0]), e]
    za, zb = z[hull.simplices[e, 0]], z[hull.simplices[e, 1]]
    return za + te * (zb - za)


def surface_data(case: Case) -> dict[str, tuple[FloatArray, FloatArray]]:
    """Data points of every surface given by picks: ``"ground"`` and unit names.

    A borehole where a unit is absent fixes that unit's base at the surface above there
    (zero thickness), so every borehole is a data point of every picked surface.
    """
    strat = case.stratigraphy
    assert strat is not None
    x0, y0 = _origin(case)
    out: dict[str, tuple[FloatArray, FloatArray]] = {}
    bh = strat.boreholes
    prev = np.array([b.ground for b in bh], dtype=float)
    if bh or strat.surface_points.get("ground"):
        out["ground"] = _with_points(bh, prev, strat.surface_points.get("ground", []))
    picked = {u for b in bh for u, z in b.bases.items() if z is not None}
    for layer in case.layers:
        if layer.bottom is not None:
            here = np.array([layer.bottom_at(b.x, b.y, x0, y0) for b in bh], dtype=float)
        else:
            here = np.array([b.bases.get(layer.name) if b.bases.get(layer.name) is not None
                             else p for b, p in zip(bh, prev, strict=True)], dtype=float)
            if layer.name in picked or layer.name in strat.surface_points:
                pts = strat.surface_points.get(layer.name, [])
                out[layer.name] = _with_points(bh if layer.name in picked else [], here
                                               if layer.name in picked else here[:0], pts)
        prev = here
    return out


def _origin(case: Case) -> tuple[float, float]:
    verts = case.outline()[0]
    return min(v[0] for v in verts), min(v[1] for v in verts)


def _with_points(bh: list[Any], z: FloatArray, pts: list[tuple[float, float, float]],
                 ) -> tuple[FloatArray, FloatArray]:
    xy = [(b.x, b.y) for b in bh] + [(p[0], p[1]) for p in pts]
    zz = list(z) + [p[2] for p in pts]
    return np.array(xy, dtype=float).reshape(-1, 2).T, np.array(zz, dtype=float)


def unit_surfaces(case: Case, xy: FloatArray, node_area: FloatArray,
                  borehole_nodes: dict[str, int] | None = None,
                  ) -> tuple[list[FloatArray], list[RuleApplied]]:
    """Ground and unit-base elevations at the plan nodes after the rules (module docstring).

    Parameters
    ----------
    case
        The case (outline, layers, stratigraphy).
    xy
        Plan nodes [m], shape ``(2, n)``.
    node_area
        Plan area share of each node [m²], shape ``(n,)`` (for the report).
    borehole_nodes
        Plan node of each borehole (for the report).

    Returns
    -------
    surfaces, applied
        ``len(layers) + 1`` arrays of shape ``(n,)`` (ground first), and the rule report.
    """
    strat = case.stratigraphy
    x0, y0 = _origin(case)
    n = xy.shape[1]
    data = surface_data(case) if strat is not None else {}
    method = strat.interpolation if strat is not None else "linear"
    t_min = strat.min_thickness if strat is not None else 0.0
    grids = strat.grids if strat is not None else {}

    def from_grid(name: str) -> FloatArray:
        g = grids[name]
        return grid_surface(np.asarray(g.x), np.asarray(g.y), np.asarray(g.z), xy)

    if "ground" in grids:
        ground = from_grid("ground")
    elif "ground" in data:
        ground = interpolate_surface(*data["ground"], xy, method=method, what="ground")
    else:
        ground = np.full(n, case.z_top)
    surfaces = [ground]
    for layer in case.layers:
        if layer.bottom is not None:
            gx, gy = layer.bottom_gradient
            surfaces.append(layer.bottom + gx * (xy[0] - x0) + gy * (xy[1] - y0))
        elif layer.name in grids:
            surfaces.append(from_grid(layer.name))
        else:
            surfaces.append(interpolate_surface(*data[layer.name], xy, method=method,
                                                what=layer.name))
    applied: list[RuleApplied] = []
    names = {v: k for k, v in (borehole_nodes or {}).items()}

    def report(unit: str, rule: str, mask: np.ndarray) -> None:
        if mask.any():
            idx = np.nonzero(mask)[0]
            applied.append(RuleApplied(
                unit=unit, rule=rule, n_nodes=int(idx.size), area=float(node_area[idx].sum()),
                x_range=(float(xy[0, idx].min()), float(xy[0, idx].max())),
                y_range=(float(xy[1, idx].min()), float(xy[1, idx].max())),
                boreholes=tuple(sorted(names[i] for i in idx if i in names))))

    last = len(case.layers) - 1
    _check_total(case, xy, surfaces, t_min)
    for k, layer in enumerate(case.layers):
        top, base = surfaces[k], surfaces[k + 1]
        cross = base > top
        report(layer.name, "crossing", cross)
        base = np.where(cross, top, base)
        thick = top - base
        thin = (thick > 0) & (thick < t_min)
        report(layer.name, "pinch_out", thin)
        if k < last:
            base = np.where(thin, top, base)
        else:  # the sliver joins the nearest unit above: lower the run of equal surfaces
            old = top.copy()
            for j in range(k, 0, -1):
                sel = thin & (surfaces[j] == old)
                surfaces[j] = np.where(sel, base, surfaces[j])
        surfaces[k + 1] = base
    _check_total(case, xy, surfaces, t_min)
    return surfaces, applied


def _check_total(case: Case, xy: FloatArray, surfaces: list[FloatArray], t_min: float) -> None:
    total = surfaces[0] - surfaces[-1]
    if np.any(total < max(t_min, 1e-9 * max(1.0, float(np.abs(total).max())))):
        i = int(np.argmin(total))
        msg = (f"the model is only {total[i]:.3g} m thick at x = {xy[0, i]:.2f} m, "
               f"y = {xy[1, i]:.2f} m (base of {case.layers[-1].name!r} at {surfaces[-1][i]:.3f}"
               f" m, ground at {surfaces[0][i]:.3f} m); it must be at least "
               f"stratigraphy.min_thickness = {t_min:g} m thick everywhere")
        raise MeshError(msg)
