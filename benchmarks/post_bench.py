"""Post-processing benchmark: the exact plume measures (theory.md O1, O2), the fields over the
run (O4) and the contour surface at the limit, for one output time at about 1 M nodes.

A box of 2 km × 1 km × 50 m meshed as a tensor grid of tetrahedra (six per brick) holds an
invented elongated plume (a Gaussian in x, y and z, 1 at its centre) and the limit 1e-3.
Reports the time of each part, and the counts that do not depend on the machine's load:
cells, cells cut by the limit, pieces. ``--write`` appends (or replaces) the
"Post-processing" section of docs/performance.md; without it the rows are printed only.
Target (issue 13): figures, plume measures and the max/arrival fields for one output time at
about 1 M nodes in ≤ 5 s (the figures are benchmarked with their own module).
"""

from __future__ import annotations

import os
import resource
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
from fe3d.p1 import volumes  # noqa: E402
from fe3d.post.iso_volume import region_above  # noqa: E402
from fe3d.post.plume import (  # noqa: E402
    MeasuringFrame,
    SorbedPhase,
    measure_plume,
    write_isosurface,
)
from fe3d.post.run_fields import RunWideField  # noqa: E402

LIMIT = 1e-3


def box_mesh(nx: int, ny: int, nz: int) -> tuple[np.ndarray, np.ndarray]:
    """Tensor-grid tetrahedra of the 2000 × 1000 × 50 m box, ``nx × ny × nz`` nodes."""
    from skfem import MeshTet

    m = MeshTet.init_tensor(np.linspace(0, 2000, nx), np.linspace(0, 1000, ny),
                            np.linspace(-50, 0, nz))
    return m.p, m.t


def main() -> int:
    nx, ny, nz = 160, 80, 80  # 1.02 M nodes
    t0 = time.perf_counter()
    points, cells = box_mesh(nx, ny, nz)
    vol = volumes(points, cells)
    mesh_s = time.perf_counter() - t0
    x, y, z = points
    conc = np.exp(-(((x - 700) / 400) ** 2) - ((y - 500) / 120) ** 2 - ((z + 20) / 12) ** 2)
    n_cells = cells.shape[1]
    porosity = np.full(n_cells, 0.3)
    sorbed = SorbedPhase(np.full(n_cells, 1650.0), np.zeros(n_cells, dtype=int),
                         (("linear", {"kd": 1e-4}),))
    frame = MeasuringFrame((300.0, 500.0), (1.0, 0.0))

    t0 = time.perf_counter()
    measures = measure_plume(points, cells, vol, porosity, sorbed, conc, LIMIT, frame)
    measure_s = time.perf_counter() - t0
    region = region_above(points, cells, vol, conc, LIMIT)

    t0 = time.perf_counter()
    fields = RunWideField.start(points.shape[1]).add(conc, 0.0, LIMIT, None)
    fields = fields.add(conc * 1.1, 1.0, LIMIT, (conc, 0.0))
    fields_s = time.perf_counter() - t0

    with tempfile.TemporaryDirectory() as tmp:
        t0 = time.perf_counter()
        write_isosurface(Path(tmp) / "plume.vtp", points, cells, conc, LIMIT, name="c")
        contour_s = time.perf_counter() - t0
    peak_mib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    rows = {
        "nodes": points.shape[1], "cells": n_cells, "whole": region.whole.size,
        "cut": np.unique(region.piece_cell).size, "pieces": region.piece_cell.size,
        "mesh_s": mesh_s, "measure_s": measure_s, "fields_s": fields_s,
        "contour_s": contour_s, "volume": measures.volume, "peak_mib": peak_mib,
    }
    lines = [
        "", "## Post-processing (benchmarks/post_bench.py)", "",
        "One output time on a 2 km × 1 km × 50 m box of tensor-grid tetrahedra with an "
        "invented Gaussian plume, limit 1e-3 of its peak (`python benchmarks/post_bench.py "
        "--write`). Counts are independent of the machine's load; times are wall-clock on "
        "the shared 2-core machine.", "",
        "| nodes | cells | cells above, whole | cells cut | pieces | plume measures [s] | "
        "fields over the run, two updates [s] | contour surface (VTK) [s] | peak memory "
        "[MiB] |", "|---|---|---|---|---|---|---|---|---|",
        f"| {rows['nodes']:,} | {rows['cells']:,} | {rows['whole']:,} | {rows['cut']:,} | "
        f"{rows['pieces']:,} | {measure_s:.2f} | {fields_s:.2f} | {contour_s:.2f} | "
        f"{peak_mib:.0f} |", "",
        f"Volume above the limit {measures.volume:.6g} m³. The plume measures cut only the "
        "cells the limit crosses; the rest is one pass over the cells' nodal values. Load "
        f"average while measured: {os.getloadavg()[0]:.1f} on 2 cores (times scale with it).",
    ]
    print("\n".join(lines))
    if "--write" in sys.argv:
        from perf_doc import replace_section

        replace_section("## Post-processing (benchmarks/post_bench.py)", lines)
    return 0


if __name__ == "__main__":
    sys.exit(main())
