"""Post-processing benchmark: everything written or drawn for one output time at about 1 M
nodes, against issue 13's target of ≤ 5 s.

A box of 2 km × 1 km × 50 m meshed as a tensor grid of tetrahedra (six per brick) holds an
invented elongated plume (a Gaussian in x, y and z, 1 at its centre) and the limit 1e-3.
Times the exact plume measures (theory.md O1, O2), the fields over the run (O4), the contour
surface at the limit and, from ``figures_bench.py``, the figures (plan map, section, 3D
view) and the series file, each as wall-clock and processor time, with the counts that do
not depend on the machine's load (cells, cells cut by the limit, pieces, columns,
triangles, bytes per node). The libraries' start-up, paid once per process, and the mesh
written once into the series file are listed but not counted in the per-output-time sum.
``--report RUN_DIR`` also times the handover report (report.md and report.html) of a run
folder, e.g. the demo's (target: ≤ 10 s). ``--write`` replaces the "Post-processing"
section of docs/performance.md; without it the rows are printed only.
"""

from __future__ import annotations

import os
import resource
import sys
import tempfile
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "benchmarks"))
from figures_bench import LIMIT, Part, box_mesh, figure_parts, plume, start_up, table, timed  # noqa: E402

from fe3d.p1 import volumes  # noqa: E402
from fe3d.post.iso_volume import region_above  # noqa: E402
from fe3d.post.plume import (  # noqa: E402
    MeasuringFrame,
    SorbedPhase,
    measure_plume,
    write_isosurface,
)
from fe3d.transport.run_wide import RunWideField  # noqa: E402

HEADING = "## Post-processing (benchmarks/post_bench.py)"
ONCE = ("start-up, once per process", "series: mesh once")


def measure_parts(points: np.ndarray, cells: np.ndarray, conc: np.ndarray,
                  folder: Path) -> tuple[list[Part], dict[str, int], float]:
    """Plume measures, fields over the run and the contour surface; the load-free counts
    of the region above the limit and its volume [m³]."""
    vol = volumes(points, cells)
    n_cells = cells.shape[1]
    porosity = np.full(n_cells, 0.3)
    sorbed = SorbedPhase(np.full(1, 1650.0), np.zeros(n_cells, dtype=int),
                         (("linear", {"kd": 1e-4}),))
    frame = MeasuringFrame((300.0, 500.0), (1.0, 0.0))
    parts: list[Part] = []
    region = region_above(points, cells, vol, conc, LIMIT)
    counts = {"whole": region.whole.size, "cut": np.unique(region.piece_cell).size,
              "pieces": region.piece_cell.size}
    measures = timed(parts, "plume measures (volume, masses, extents)",
                     f"{counts['cut']:,} cells cut, {counts['pieces']:,} pieces",
                     lambda: measure_plume(points, cells, vol, porosity, sorbed, conc, LIMIT,
                                           frame))

    def fields() -> RunWideField:
        f = RunWideField.start(points.shape[1]).add(conc, 0.0, LIMIT, None)
        return f.add(conc * 1.1, 1.0, LIMIT, (conc, 0.0))

    timed(parts, "fields over the run, two updates", "", fields)
    surface = timed(parts, "contour surface at the limit (.vtp)", "",
                    lambda: write_isosurface(folder / "plume.vtp", points, cells, conc, LIMIT,
                                             name="c"))
    size = surface.stat().st_size
    parts[-1] = parts[-1].counted(f"{size / 1e6:.1f} MB, {size / points.shape[1]:.2f} bytes "
                                  "per node")
    return parts, counts, measures.volume


def report_lines(folder: Path) -> list[str]:
    """The time of ``fe3d report`` on the run folder ``folder``, as a user runs it (a new
    process: start-up included), least of three and first."""
    import json
    import subprocess

    command = [str(Path(sys.executable).parent / "fe3d"), "report", str(folder)]
    parts: list[Part] = []
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    timed(parts, "fe3d report", "", lambda: subprocess.run(command, check=True,
                                                           capture_output=True))
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    child_cpu = (after.ru_utime + after.ru_stime - before.ru_utime - before.ru_stime) / 3
    summary = json.loads((folder / "summary.json").read_text(encoding="utf-8"))
    p = parts[0]
    return [f"`fe3d report` (report.md and report.html, every figure embedded) on a run of "
            f"{summary['title']!r} ({summary['n_nodes']:,} nodes, "
            f"{len(list(folder.glob('*.png')))} figures), the whole command: {p.wall:.2f} s "
            f"wall-clock (first call {p.first:.2f} s), {child_cpu:.2f} s processor time "
            "(mean of the three; target ≤ 10 s)."]


def main() -> int:
    points, cells = box_mesh(160, 80, 80)  # 1.02 M nodes
    conc = plume(points)
    parts: list[Part] = []
    timed(parts, ONCE[0], "", start_up, repeat=1)
    with tempfile.TemporaryDirectory() as tmp:
        measured, counts, volume = measure_parts(points, cells, conc, Path(tmp))
        parts += measured
        parts += figure_parts(points, cells, conc, Path(tmp))
    per_time = [p for p in parts if p.what not in ONCE]
    wall, cpu = sum(p.wall for p in per_time), sum(p.cpu for p in per_time)
    peak_mib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    load = os.getloadavg()[0]
    lines = [
        "", HEADING, "",
        "One output time on a 2 km × 1 km × 50 m box of tensor-grid tetrahedra "
        f"({points.shape[1]:,} nodes, {cells.shape[1]:,} cells) with an invented Gaussian "
        "plume, limit 1e-3 of its peak (`python benchmarks/post_bench.py --write`). "
        "Counts are independent of the machine's load; wall-clock times are not (shared "
        "2-core machine); processor time moves less with the load (it counts the "
        "process's threads, so it can exceed wall-clock on a quiet machine). Each part is "
        "the least of three calls, as each output time of a run repeats it; the first "
        "call's wall-clock (new memory touched, caches cold) is beside it.", "",
        *table(parts), "",
        f"**One output time (every row but the two marked once): {wall:.2f} s wall-clock, "
        f"{cpu:.2f} s processor time** (target ≤ 5 s). Region above the limit: "
        f"{counts['whole']:,} whole cells, {counts['cut']:,} cut into {counts['pieces']:,} "
        f"pieces; volume {volume:.6g} m³. Peak memory {peak_mib:.0f} MiB. Load average "
        f"while measured: {load:.1f} on 2 cores.", "",
        "Written per species and output time: the concentration in the series file and "
        "the surface at the limit (the two 'bytes per node' counts above; target: at most "
        "twice one float32 array, 8 bytes per node, plus the mesh once).",
    ]
    if "--report" in sys.argv:
        lines += ["", *report_lines(Path(sys.argv[sys.argv.index("--report") + 1]))]
    print("\n".join(lines))
    if "--write" in sys.argv:
        from perf_doc import replace_section

        replace_section(HEADING, lines)
    return 0


if __name__ == "__main__":
    sys.exit(main())
