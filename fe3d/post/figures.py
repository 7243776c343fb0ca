"""Matplotlib figures (off-screen); the only matplotlib user in fe3d."""

from __future__ import annotations

from pathlib import Path

from fe3d._typing import FloatArray
from fe3d.post.files import write_atomic
from fe3d.units import from_si

__all__ = ["plot_breakthrough"]


def plot_breakthrough(path: Path, times: FloatArray, history: dict[str, FloatArray],
                      names: list[str], limits: dict[str, float], *, time_unit: str,
                      conc_unit: str, title: str) -> Path:
    """Breakthrough curves, one panel per species, with the species' limit drawn."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    n = len(history)
    fig, axes = plt.subplots(n, 1, figsize=(8, 3.2 * n), squeeze=False, sharex=True)
    t = from_si(1.0, time_unit) * times
    scale = from_si(1.0, conc_unit)
    for ax, (sp, values) in zip(axes[:, 0], history.items(), strict=True):
        for j, name in enumerate(names):
            ax.plot(t, values[:, j] * scale, label=name)
        ax.axhline(limits[sp] * scale, color="k", linestyle="--", linewidth=1.0,
                   label=f"limit {limits[sp] * scale:.3g} {conc_unit}")
        peak = float(values.max()) * scale if values.size else 0.0
        lim = limits[sp] * scale
        if peak > 50.0 * lim:  # a limit far below the peak is invisible on a linear axis
            ax.set_yscale("log")
            ax.set_ylim(lim / 100.0, peak * 2.0)
        ax.set_ylabel(f"{sp} [{conc_unit}]")
        ax.grid(visible=True, alpha=0.3)
        ax.legend(fontsize=8, loc="upper right")
    axes[-1, 0].set_xlabel(f"time [{time_unit}]")
    fig.suptitle(title, fontsize=10)
    fig.text(0.01, 0.005, "Screening estimate: depends on the inputs; not a substitute for "
             "local regulations or licensed professional judgement.", fontsize=7)
    fig.tight_layout(rect=(0, 0.03, 1, 1))
    write_atomic(path, lambda p: fig.savefig(p, dpi=120, format="png"))
    plt.close(fig)
    return path
