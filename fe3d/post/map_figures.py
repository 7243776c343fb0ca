"""Plan maps and sections (matplotlib, off-screen), in the style of :mod:`fe3d.post.figures`:
the largest concentration over depth with the limit contour and the site's features, a
vertical section along the flow, and the head at an elevation with pathlines, the area swept
by each extraction well's backward pathlines and, when given, the drawdown."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np

from fe3d._typing import FloatArray
from fe3d.post.figures import (
    BACKWARD_STYLE,
    CONCENTRATION_COLOURS,
    DRAWDOWN_COLOURS,
    FORWARD_STYLE,
    HEAD_COLOURS,
    draw_site,
    place_labels,
    pyplot,
    save_figure,
)
from fe3d.post.maps import PlanField, Section, SiteFeatures, swept_area
from fe3d.units import from_si

__all__ = ["MESH_LINES_UP_TO", "concentration_levels", "plot_head_map", "plot_plan_maximum",
           "plot_section"]

#: A section shows the cut cells' edges when it has at most this many triangles; beyond,
#: at the figure's ~1000 × 500 pixels the edges merge into a grey wash (a triangle is
#: then a few pixels across) and only cost drawing time (0.26 s at 100 k triangles).
MESH_LINES_UP_TO = 20_000


def concentration_levels(peak: float, limit: float) -> FloatArray:
    """Filled-contour levels [same unit as ``peak``]: 1, 2, 5 per decade from a hundredth
    of the limit (or a thousandth of the peak when the peak is below the limit) up to the
    peak; at least two levels."""
    low = limit / 100.0 if peak >= limit else peak / 1000.0
    if not peak > 0:
        return np.array([limit / 100.0, limit])
    decades = np.arange(np.floor(np.log10(low)), np.ceil(np.log10(peak)) + 1)
    levels = np.sort(np.concatenate([m * 10.0**decades for m in (1.0, 2.0, 5.0)]))
    levels = levels[(levels >= low) & (levels <= peak)]
    return levels if levels.size >= 2 else np.array([low, peak])


def _concentration_fill(ax: Any, x: FloatArray, y: FloatArray, tri: Any, values: FloatArray,
                        limit: float, unit: str, top: float | None = None) -> Any:
    """Log-spaced filled contours up to ``top`` (default: the values' largest; values
    below the lowest level left blank) and the limit contour; returns the filled set for
    the colour bar."""
    from matplotlib.colors import BoundaryNorm
    from matplotlib.tri import Triangulation

    t = Triangulation(x, y, tri.T)
    peak = float(values.max())
    levels = concentration_levels(max(peak, top or 0.0), limit)
    cmap = pyplot().get_cmap(CONCENTRATION_COLOURS)
    filled = ax.tricontourf(t, values, levels=[*levels, max(peak, levels[-1]) * 1.001],
                            cmap=cmap, norm=BoundaryNorm(levels, cmap.N, extend="max"))
    if peak > limit:
        ax.tricontour(t, values, levels=[limit], colors="black", linewidths=1.6)
    ax.plot([], [], color="black", linewidth=1.6, label=f"limit {limit:.3g} {unit}")
    return filled


def _concentration_bar(fig: Any, ax: Any, filled: Any, label: str) -> None:
    """Colour bar of the log-spaced levels, each labelled with 3 significant digits."""
    bar = fig.colorbar(filled, ax=ax, shrink=0.8, pad=0.02, label=label)
    levels = filled.levels[:-1]
    ticks = levels[::2] if levels.size > 12 else levels
    bar.set_ticks(ticks, labels=[f"{v:.3g}" for v in ticks])


def plot_plan_maximum(path: Path, plan: PlanField, *, limit: float, features: SiteFeatures,
                      conc_unit: str, species: str, when: str,
                      section: tuple[FloatArray, FloatArray] | None = None,
                      scale_top: float | None = None) -> Path:
    """Plan map of the largest concentration over depth (``plan.values`` [kg/m³]) with the
    limit [kg/m³] contour and the site's features; ``when`` says which time it shows (an
    output time, or "largest over the whole run"); ``section`` marks a section's trace;
    ``scale_top`` [kg/m³] (e.g. the source's largest concentration) fixes the top of the
    colour scale, so that the maps of a run's output times share one scale."""
    plt = pyplot()
    scale = from_si(1.0, conc_unit)
    fig, ax = plt.subplots(figsize=(8.5, 5.6))
    filled = _concentration_fill(ax, plan.x, plan.y, plan.triangles, plan.values * scale,
                                 limit * scale, conc_unit,
                                 None if scale_top is None else scale_top * scale)
    labels = draw_site(ax, features)
    if section is not None:
        (x0, y0), (x1, y1) = section
        ax.plot([x0, x1], [y0, y1], color="0.3", linestyle="-.", linewidth=0.9)
        labels += [("A", float(x0), float(y0)), ("A'", float(x1), float(y1))]
    _concentration_bar(fig, ax, filled, f"{species}, largest over depth [{conc_unit}]")
    _plan_axes(ax, f"{features.site}\n{species}: largest concentration over depth, {when}",
               features.outline.xy)
    if float(plan.values.max()) <= limit:
        ax.text(0.5, 0.02, "nowhere above the limit", transform=ax.transAxes, ha="center",
                fontsize=8)
    fig.tight_layout(rect=(0, 0.03, 1, 1))
    place_labels(ax, labels)
    return save_figure(fig, path)


def _plan_axes(ax: Any, title: str, outline: FloatArray) -> None:
    """Equal scales framed on the site outline ``(2, k)`` [m] (pathlines leaving it are
    cut at the frame), axis labels, title and the legend under the map."""
    lo, hi = outline.min(axis=1), outline.max(axis=1)
    margin = 0.03 * float((hi - lo).max())
    ax.set_xlim(lo[0] - margin, hi[0] + margin)
    ax.set_ylim(lo[1] - margin, hi[1] + margin)
    ax.set_aspect("equal")
    ax.set_xlabel("x [m]")
    ax.set_ylabel("y [m]")
    ax.set_title(title, fontsize=9)
    ax.legend(fontsize=6.5, loc="upper left", bbox_to_anchor=(0.0, -0.16), ncol=4,
              frameon=False)


def plot_section(path: Path, section: Section, *, limit: float, conc_unit: str,
                 species: str, when: str, site: str,
                 marks: tuple[tuple[str, tuple[float, float], float, float, str], ...] = ()
                 ) -> Path:
    """Vertical section A–A' of the concentration (``section.values`` [kg/m³]) with the
    limit contour and, up to :data:`MESH_LINES_UP_TO` triangles, the cut cells' edges; the
    vertical scale is exaggerated to fill the frame and the factor said.
    ``marks`` are (name, (s_from, s_to) [m] along the section, top, bottom [m], kind):
    a ``source`` is drawn as a box, anything else (a well screen) as a bar at ``s_from``."""
    from matplotlib.patches import Rectangle

    plt = pyplot()
    scale = from_si(1.0, conc_unit)
    fig, ax = plt.subplots(figsize=(9.0, 4.2))
    filled = _concentration_fill(ax, section.s, section.z, section.triangles,
                                 section.values * scale, limit * scale, conc_unit)
    if section.triangles.shape[1] <= MESH_LINES_UP_TO:
        ax.triplot(section.s, section.z, section.triangles.T, color="0.85", linewidth=0.15,
                   zorder=0)
    _concentration_bar(fig, ax, filled, f"{species} [{conc_unit}]")
    length = float(np.hypot(*(section.end - section.start)))
    ax.set_xlim(0.0, length)
    ax.set_xlabel(f"distance from A ({section.start[0]:.0f} m, {section.start[1]:.0f} m) "
                  f"towards A' ({section.end[0]:.0f} m, {section.end[1]:.0f} m) [m]")
    ax.set_ylabel("elevation [m]")
    length = float(np.hypot(*(section.end - section.start)))
    labels: list[tuple[str, float, float]] = []
    for name, s, top, bottom, kind in marks:
        if kind == "source":
            ax.add_patch(Rectangle((s[0], bottom), s[1] - s[0], top - bottom, fill=False,
                                   edgecolor="black", linewidth=1.2, linestyle="--"))
        else:
            well = kind in ("extraction", "injection", "observation")
            ax.plot([s[0], s[0]], [bottom, top], color="navy" if well else "0.35",
                    linewidth=3.0 if well else 1.5)
        labels.append((name, s[0], top))
    title = f"{site}\n{species}: section A–A' along the mean flow through the source, {when}"
    ax.set_title(title + " (vertical scale ×00)", fontsize=9)
    fig.tight_layout(rect=(0, 0.03, 1, 1))
    box = ax.get_window_extent()
    dz = float(np.ptp(section.z)) or 1.0
    exaggeration = (box.height / dz) / (box.width / length)
    ax.set_title(f"{title} (vertical scale ×{exaggeration:.0f})", fontsize=9)
    ax.legend(fontsize=7, loc="lower right")
    place_labels(ax, labels)
    return save_figure(fig, path)


def plot_head_map(path: Path, plan: PlanField, *, features: SiteFeatures, elevation: float,
                  head_unit: str, forward: list[FloatArray],
                  backward: dict[str, list[FloatArray]], wells: dict[str, tuple[float, float]],
                  capture_time: str, drawdown: PlanField | None = None,
                  pumping: bool = True) -> Path:
    """Head (``plan.values`` [m], on the plane z = ``elevation`` [m]) in ``head_unit`` with
    labelled contours, forward pathlines from the sources (solid), backward pathlines from
    the extraction wells (dashed), the area each well's backward pathlines sweep within
    ``capture_time`` (hatched), and the drawdown [m] where given. Without ``drawdown`` and
    with ``pumping`` wells, the map says that drawdown was not drawn and why. Contours are
    labelled in ``head_unit``, as the colour bar."""
    from matplotlib.tri import Triangulation

    plt = pyplot()
    fig, ax = plt.subplots(figsize=(8.5, 5.8))
    head = plan.values * from_si(1.0, head_unit)
    tri = Triangulation(plan.x, plan.y, plan.triangles.T)
    filled = ax.tricontourf(tri, head, levels=16, cmap=HEAD_COLOURS)
    lines = ax.tricontour(tri, head, levels=filled.levels[::2], colors="0.2", linewidths=0.5)
    ax.clabel(lines, lines.levels[::2], fmt="%.2f", fontsize=6, inline=True)
    fig.colorbar(filled, ax=ax, shrink=0.8, pad=0.02,
                 label=f"head at {elevation:.1f} m elevation [{head_unit}]")
    for i, p in enumerate(forward):
        ax.plot(p[0], p[1], **FORWARD_STYLE, label="forward from sources" if i == 0 else None)
    first = True
    for lines_of_well in backward.values():
        for p in lines_of_well:
            ax.plot(p[0], p[1], **BACKWARD_STYLE,
                    label="backward from extraction wells" if first else None)
            first = False
    _capture_zones(ax, plan, backward, wells, capture_time)
    if drawdown is not None:
        _drawdown_contours(ax, drawdown, head_unit)
    elif pumping:
        fig.text(0.99, 0.005, "drawdown not drawn: no head without pumping was computed",
                 ha="right", fontsize=6.5, color="0.25")
    labels = draw_site(ax, features)
    _plan_axes(ax, f"{features.site}\nhead at {elevation:.1f} m elevation, pathlines and "
                   "capture zones", features.outline.xy)
    fig.tight_layout(rect=(0, 0.03, 1, 1))
    place_labels(ax, labels)
    return save_figure(fig, path)


def _drawdown_contours(ax: Any, drawdown: PlanField, head_unit: str) -> None:
    """Contours of the drawdown (``drawdown.values`` [m]) in ``head_unit`` at 1, 2, 5 per
    decade from a twentieth of the largest up to it (the rise by injection wells dashed),
    labelled; the legend names the unit."""
    from matplotlib.tri import Triangulation

    values = drawdown.values * from_si(1.0, head_unit)
    tri = Triangulation(drawdown.x, drawdown.y, drawdown.triangles.T)
    cmap = pyplot().get_cmap(DRAWDOWN_COLOURS)
    for sign, style, words in ((1.0, "solid", "drawdown"), (-1.0, "dashed", "rise")):
        largest = float((sign * values).max())
        if not largest > 0:
            continue
        levels = concentration_levels(largest, largest)
        levels = levels[levels >= largest / 20.0]  # a decade and more: a readable map
        lines = ax.tricontour(tri, sign * values, levels=levels, colors=[cmap(0.85)],
                              linewidths=0.9, linestyles=style)
        ax.clabel(lines, fmt=lambda v, s=sign: f"{s * v:.3g}", fontsize=6)
        ax.plot([], [], color=cmap(0.85), linestyle=style,
                label=f"{words} by the wells [{head_unit}]")


def _capture_zones(ax: Any, plan: PlanField, backward: dict[str, list[FloatArray]],
                   wells: dict[str, tuple[float, float]], capture_time: str) -> None:
    """Hatch the area each well's backward pathlines sweep (:func:`maps.swept_area`)."""
    lo = np.array([plan.x.min(), plan.y.min()])
    hi = np.array([plan.x.max(), plan.y.max()])
    step = float((hi - lo).max()) / 300.0
    gx, gy = (np.arange(lo[k], hi[k] + step, step) for k in (0, 1))
    first = True
    for name, lines in backward.items():
        if name not in wells or not lines:
            continue
        inside = swept_area(lines, wells[name], gx, gy).astype(float)
        if not inside.any():
            continue
        with pyplot().rc_context({"hatch.color": "navy", "hatch.linewidth": 0.4}):
            ax.contourf(gx, gy, inside, levels=[0.5, 1.5], colors="none", hatches=["//"])
        ax.contour(gx, gy, inside, levels=[0.5], colors="navy", linewidths=1.0)
        if first:
            ax.fill([], [], facecolor="none", edgecolor="navy", hatch="//",
                    label=f"capture zone within {capture_time}")
            first = False
