"""Matplotlib figures (off-screen); the only matplotlib user in fe3d."""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from fe3d._typing import FloatArray
from fe3d.mesh.corridor import Corridor, corridor_gap
from fe3d.post.files import write_atomic
from fe3d.post.maps import SiteFeatures
from fe3d.units import from_si

__all__ = [
    "CAUTION",
    "CONCENTRATION_COLOURS",
    "DRAWDOWN_COLOURS",
    "HEAD_COLOURS",
    "draw_site",
    "place_labels",
    "plot_breakthrough",
    "plot_heads",
    "plot_plume_over_time",
    "plot_refinement_breakthrough",
    "pyplot",
    "save_figure",
]

# One style for every figure. Sequential colour maps whose lightness changes monotonically
# (light = low), so that they read in grey scale too (matplotlib's colour map notes).
CONCENTRATION_COLOURS = "YlOrRd"
HEAD_COLOURS = "Blues"
DRAWDOWN_COLOURS = "Purples"
FORWARD_STYLE = {"color": "firebrick", "linewidth": 0.9, "linestyle": "-"}
BACKWARD_STYLE = {"color": "navy", "linewidth": 0.8, "linestyle": (0, (4, 2))}
CAUTION = ("Screening estimate: depends on the inputs; defer to local regulations and "
           "licensed professional practice.")
_MARK_STYLE = {"source": ("*", "firebrick"), "extraction": ("v", "navy"),
               "injection": ("^", "teal"), "observation": ("D", "dimgray"),
               "monitoring": ("o", "black"), "receptor": ("s", "black")}


def pyplot() -> Any:
    """matplotlib.pyplot on the off-screen Agg backend (no display needed)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def save_figure(fig: Any, path: Path, *, dpi: int = 130) -> Path:
    """The caution along the bottom edge, PNG written atomically, figure closed."""
    fig.text(0.01, 0.005, CAUTION, fontsize=6.5, color="0.25")
    write_atomic(path, lambda p: fig.savefig(p, dpi=dpi, format="png"))
    pyplot().close(fig)
    return path


def draw_site(ax: Any, features: SiteFeatures) -> list[tuple[str, float, float]]:
    """Draw the site outline, fixed-head edges, streams, lenses, source areas and marks;
    returns the labels (text, x, y [m]) for :func:`place_labels`."""
    o = features.outline.xy
    ax.plot(*np.hstack([o, o[:, :1]]), color="black", linewidth=1.2, label="site outline")
    labels = []
    for i, e in enumerate(features.fixed_head_edges):
        ax.plot(*e.xy, color="royalblue", linewidth=3.0, alpha=0.8, solid_capstyle="butt",
                label="fixed head" if i == 0 else None)
        if e.name not in [text for text, _, _ in labels]:
            labels.append((e.name, float(e.xy[0].mean()), float(e.xy[1].mean())))
    for i, z in enumerate(features.streams):
        ax.fill(*z.xy, facecolor="none", edgecolor="royalblue", hatch="---", linewidth=0.8,
                label="stream or drain zone" if i == 0 else None)
    for i, lens in enumerate(features.lenses):
        ax.fill(*lens.xy, facecolor="none", edgecolor="saddlebrown", linestyle=":",
                linewidth=1.0, label="lens" if i == 0 else None)
    for i, a in enumerate(features.source_areas):
        xy = np.hstack([a.xy, a.xy[:, :1]]) if a.closed else a.xy
        ax.plot(*xy, color="white", linewidth=3.0)
        ax.plot(*xy, color="black", linewidth=1.2, linestyle="--",
                label="source area" if i == 0 else None)
        labels.append((a.name, float(a.xy[0].max()), float(a.xy[1].max())))
    seen = set()
    for m in sorted(features.marks, key=lambda m: m.kind in ("extraction", "injection")):
        marker, colour = _MARK_STYLE.get(m.kind, ("o", "black"))
        size = 9 if m.kind in ("extraction", "injection") else 6
        ax.plot(m.x, m.y, marker=marker, color=colour, markersize=size, linestyle="none",
                markeredgecolor="white", markeredgewidth=0.6,
                label=None if m.kind in seen else f"{m.kind} well" if m.kind in
                ("extraction", "injection") else f"{m.kind} point")
        seen.add(m.kind)
        labels.append((m.name, m.x, m.y))
    return labels


def place_labels(ax: Any, labels: list[tuple[str, float, float]], *, fontsize: float = 7.0
                 ) -> list[Any]:
    """Write each label beside its point, trying eight positions around it and keeping the
    first that stays inside the axes and overlaps no label placed before (the last try is
    kept when none fits). Returns the text artists."""
    fig = ax.figure
    renderer = fig.canvas.get_renderer()
    box = ax.get_window_extent(renderer)
    placed: list[Any] = []
    texts: list[Any] = []
    offsets = [(5, 5), (5, -11), (-5, 5), (-5, -11), (8, -3), (-8, -3), (0, 9), (0, -14)]
    for text, x, y in labels:
        for dx, dy in offsets:
            t = ax.annotate(text, (x, y), xytext=(dx, dy), textcoords="offset points",
                            fontsize=fontsize, ha="left" if dx > 0 else
                            "right" if dx < 0 else "center",
                            bbox={"boxstyle": "round,pad=0.15", "facecolor": "white",
                                  "edgecolor": "none", "alpha": 0.75}, annotation_clip=True)
            ext = t.get_window_extent(renderer)
            fits = (box.x0 <= ext.x0 and ext.x1 <= box.x1 and box.y0 <= ext.y0
                    and ext.y1 <= box.y1)
            if fits and not any(ext.overlaps(p) for p in placed):
                break
            if (dx, dy) != offsets[-1]:
                t.remove()
        placed.append(ext)
        texts.append(t)
    return texts


def plot_breakthrough(path: Path, times: FloatArray, history: dict[str, FloatArray],
                      names: list[str], limits: dict[str, float], *, time_unit: str,
                      conc_unit: str, title: str,
                      source_activity: dict[str, list[tuple[float, float]]] | None = None
                      ) -> Path:
    """Breakthrough curves, one panel per species, with the species' limit drawn and the
    periods when its sources are active (``source_activity``: species → (start, stop) [s])
    shaded. A limit far below the peak gets a symmetric log axis, linear within a tenth of
    the limit of zero, so that small and negative values stay visible (no cliffs)."""
    plt = pyplot()
    n = len(history)
    fig, axes = plt.subplots(n, 1, figsize=(8, 3.2 * n), squeeze=False, sharex=True)
    t = from_si(1.0, time_unit) * times
    scale = from_si(1.0, conc_unit)
    for ax, (sp, values) in zip(axes[:, 0], history.items(), strict=True):
        for j, name in enumerate(names):
            ax.plot(t, values[:, j] * scale, label=name)
        peak = float(values.max()) * scale if values.size else 0.0
        for k, (start, stop) in enumerate((source_activity or {}).get(sp, [])):
            ax.axvspan(start * from_si(1.0, time_unit), stop * from_si(1.0, time_unit),
                       color="0.88", zorder=0, label="source active" if k == 0 else None)
        _limit_line(ax, limits[sp] * scale, peak, conc_unit,
                    lowest=float(values.min()) * scale if values.size else 0.0)
        ax.set_ylabel(f"{sp} [{conc_unit}]")
    axes[-1, 0].set_xlabel(f"time [{time_unit}]")
    fig.suptitle(title, fontsize=10)
    fig.tight_layout(rect=(0, 0.03, 1, 1))
    return save_figure(fig, path, dpi=120)


def plot_heads(path: Path, points: FloatArray, top_triangles: FloatArray, head: FloatArray,
               top_flux: tuple[FloatArray, FloatArray], *,
               markers: dict[str, tuple[float, float]], pathlines: list[FloatArray],
               title: str, corridor: Corridor | None = None,
               backward_pathlines: Sequence[FloatArray] = ()) -> Path:
    """Plan view of the head on the top face: labelled contours, flow arrows, pathlines,
    and the outline of the plume ``corridor`` the mesh was refined along (when given).

    ``top_flux`` is (centres ``(2, k)`` [m], horizontal Darcy flux ``(2, k)`` [m/s]) of the
    cells under the top face; ``markers`` maps a label to a plan position [m];
    ``pathlines`` are drawn solid and ``backward_pathlines`` (from wells) dashed. For the
    head at the pumped unit's elevation with capture zones, see
    :func:`fe3d.post.map_figures.plot_head_map`.
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from matplotlib.tri import Triangulation

    tri = Triangulation(points[0], points[1], top_triangles.T)
    fig, ax = plt.subplots(figsize=(8, 6))
    filled = ax.tricontourf(tri, head, levels=20, cmap=HEAD_COLOURS, alpha=0.7)
    lines = ax.tricontour(tri, head, levels=12, colors="k", linewidths=0.6)
    ax.clabel(lines, fmt="%.2f", fontsize=7)
    fig.colorbar(filled, ax=ax, label="head [m]", shrink=0.8, pad=0.02)
    (cx, cy), (qx, qy) = top_flux
    step = max(1, cx.size // 250)
    speed = np.hypot(qx, qy)
    scale = np.where(speed > 0, 1.0 / np.where(speed > 0, speed, 1.0), 0.0)
    ax.quiver(cx[::step], cy[::step], (qx * scale)[::step], (qy * scale)[::step],
              color="tab:blue", alpha=0.7, width=0.002, label="flow direction")
    for i, p in enumerate(pathlines):
        ax.plot(p[0], p[1], **FORWARD_STYLE, label="pathlines" if i == 0 else None)
    for i, p in enumerate(backward_pathlines):
        ax.plot(p[0], p[1], **BACKWARD_STYLE,
                label="backward from extraction wells" if i == 0 else None)
    if corridor is not None:
        _draw_corridor(ax, corridor, points)
    for x, y in markers.values():
        ax.plot(x, y, "k^", markersize=5)
    ax.set_aspect("equal")
    ax.set_xlabel("x [m]")
    ax.set_ylabel("y [m]")
    ax.set_title(title, fontsize=10)
    ax.legend(fontsize=7, loc="upper left", bbox_to_anchor=(0.0, -0.13), ncol=3, frameon=False)
    fig.tight_layout(rect=(0, 0.03, 1, 1))
    place_labels(ax, [(label, x, y) for label, (x, y) in markers.items()])
    return save_figure(fig, path, dpi=120)


def _draw_corridor(ax: Any, corridor: Corridor, points: FloatArray) -> None:
    """The corridor's outline: the boundary of the union of its pieces (discs swept along
    each polyline), traced as the 0 contour of a distance raster over the model."""
    lo, hi = points[:2].min(axis=1), points[:2].max(axis=1)
    step = max(float((hi - lo).max()) / 600.0, 0.25 * min(p.cell_size for p in corridor.pieces))
    gx, gy = (np.arange(lo[k], hi[k] + step, step) for k in (0, 1))
    px, py = np.meshgrid(gx, gy)
    # [m] beyond the corridor's edge, exact within two raster steps of it (where the zero
    # contour is traced); farther out only its sign matters, capped to stay finite
    within = 2.0 * step
    gap = np.minimum(corridor_gap(corridor, px, py, within=within), 2.0 * within)
    ax.contour(gx, gy, gap, levels=[0.0], colors="darkorange", linewidths=1.0,
               linestyles="--")
    ax.plot([], [], color="darkorange", linestyle="--", linewidth=1.0,
            label=f"refined corridor (grid Péclet {corridor.peclet_reached:g})")


def plot_refinement_breakthrough(path: Path, levels: list[tuple[str, FloatArray,
                                                                dict[str, FloatArray]]],
                                 names: list[str], limits: dict[str, float], *,
                                 time_unit: str, conc_unit: str, title: str) -> Path:
    """Breakthrough curves of every refinement level overlaid, one panel per observation
    point and species, with the species' limit drawn.

    ``levels`` holds (label, times ``(n_t,)`` [s], concentrations per species
    ``(n_t, len(names))`` [kg/m³]) per level, coarse first.
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    species = list(limits)
    panels = [(j, sp) for j in range(len(names)) for sp in species]
    fig, axes = plt.subplots(len(panels), 1, figsize=(8, 2.8 * len(panels)), squeeze=False,
                             sharex=True)
    tscale, scale = from_si(1.0, time_unit), from_si(1.0, conc_unit)
    for ax, (j, sp) in zip(axes[:, 0], panels, strict=True):
        peak, lowest = 0.0, 0.0
        for k, (label, times, history) in enumerate(levels):
            values = history[sp][:, j] * scale
            peak = max(peak, float(values.max()) if values.size else 0.0)
            lowest = min(lowest, float(values.min()) if values.size else 0.0)
            ax.plot(times * tscale, values, label=label, linewidth=1.0 + 0.5 * k)
        _limit_line(ax, limits[sp] * scale, peak, conc_unit, lowest=lowest)
        ax.set_ylabel(f"{names[j]} {sp}\n[{conc_unit}]", fontsize=8)
    axes[-1, 0].set_xlabel(f"time [{time_unit}]")
    fig.suptitle(title, fontsize=10)
    _save_with_caution(fig, path)
    return path


def _limit_line(ax: Any, lim: float, peak: float, conc_unit: str, *,
                lowest: float = 0.0) -> None:
    """The limit as a dashed line; a symmetric log axis (linear within lim/10 of zero, so
    zero and negative values, down to ``lowest``, are drawn, not cut off) when the limit is
    far below the peak."""
    ax.axhline(lim, color="k", linestyle="--", linewidth=1.0,
               label=f"limit {lim:.3g} {conc_unit}")
    if peak > 50.0 * lim:  # a limit far below the peak is invisible on a linear axis
        linear = lim / 10.0
        ax.set_yscale("symlog", linthresh=linear, linscale=0.6)
        ticks = list(10.0 ** np.arange(np.ceil(np.log10(linear)),
                                       np.ceil(np.log10(2.0 * peak)) + 1))
        ticks = [0.0, *ticks[::max(1, len(ticks) // 7)]]
        if 1.5 * lowest <= -linear:
            ticks = [-linear, *ticks]
        ax.set_yticks(ticks, labels=[f"{v:.3g}" for v in ticks])
        ax.minorticks_off()
        ax.set_ylim(min(1.5 * lowest, -0.5 * linear), 2.0 * peak)
        ax.axhspan(-linear, linear, color="0.95", zorder=0,
                   label=f"linear scale within ±{linear:.3g} {conc_unit}")
    ax.grid(visible=True, alpha=0.3)
    ax.legend(fontsize=7, loc="upper right")


def _save_with_caution(fig: Any, path: Path) -> None:
    """Laid out above the caution line, then :func:`save_figure`."""
    fig.tight_layout(rect=(0, 0.03, 1, 1))
    save_figure(fig, path, dpi=110)


def plot_plume_over_time(path: Path, plumes: dict[str, tuple[FloatArray, FloatArray,
                                                             FloatArray]], *,
                         limits: dict[str, float], time_unit: str, conc_unit: str,
                         mass_unit: str = "kg", site: str) -> Path:
    """Volume of aquifer [m³] and dissolved mass [kg] above each species' limit over time:
    ``plumes`` maps a species to (times [s], volume [m³], dissolved mass [kg]), each
    ``(n_t,)``; ``limits`` [kg/m³] name the level in the legend."""
    plt = pyplot()
    n = len(plumes)
    fig, axes = plt.subplots(2, n, figsize=(4.2 * n + 1.0, 5.6), sharex=True, squeeze=False)
    tscale, mscale = from_si(1.0, time_unit), from_si(1.0, mass_unit)
    for (top, bottom), (sp, (times, volume, mass)) in zip(axes.T, plumes.items(),
                                                          strict=True):
        top.plot(times * tscale, volume, marker="o", markersize=3, color="firebrick")
        bottom.plot(times * tscale, mass * mscale, marker="o", markersize=3, color="navy")
        top.set_title(f"{sp} above {limits[sp] * from_si(1.0, conc_unit):.3g} {conc_unit}",
                      fontsize=9)
        top.set_ylabel("aquifer volume [m³]")
        bottom.set_ylabel(f"dissolved mass [{mass_unit}]")
        bottom.set_xlabel(f"time [{time_unit}]")
        for ax in (top, bottom):
            ax.grid(visible=True, alpha=0.3)
    fig.suptitle(f"{site}\nthe part of each plume above its limit", fontsize=9)
    fig.tight_layout(rect=(0, 0.03, 1, 1))
    return save_figure(fig, path, dpi=120)
