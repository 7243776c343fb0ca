"""Figures and compact series benchmark: one output time at about 1 M nodes.

The box of ``post_bench.py`` (2 km × 1 km × 50 m, tensor-grid tetrahedra, 1.02 M nodes,
5.95 M cells) holds the same invented Gaussian plume and the limit 1e-3. Times the plan map
of the largest value over depth (geometry and drawing apart), the section along x through
the plume's centre (cut and drawing apart), the 3D view, and the series file: the mesh once,
then one output time of one species. The libraries' start-up (matplotlib, pyvista's
plotting, the unit registry), paid once per process, is timed apart first. Each part
reports wall-clock and processor time (the processor time moves less with the machine's
load) as the least of three calls, the first call's wall-clock beside them, and the counts
that do not depend on the load: columns, section triangles, bytes written per output time
and node.
Target (issue 13): figures, plume measures and the max/arrival fields for one output time at
about 1 M nodes in ≤ 5 s; ``post_bench.py`` sums these rows with its own.
"""

from __future__ import annotations

import sys
import tempfile
import time
from collections.abc import Callable
from dataclasses import dataclass
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


@dataclass(frozen=True)
class Part:
    """One timed part: what, wall-clock [s] and processor time [s] (least of the repeats),
    the first call's wall-clock [s], and a load-free count."""

    what: str
    wall: float
    cpu: float
    first: float
    count: str

    def counted(self, count: str) -> Part:
        """The same times with another count."""
        return Part(self.what, self.wall, self.cpu, self.first, count)


def box_mesh(nx: int, ny: int, nz: int) -> tuple[np.ndarray, np.ndarray]:
    """Tensor-grid tetrahedra of the 2000 × 1000 × 50 m box, ``nx × ny × nz`` nodes."""
    from skfem import MeshTet

    m = MeshTet.init_tensor(np.linspace(0, 2000, nx), np.linspace(0, 1000, ny),
                            np.linspace(-50, 0, nz))
    return m.p, m.t


def plume(points: np.ndarray) -> np.ndarray:
    """The invented plume: a Gaussian in x, y and z, 1 at (700, 500, −20) m."""
    x, y, z = points
    return np.exp(-(((x - 700) / 400) ** 2) - ((y - 500) / 120) ** 2 - ((z + 20) / 12) ** 2)


def timed(parts: list[Part], what: str, count: str | Callable[[Any], str],
          job: Callable[[], Any], *, repeat: int = 3) -> Any:
    """Run ``job`` ``repeat`` times, append its :class:`Part` (least wall-clock and
    processor time, and the first call's wall-clock) to ``parts``; returns the last
    result."""
    walls, cpus = [], []
    for _ in range(repeat):
        w0, c0 = time.perf_counter(), time.process_time()
        out = job()
        walls.append(time.perf_counter() - w0)
        cpus.append(time.process_time() - c0)
    parts.append(Part(what, min(walls), min(cpus), walls[0],
                      count(out) if callable(count) else count))
    return out


def start_up() -> None:
    """What the first figure of a process pays once: matplotlib, pyvista's plotting,
    scipy's Delaunay and the unit registry."""
    import scipy.spatial  # noqa: F401

    from fe3d.post.figures import pyplot
    from fe3d.units import from_si

    pyplot()
    import pyvista.plotting  # noqa: F401

    from_si(1.0, "mg/L")


def figure_parts(points: np.ndarray, cells: np.ndarray, conc: np.ndarray,
                 folder: Path) -> list[Part]:
    """The figures of one output time and the series file, each a :class:`Part`."""
    outline = np.array([[0.0, 2000.0, 2000.0, 0.0], [0.0, 0.0, 1000.0, 1000.0]])
    features = SiteFeatures("Benchmark box (invented)", PlanShape("site outline", outline, True),
                            (), (), (), (), (PlanMark("W-1", 1500.0, 500.0, "extraction"),))
    parts: list[Part] = []
    plan = timed(parts, "plan map: largest over depth", lambda p: f"{p.x.size:,} columns",
                 lambda: plan_maximum(points, conc, outline))
    timed(parts, "plan map: drawing", "1 PNG", lambda: plot_plan_maximum(
        folder / "plan.png", plan, limit=LIMIT, features=features, conc_unit="kg/m^3",
        species="plume", when="one output time"))
    start, end = section_through((700.0, 500.0), np.array([1.0, 0.0]), outline)
    section = timed(parts, "section: exact cut", lambda s: f"{s.triangles.shape[1]:,} triangles",
                    lambda: vertical_section(points, cells, conc, start, end))
    timed(parts, "section: drawing", "1 PNG", lambda: plot_section(
        folder / "section.png", section, limit=LIMIT, conc_unit="kg/m^3",
        species="plume", when="one output time", site=features.site))
    timed(parts, "3D view at the limit", "1 PNG", lambda: render_limit_surface(
        folder / "surface.png", points, cells, conc, LIMIT, features=features,
        label="plume at the limit"))
    path = folder / "results.vtkhdf"
    series = timed(parts, "series: mesh once", "", lambda: SeriesFile(
        path, points, cells, static_cell_data={"unit_id": np.zeros(cells.shape[1],
                                                                   dtype=np.int8)},
        time_unit="d"), repeat=1)
    before = series.partial.stat().st_size
    times = iter(range(3))
    timed(parts, "series: one output time, one species", "",
          lambda: series.add(float(next(times)), {"plume [kg/m^3]": conc}))
    after = series.partial.stat().st_size
    series.close()
    parts[-1] = parts[-1].counted(f"{(after - before) / 3 / points.shape[1]:.2f} bytes per "
                                  "node")
    parts[-2] = parts[-2].counted(f"{before / 1e6:.0f} MB")
    return parts


def table(parts: list[Part]) -> list[str]:
    """Markdown rows of ``parts``."""
    return ["| part | wall [s] | processor [s] | first call, wall [s] | count |",
            "|---|---|---|---|---|",
            *(f"| {p.what} | {p.wall:.2f} | {p.cpu:.2f} | {p.first:.2f} | {p.count} |"
              for p in parts)]


def main() -> int:
    points, cells = box_mesh(160, 80, 80)
    conc = plume(points)
    parts: list[Part] = []
    timed(parts, "start-up, once per process", "", start_up, repeat=1)
    with tempfile.TemporaryDirectory() as tmp:
        parts += figure_parts(points, cells, conc, Path(tmp))
    print(f"{points.shape[1]} nodes, {cells.shape[1]} cells")
    print("\n".join(table(parts)))
    return 0


if __name__ == "__main__":
    sys.exit(main())
