"""The ensemble's figure: probability of exceeding the limit at each receptor over time,
with its confidence band (off-screen matplotlib, as fe3d.post.figures)."""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

import numpy as np

from fe3d._typing import FloatArray
from fe3d.post.files import write_atomic
from fe3d.units import from_si

__all__ = ["plot_exceedance"]


def plot_exceedance(path: Path, times: FloatArray,
                    curves: Sequence[tuple[str, FloatArray, FloatArray, FloatArray]], *,
                    time_unit: str, confidence: float, n_members: int, title: str) -> Path:
    """One line per receptor and species: probability [-] over ``times`` [s], shape
    ``(n_times,)``, with its band; ``curves`` holds (label, probability, lower, upper)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

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
    fig.text(0.01, 0.005, "Screening estimate: depends on the inputs; defer to local "
             "regulations and licensed professional practice.", fontsize=7)
    fig.tight_layout(rect=(0, 0.03, 1, 1))
    write_atomic(path, lambda p: fig.savefig(p, dpi=130, format="png"))
    plt.close(fig)
    return path
