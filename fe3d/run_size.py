"""How big a run will be, from the case alone, and whether it fits this machine.

Estimates, not promises: the mesh size from the target cell sizes (the plume corridor adds
to it), the steps from ``time.step`` and the breakpoints (without ``time.step`` the flow
sets them), the memory from the whole-run peak measured on this machine (docs/performance.md:
about 529 MiB plus 2.79 KiB per node for one species) and the written output from the sizes
of the files a run writes, with the checkpoint it keeps on disk while it runs.
:func:`check_fits` refuses, with the numbers, a run whose memory exceeds the machine's or
whose output exceeds the free disk.
"""

from __future__ import annotations

import math
import shutil
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from fe3d._machine import machine_memory
from fe3d.case.schema import Case
from fe3d.errors import CaseError
from fe3d.transport.systems import PEAK_IN_PLACE, PEAK_WITH_COPIES, splittings_in_place

__all__ = ["RunSize", "check_fits", "estimate_mesh_size", "estimate_run", "machine_memory"]

MiB = 1 << 20

BASE_MEMORY, MEMORY_PER_NODE = PEAK_WITH_COPIES
"""Peak memory of a one-species run [bytes]: a fixed part (interpreter, libraries, compiled
kernels) and a part per node, the transport's own measured fit (3 Dec 2026: 529 MiB +
2.79 KiB per node, whole runs from 72 k to 2.1 M nodes, measured before the run's end and
set-up lost their largest temporaries, so it errs on the large side). A model large enough
to solve its bounded steps in place (fe3d.transport.systems.splittings_in_place) is
estimated with that fit instead, ``PEAK_IN_PLACE`` (590 MiB + 1.86 KiB per node)."""

MEMORY_PER_NODE_SPECIES = 1024
"""Further memory per node for each further species [bytes]: its fields, operators and
step systems (an estimate from the arrays held per species, not measured separately)."""

BYTES_PER_STEP = 120
"""Memory per planned fixed step [bytes]: the step queue entry and one history row per
observation point and species (8 bytes each) come on top of this."""

CHECKPOINT_ARRAYS = 10
"""Nodal float64 arrays per species in a checkpoint's state (fields, held nodes, older level,
up to three levels of the error estimate, the last budget's two, the three fields over the
run; fe3d.transport.checkpoint): on disk while the run goes, removed when it ends."""

OUTPUT_ARRAYS = 4
"""Nodal float64 arrays per species in each output time a checkpoint keeps (the field and
the three fields over the run)."""

FORCE_KEY = "--force"
"""What a refused run is named by: the command-line option that runs it anyway."""

MEMORY_SHARE = 0.9
"""Share of the machine's memory a run may plan to use (common practice, no source)."""


def estimate_mesh_size(case: Case) -> tuple[int, int]:
    """Rough node and cell counts from the target sizes (plan triangles × sublayers × 3)."""
    from fe3d.case.geology import polygon_area
    from fe3d.mesh.build import feature_points

    area = abs(polygon_area(case.outline()[0]))
    h = case.mesh.cell_size
    n_tri = 2.3 * area / h**2
    fine = case.mesh.fine_cell_size
    if fine is not None:
        r = case.mesh.fine_zone_radius + 2 * h
        n_tri += len(feature_points(case)) * 2.3 * math.pi * r**2 / fine**2 / 4
    for src in case.sources:  # the cells across each source box (theory.md M6)
        if src.shape == "box" and src.x is not None and src.y is not None:
            sides = (src.x[1] - src.x[0], src.y[1] - src.y[0])
            n_tri += _zone_triangles(math.hypot(*sides) / 2,
                                     min(sides) / case.mesh.cells_across_source, h)
    thick = case.z_top - case.z_bottom_min
    n_lay = max(len(case.layers), math.ceil(thick / case.mesh.layer_cell_thickness))
    return int(n_tri / 2 * (n_lay + 1)), int(3 * n_tri * n_lay)


@dataclass(frozen=True)
class RunSize:
    """Estimated size of a run: mesh nodes and cells, fixed steps (``None``: the steps follow
    the plume, set by the flow), output times, peak memory [bytes] and written output
    [bytes]."""

    nodes: int
    cells: int
    steps: int | None
    output_times: int
    memory: float
    output: float

    def lines(self) -> list[str]:
        """The estimate in words, one line each."""
        steps = "set by the flow (no time.step)" if self.steps is None else f"{self.steps:,}"
        return [f"estimated mesh: ~{self.nodes:,} nodes, ~{self.cells:,} tetrahedra "
                "(the plume corridor adds to it)",
                f"estimated steps: {steps}; output times: {self.output_times:,}",
                f"estimated peak memory ~{self.memory / MiB:,.0f} MiB, written output "
                f"~{self.output / MiB:,.0f} MiB"]


def _fixed_steps(case: Case) -> int | None:
    """Number of steps of a fixed-step run (adaptive: the count at ``time.step``)."""
    t = case.time
    if t.step is None:
        return None
    points = sorted({*case.output_schedule(), *(x for s in case.sources for x in (s.start, s.stop)
                                               if x is not None and 0 < x < t.end)})
    count, start = 0, 0.0
    for b in points:
        count += max(1, math.ceil((b - start) / t.step - 1e-9))
        start = b
    return count


def estimate_run(case: Case, *, memory: int | None = None) -> RunSize:
    """The size of a run of ``case`` (module docstring) on a machine of ``memory`` [bytes]
    (default :func:`machine_memory`), which decides whether its bounded steps are solved in
    place."""
    nodes, cells = estimate_mesh_size(case)
    n_species, n_obs = len(case.species), len(case.observation_points)
    steps = _fixed_steps(case)
    outputs = len(case.output_schedule()) + 1  # t = 0 as well
    per_step = BYTES_PER_STEP + 8 * (1 + n_obs * n_species)
    machine = machine_memory() if memory is None else memory
    in_place = case.solver.monotone and splittings_in_place(nodes, machine)
    base, per_node = PEAK_IN_PLACE if in_place else (BASE_MEMORY, MEMORY_PER_NODE)
    peak = (base + nodes * (per_node + (n_species - 1) * MEMORY_PER_NODE_SPECIES)
            + (steps or 0) * per_step)
    mesh_once = nodes * 24 + cells * (16 + 3 * 3 * 4)  # points, tetrahedra, flow arrays
    output = mesh_once + outputs * nodes * n_species * (4 + 8)  # series, run-wide fields
    output += nodes * n_species * 8 * (CHECKPOINT_ARRAYS + OUTPUT_ARRAYS * outputs)
    return RunSize(nodes=nodes, cells=cells, steps=steps, output_times=outputs,
                   memory=peak, output=output)


def _zone_triangles(radius: float, size: float, background: float) -> float:
    """Plan triangles of a refinement zone: cells of ``size`` [m] within ``radius`` [m],
    growing linearly to ``background`` over four background sizes (fe3d.mesh.build's
    RefineZone), counted as 2.3 triangles per size² (an equilateral mesh's density)."""
    if size >= background:
        return 0.0
    inner = 2.3 * math.pi * radius**2 / size**2
    rho = np.linspace(0.0, 4.0 * background, 201)
    local = size + rho * (background - size) / (4.0 * background)
    ring = 2.3 * 2.0 * math.pi * (radius + rho) * (1.0 / local**2 - 1.0 / background**2)
    return inner + float(np.sum((ring[1:] + ring[:-1]) / 2.0 * np.diff(rho)))


def _free_disk(folder: Path) -> int:
    """Free bytes on the file system that will hold ``folder`` (its nearest existing
    ancestor)."""
    probe = folder.resolve()
    while not probe.exists() and probe != probe.parent:
        probe = probe.parent
    return shutil.disk_usage(probe).free


def check_fits(size: RunSize, out_dir: Path, *, memory: int | None = None) -> None:
    """Refuse, with one line giving the numbers, a run whose estimated peak memory exceeds
    ``MEMORY_SHARE`` of the machine's (``memory`` [bytes], default :func:`machine_memory`)
    or whose output exceeds the free disk under ``out_dir``. The key named is ``--force``,
    the option that runs it anyway."""
    total = machine_memory() if memory is None else memory
    key = FORCE_KEY
    if total and size.memory > MEMORY_SHARE * total:
        raise CaseError(key, "not given", f"the run needs ~{size.memory / MiB:,.0f} MiB "
                        f"(~{size.nodes:,} nodes, {size.steps or 0:,} steps) and this machine "
                        f"has {total / MiB:,.0f} MiB: coarsen mesh.cell_size or "
                        "mesh.layer_cell_thickness, lengthen time.step, or give --force")
    free = _free_disk(out_dir)
    if size.output > free:
        raise CaseError(key, "not given", f"the run writes ~{size.output / MiB:,.0f} MiB "
                        f"and {out_dir} has {free / MiB:,.0f} MiB free: fewer output times "
                        "or another folder, or give --force")
