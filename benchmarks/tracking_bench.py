"""Particle-tracking benchmark: building the tracker (cell adjacency), tracking particles and
the travel paths of a run, at about 50 k and 220 k nodes.

An invented site (the Harrow Flats test box of benchmarks/run.py: 400 m × 200 m, sand over
silt, fixed heads west and east) with one source box and one extraction well, meshed and
solved by ``fe3d.pipeline.mesh_and_flow`` (plume corridor included). Times, beside
load-independent counts (cells, particles, cell crossings, recorded points):

- the cell adjacency by the compiled face-bucket kernel, and by the former
  ``np.unique(axis=1)`` over all cell faces, on the same mesh (the two are compared entry by
  entry);
- building the tracker;
- tracking forward particles from the source (particles per second, cell crossings each);
- ``travel_paths`` as a run calls it (sources forward, the well backward).
- memory (issue 16 part 5): the bytes per cell of the arrays the tracker holds of its own
  (not views of the mesh or velocity), and the rise of the resident set size during one
  ``travel_paths`` call (read every 3 ms; load-independent).

Target (issue 16): travel paths ≤ 10 % of the transport time (about 6.4 s for 100 linear
steps at 223 k nodes). Each size runs in its own process. ``--write`` appends the table to
docs/performance.md; without it the rows are printed only. ``--scaling`` times the adjacency
kernel alone on Kuhn boxes of 69 k to 1 M nodes (6 M cells; the boundary face count is
checked against 12 n²).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
SIZES = [(5.2, 1.6), (2.6, 0.8)]
"""(plan cell size, layer cell thickness) [m]: about 50 k and 220 k nodes."""


def bench_case(h: float, dz: float) -> Any:
    """The Harrow Flats test box (invented) with a solvent source box upstream and an
    extraction well downstream, plan cell ``h`` and layer cell thickness ``dz`` [m]."""
    from fe3d.case.builder import Layer, Material, Source, Species, Time, box_case

    sand = Material(12.0, 3.0, porosity=0.3, longitudinal_dispersivity=2.0,
                    transverse_dispersivity=0.2)
    silt = Material(0.8, 0.2, porosity=0.35, bulk_density=1500.0)
    return box_case(
        title="tracking benchmark", length=400.0, width=200.0, top=10.0, cell=h, dz=dz,
        fine_cell=h, heads={"west": 9.5, "east": 8.3},
        layers=[Layer("sand", 2.0, sand), Layer("silt", -2.0, silt)],
        species=[Species("solvent", limit="5 ug/L", kd=0.1, half_life="3 yr")],
        time=Time(7300.0, 73.0),
        sources=[Source("spill", species="solvent", concentration=100.0,
                        x=(40.0, 60.0), y=(90.0, 110.0), z=(6.0, 9.0))],
        sections={"wells": [{"name": "PW", "x": "300 m", "y": "100 m",
                             "screens": [["8 m", "3 m"]], "rate": "40 m^3/d"}]})


def _adjacency_by_unique(cells: Any) -> Any:
    """The former adjacency: ``np.unique`` over the sorted node triples of all faces."""
    m = cells.shape[1]
    faces = np.sort(np.stack([np.delete(cells, k, axis=0) for k in range(4)], axis=1),
                    axis=0)
    _, inv = np.unique(faces.reshape(3, -1), axis=1, return_inverse=True)
    inv = inv.ravel()
    order = np.argsort(inv, kind="stable")
    same = inv[order][1:] == inv[order][:-1]
    a, b = order[:-1][same], order[1:][same]
    nb = np.full(4 * m, -1, dtype=np.int64)
    nb[a], nb[b] = b % m, a % m
    return nb.reshape(4, m)


def one(h: float, dz: float) -> dict[str, Any]:
    from fe3d.case.parts import Ground, TravelInputs
    from fe3d.flow import tracking
    from fe3d.flow.paths import travel_paths
    from fe3d.mesh.materials import cell_values, unit_materials
    from fe3d.pipeline import mesh_and_flow

    case = bench_case(h, dz)
    site, flow = mesh_and_flow(case)
    mats, _ = unit_materials(Ground.of(case), site)
    velocity = flow.darcy_flux / cell_values(mats, site, "porosity")
    row: dict[str, Any] = {"nodes": site.n_nodes, "cells": site.n_cells,
                           "load": os.getloadavg()[0]}
    if hasattr(tracking, "cell_neighbours"):
        clock = []
        for _ in range(3):
            t = time.perf_counter()
            nb = tracking.cell_neighbours(site.cells)
            clock.append(time.perf_counter() - t)
        row["adjacency_s"] = min(clock)
        t = time.perf_counter()
        old = _adjacency_by_unique(site.cells)
        row["adjacency_unique_s"] = time.perf_counter() - t
        row["adjacency_equal"] = bool(np.array_equal(nb, old))
        del old
    clock = []
    for _ in range(3):
        t = time.perf_counter()
        tracker = tracking.Tracker(site.points, site.cells, velocity)
        clock.append(time.perf_counter() - t)
    row["build_s"] = min(clock)
    # the first track of a process loads the compiled kernels from numba's cache
    t = time.perf_counter()
    tracker.track(np.array([50.0, 100.0, 7.5]))
    row["first_track_s"] = time.perf_counter() - t
    seeds = np.array([[x, y, z] for x in (45.0, 55.0) for y in (95.0, 105.0)
                      for z in (6.75, 8.25)]).T
    # forward particles end near the well's screen, as travel_paths has them
    centres = site.points[:, site.cells].mean(axis=1)
    capture = set(np.nonzero((np.hypot(centres[0] - 300.0, centres[1] - 100.0) <= h)
                             & (centres[2] <= 8.0 + h) & (centres[2] >= 3.0 - h))[0].tolist())
    clock = []
    for _ in range(3):
        t = time.perf_counter()
        lines = [tracker.track(x, capture_cells=capture) for x in seeds.T]
        clock.append(time.perf_counter() - t)
    row["track_s"] = min(clock)
    row["particles"] = len(lines)
    row["points_per_path"] = float(np.mean([p.times.size for p in lines]))
    row["crossings_per_path"] = float(np.mean([getattr(p, "cells_crossed", -1) for p in lines]))
    row["ends"] = sorted({p.end for p in lines})
    row["mean_time_d"] = float(np.mean([p.times[-1] for p in lines])) / 86400.0
    own = [a for a in vars(tracker).values() if isinstance(a, np.ndarray)
           and not any(np.shares_memory(a, b) for b in (site.points, site.cells, velocity))]
    row["tracker_bytes_per_cell"] = sum(a.nbytes for a in own) / site.n_cells
    del tracker, lines
    inputs = TravelInputs.of(case)
    sampler = _PeakSampler()
    travel_paths(site, flow, inputs)
    row["travel_paths_peak_mib"] = sampler.stop()
    clock = []
    for _ in range(3):  # the first call here (mesh_and_flow's corridor pass made one before),
        t = time.perf_counter()  # then the least of three: the load only ever adds time
        paths = travel_paths(site, flow, inputs)
        clock.append(time.perf_counter() - t)
    row["travel_paths_first_s"], row["travel_paths_s"] = clock[0], min(clock)
    every = [p for v in (*paths.forward.values(), *paths.backward.values()) for p in v]
    row["travel_paths_particles"] = len(every)
    row["travel_paths_crossings"] = sum(getattr(p, "cells_crossed", 0) for p in every)
    row["travel_paths_points"] = sum(p.times.size for p in every)
    return row


class _PeakSampler:
    """Largest rise of the resident set size [MiB] over its value at the start, read every
    3 ms by a thread until :meth:`stop`."""

    def __init__(self) -> None:
        import threading

        self._start = self._rss()
        self._peak = self._start
        self._done = threading.Event()
        self._thread = threading.Thread(target=self._loop, daemon=True)
        self._thread.start()

    @staticmethod
    def _rss() -> int:
        return int(Path("/proc/self/statm").read_text().split()[1]) * 4096

    def _loop(self) -> None:
        while not self._done.is_set():
            self._peak = max(self._peak, self._rss())
            time.sleep(0.003)

    def stop(self) -> float:
        self._done.set()
        self._thread.join()
        return (max(self._peak, self._rss()) - self._start) / 2**20


def kuhn_box(n: int) -> tuple[Any, Any]:
    """Unit cube in n³ sub-cubes of 6 tetrahedra each (Kuhn's split along the diagonal):
    nodes ``(3, (n + 1)³)`` and cells ``(4, 6 n³)``; 12 n² boundary faces."""
    idx = np.arange((n + 1) ** 3).reshape(n + 1, n + 1, n + 1)
    corner = {(i, j, k): idx[i:n + i, j:n + j, k:n + k].ravel()
              for i in (0, 1) for j in (0, 1) for k in (0, 1)}
    middle = [((1, 0, 0), (1, 1, 0)), ((1, 0, 0), (1, 0, 1)), ((0, 1, 0), (1, 1, 0)),
              ((0, 1, 0), (0, 1, 1)), ((0, 0, 1), (1, 0, 1)), ((0, 0, 1), (0, 1, 1))]
    cells = np.hstack([np.stack([corner[0, 0, 0], corner[a], corner[b], corner[1, 1, 1]])
                       for a, b in middle])
    g = np.arange(n + 1) / n
    return np.array(np.meshgrid(g, g, g, indexing="ij")).reshape(3, -1), cells


def adjacency_scaling() -> list[dict[str, Any]]:
    """The adjacency kernel on Kuhn boxes of 0.07 to 1 M nodes (least of three)."""
    from fe3d.flow.tracking import cell_neighbours

    rows = []
    for n in (40, 60, 80, 100):
        pts, cells = kuhn_box(n)
        clock = []
        for _ in range(3):
            t = time.perf_counter()
            nb = cell_neighbours(cells, pts.shape[1])
            clock.append(time.perf_counter() - t)
        rows.append({"nodes": pts.shape[1], "cells": cells.shape[1], "adjacency_s": min(clock),
                     "boundary_faces": int((nb < 0).sum()), "expected": 12 * n * n,
                     "load": os.getloadavg()[0]})
    return rows


def write_section(rows: list[dict[str, Any]]) -> None:
    """Append the table of ``rows`` to docs/performance.md."""
    lines = ["", "## Particle tracking (benchmarks/tracking_bench.py)", "",
             "| nodes | cells | adjacency [s] | np.unique adjacency [s] | tracker build [s] "
             "| 8 particles [s] | crossings / particle | travel_paths first / least [s] "
             "| its particles, crossings | load | tracker bytes / cell "
             "| travel_paths rise [MiB] |",
             "|---|---|---|---|---|---|---|---|---|---|---|---|"]
    lines += [f"| {r['nodes']:,} | {r['cells']:,} | {r['adjacency_s']:.3f} "
              f"| {r['adjacency_unique_s']:.1f} | {r['build_s']:.2f} | {r['track_s']:.4f} "
              f"| {r['crossings_per_path']:.0f} | {r['travel_paths_first_s']:.2f} / "
              f"{r['travel_paths_s']:.2f} | {r['travel_paths_particles']}, "
              f"{r['travel_paths_crossings']:,} | {r['load']:.1f} "
              f"| {r['tracker_bytes_per_cell']:.1f} | {r['travel_paths_peak_mib']:.0f} |"
              for r in rows]
    from perf_doc import replace_section

    replace_section("## Particle tracking (benchmarks/tracking_bench.py)", lines[1:])


def main() -> int:
    if len(sys.argv) >= 4 and sys.argv[1] == "--one":
        print(json.dumps(one(float(sys.argv[2]), float(sys.argv[3]))))
        return 0
    if "--scaling" in sys.argv:
        for row in adjacency_scaling():
            print(json.dumps(row), flush=True)
        return 0
    sizes = SIZES[:1] if "--quick" in sys.argv else SIZES
    rows = []
    for h, dz in sizes:
        res = subprocess.run([sys.executable, __file__, "--one", str(h), str(dz)],
                             capture_output=True, text=True, check=True)
        rows.append(json.loads(res.stdout.strip().splitlines()[-1]))
        print(json.dumps(rows[-1]), flush=True)
    if "--write" in sys.argv:
        write_section(rows)
    return 0


if __name__ == "__main__":
    sys.exit(main())
