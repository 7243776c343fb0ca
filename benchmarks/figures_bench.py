"""Figures and compact series benchmark: one output time at about 1 M nodes.

The box of ``post_bench.py`` (2 km × 1 km × 50 m, tensor-grid tetrahedra, 1.02 M nodes,
5.95 M cells) holds the same invented Gaussian plume and the limit 1e-3. Times the plan map
of the largest value over depth (geometry and drawing apart), the section along x through
the plume's centre (cut and drawing apart), the 3D view, and the series file: the mesh once,
then one output time of one species. Reports the counts that do not depend on the machine's
load beside the times: columns, section triangles, bytes written per output time and node.
Target (issue 13): figures, plume measures and the max/arrival fields for one output time at
about 1 M nodes in ≤ 5 s. Prints the rows (docs/outputs.md keeps the last ones measured).
"""

from __future__ import annotations

import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
from fe3d.post.map_figures import plot_plan_maximum, plot_section  # noqa: E402
from fe3d.post.maps import (  # noqa: E402
    PlanMark,
    PlanShape,
    SiteFeatures,
    plan_maximum,
    section_through,
    vertical_section,
)
from fe3d.post.render3d import render_limit_surface  # noqa: E402
from fe3d.post.series import SeriesFile  # noqa: E402

LIMIT = 1e-3


def box_mesh(nx: int, ny: int, nz: int) -> tuple[np.ndarray, np.ndarray]:
    """Tensor-grid tetrahedra of the 2000 × 1000 × 50 m box, ``nx × ny × nz`` nodes."""
    from skfem import MeshTet

    m = MeshTet.init_tensor(np.linspace(0, 2000, nx), np.linspace(0, 1000, ny),
                            np.linspace(-50, 0, nz))
    return m.p, m.t


def timed(rows: list[tuple[str, float, str]], what: str, count: str | Callable[[Any], str],
          job: Callable[[], Any]) -> Any:
    """Run ``job``, append (what, seconds, count) to ``rows``; returns the job's result."""
    t0 = time.perf_counter()
    out = job()
    rows.append((what, time.perf_counter() - t0, count(out) if callable(count) else count))
    return out


def main() -> int:
    points, cells = box_mesh(160, 80, 80)
    x, y, z = points
    conc = np.exp(-(((x - 700) / 400) ** 2) - ((y - 500) / 120) ** 2 - ((z + 20) / 12) ** 2)
    outline = np.array([[0.0, 2000.0, 2000.0, 0.0], [0.0, 0.0, 1000.0, 1000.0]])
    features = SiteFeatures("Benchmark box (invented)", PlanShape("site outline", outline, True),
                            (), (), (), (), (PlanMark("W-1", 1500.0, 500.0, "extraction"),))
    rows: list[tuple[str, float, str]] = []
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        plan = timed(rows, "plan map: largest over depth", lambda p: f"{p.x.size} columns",
                     lambda: plan_maximum(points, conc, outline))
        timed(rows, "plan map: drawing", "1 PNG", lambda: plot_plan_maximum(
            folder / "plan.png", plan, limit=LIMIT, features=features, conc_unit="kg/m^3",
            species="plume", when="one output time"))
        start, end = section_through((700.0, 500.0), np.array([1.0, 0.0]), outline)
        section = timed(rows, "section: exact cut", lambda s: f"{s.triangles.shape[1]} triangles",
                        lambda: vertical_section(points, cells, conc, start, end))
        timed(rows, "section: drawing", "1 PNG", lambda: plot_section(
            folder / "section.png", section, limit=LIMIT, conc_unit="kg/m^3",
            species="plume", when="one output time", site=features.site))
        timed(rows, "3D view at the limit", "1 PNG", lambda: render_limit_surface(
            folder / "surface.png", points, cells, conc, LIMIT, features=features,
            label="plume at the limit"))
        path = folder / "results.vtkhdf"
        series = timed(rows, "series: mesh once", "", lambda: SeriesFile(
            path, points, cells, static_cell_data={"unit_id": np.zeros(cells.shape[1],
                                                                       dtype=np.int8)},
            time_unit="d"))
        before = series.partial.stat().st_size
        timed(rows, "series: one output time, one species", "",
              lambda: series.add(0.0, {"plume [kg/m^3]": conc}))
        after = series.partial.stat().st_size
        series.close()
        rows[-1] = (*rows[-1][:2], f"{(after - before) / points.shape[1]:.2f} bytes per node")
        rows[-2] = (*rows[-2][:2], f"{before / 1e6:.0f} MB")
    print(f"{points.shape[1]} nodes, {cells.shape[1]} cells")
    print("| part | s | count |\n|---|---|---|")
    for what, seconds, count in rows:
        print(f"| {what} | {seconds:.2f} | {count} |")
    return 0


if __name__ == "__main__":
    sys.exit(main())
