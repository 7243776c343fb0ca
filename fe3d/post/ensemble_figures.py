"""The ensemble's figures: probability of exceeding the limit at each receptor over time,
with its confidence band, and the plan map of the probability of exceeding it during the run
(off-screen matplotlib, as fe3d.post.figures)."""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

import numpy as np

from fe3d._typing import FloatArray
from fe3d.post.figures import pyplot, save_figure
from fe3d.units import from_si

__all__ = ["plot_exceedance", "plot_probability_plan"]


def plot_exceedance(path: Path, times: FloatArray,
                    curves: Sequence[tuple[str, FloatArray, FloatArray, FloatArray]], *,
                    time_unit: str, confidence: float, n_members: int, title: str) -> Path:
    """One line per receptor and species: probability [-] over ``times`` [s], shape
    ``(n_times,)``, with its band; ``curves`` holds (label, probability, lower, upper)."""
    plt = pyplot()
    t = np.array([from_si(x, time_unit) for x in times])
    fig, ax = plt.subplots(figsize=(8, 4.5))
    for label, p, lo, hi in curves:
        (line,) = ax.plot(t, p, linewidth=1.4, label=label)
        ax.fill_between(t, lo, hi, color=line.get_color(), alpha=0.18, linewidth=0)
    ax.set_ylim(-0.02, 1.02)
    ax.set_xlim(t[0], t[-1])
    ax.set_xlabel(f"time [{time_unit}]")
    ax.set_ylabel("probability above the limit [-]")
    ax.set_title(f"{title}\n{n_members} members; bands: exact {100 * confidence:g} % "
                 "binomial interval", fontsize=10)
    ax.grid(visible=True, alpha=0.3)
    ax.legend(fontsize=8, loc="upper left")
    fig.tight_layout(rect=(0, 0.03, 1, 1))
    return save_figure(fig, path)


def plot_probability_plan(path: Path, plan_xy: FloatArray, triangles: FloatArray,
                          probability: dict[str, FloatArray], *,
                          markers: dict[str, tuple[float, float]], n_members: int,
                          title: str) -> Path:
    """Plan map per species of the probability [-] that the concentration exceeds the
    limit during the run, the largest over depth: ``plan_xy`` [m] shape ``(2, n_plan)``,
    ``triangles`` ``(3, n_triangles)`` indices into it, ``probability`` species →
    ``(n_plan,)``; ``markers`` label → plan position [m]."""
    from matplotlib.tri import Triangulation

    plt = pyplot()

    tri = Triangulation(plan_xy[0], plan_xy[1], np.asarray(triangles).T)
    n = len(probability)
    fig, axes = plt.subplots(n, 1, figsize=(8, 3.2 * n + 0.8), squeeze=False)
    for ax, (sp, p) in zip(axes[:, 0], probability.items(), strict=True):
        # shaded, not contoured: filled contours leave out values exactly at the top level
        filled = ax.tripcolor(tri, p, cmap="YlOrRd", vmin=0.0, vmax=1.0, shading="gouraud")
        fig.colorbar(filled, ax=ax, label="probability above the limit [-]", fraction=0.046,
                     pad=0.04)
        for label, (x, y) in markers.items():
            ax.plot(x, y, "ks", markersize=4)
            ax.annotate(label, (x, y), textcoords="offset points", xytext=(4, 4), fontsize=7)
        ax.set_aspect("equal")
        ax.set_ylabel("y [m]")
        ax.set_title(f"{sp}: probability of exceeding the limit during the run (largest "
                     f"over depth, {n_members} members)", fontsize=9)
    axes[-1, 0].set_xlabel("x [m]")
    fig.suptitle(title, fontsize=10)
    fig.tight_layout(rect=(0, 0.03, 1, 1))
    return save_figure(fig, path)
