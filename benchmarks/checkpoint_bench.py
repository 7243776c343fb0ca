"""Cost of a transport checkpoint at 1 M nodes: write and read time, size per species, and
the overhead of one every 10 minutes of wall time (the default of ``fe3d run``).

The checkpoint holds what a run at that size holds between two steps: per species the
fields, held mask, the two earlier levels of the local error estimate (the older one shared
with the last step's start, as in a run), the last budget's held nodes, and histories of
20,000 steps at 10 observation points. Fields are random (their values do not change the
cost of an uncompressed .npz). Usage: ``python benchmarks/checkpoint_bench.py [--write]``
(``--write`` puts the table in docs/performance.md).
"""

from __future__ import annotations

import statistics
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from fe3d.transport.accumulate import StatisticsState, TotalsState, TransportDiagnostics
from fe3d.transport.budget import MassBudget
from fe3d.transport.checkpoint import (
    Checkpoint,
    read_checkpoint,
    write_checkpoint,
    write_output,
)
from fe3d.transport.planner import PlannerState
from fe3d.transport.snapshot import Snapshot
from fe3d.transport.step import StepBudget, StepState

N_NODES = 1_000_000
N_STEPS, N_OBS = 20_000, 10
INTERVAL = 600.0  # s: the default --checkpoint-every
REPEATS = 3


def _checkpoint(n_species: int, rng: np.random.Generator) -> Checkpoint:
    names = [f"s{k}" for k in range(n_species)]
    fields = {n: rng.random(N_NODES) for n in names}
    before = {n: rng.random(N_NODES) for n in names}
    earlier = {n: rng.random(N_NODES) for n in names}
    held = {n: rng.random(N_NODES) < 0.001 for n in names}
    budget = {n: StepBudget(source_input=1.0, produced=0.0, decayed=0.1, outflow={"east": 0.2},
                            switch_on=0.0, fixed=np.nonzero(held[n])[0], start=before[n])
              for n in names}
    zero = dict.fromkeys(names, 0.0)
    return Checkpoint(
        state=StepState(fields=fields, held_before=held, older=before, last_budget=budget),
        planner=PlannerState(t=1e8, dt_want=86400.0, cuts_here=0, step_cuts=1, rejected=2,
                             queue=()),
        totals=TotalsState(initial=zero, source_input=zero, produced=zero, decayed=zero,
                           outflow={n: {"east": 0.0} for n in names}),
        statistics=StatisticsState(peclet=zero, courant=zero,
                                   plume_courant=dict.fromkeys(names, (0.0, None)),
                                   lowest=dict.fromkeys(names, (0.0, None)),
                                   highest=dict.fromkeys(names, (1.0, (0.0, 0.0, 0.0))),
                                   n_steps=N_STEPS, dt_min=1.0, dt_max=2.0,
                                   newton=3, sweeps=0, solver="newton"),
        history_times=np.linspace(0.0, 1e8, N_STEPS),
        history={n: rng.random((N_STEPS, N_OBS)) for n in names},
        accepted=((9e7, earlier), (9.5e7, before), (1e8, fields)), dt_prev=86400.0,
        outputs=12, mesh="0" * 64, flow="0" * 64)


def measure(n_species: int, folder: Path) -> tuple[float, float, float]:
    """(median write time [s], size [MB], median read time [s])."""
    ckpt = _checkpoint(n_species, np.random.default_rng(0))
    writes, reads = [], []
    for _ in range(REPEATS):
        t0 = time.perf_counter()
        path = write_checkpoint(folder, ckpt, case="bench")
        writes.append(time.perf_counter() - t0)
        t0 = time.perf_counter()
        read_checkpoint(folder)
        reads.append(time.perf_counter() - t0)
    return statistics.median(writes), path.stat().st_size / 1e6, statistics.median(reads)


def measure_output(folder: Path) -> tuple[float, float]:
    """(median time [s], size [MB]) of keeping one output time's snapshot of one species."""
    rng = np.random.default_rng(1)
    snap = Snapshot(time=1e8, concentration={"s0": rng.random(N_NODES)},
                    budgets={"s0": MassBudget("s0", 1e8, 1.0, 0.5, 0.0, 2.0)},
                    history_times=np.zeros(N_STEPS), history={"s0": np.zeros((N_STEPS, N_OBS))},
                    diagnostics=TransportDiagnostics(n_steps=N_STEPS, max_grid_peclet={},
                                                     max_courant={}, min_concentration={},
                                                     solver="newton"))
    times = []
    for k in range(REPEATS):
        t0 = time.perf_counter()
        path = write_output(folder, k, snap)
        times.append(time.perf_counter() - t0)
    return statistics.median(times), path.stat().st_size / 1e6


def main() -> None:
    rows = []
    with tempfile.TemporaryDirectory(dir=Path(__file__).resolve().parents[1]) as tmp:
        for n_species in (1, 3):
            w, size, r = measure(n_species, Path(tmp))
            rows.append(f"| {n_species} | {w:.2f} | {w / n_species:.2f} | {size:.0f} | "
                        f"{size / n_species:.0f} | {r:.2f} | {100 * w / INTERVAL:.3f} % |")
        out_s, out_mb = measure_output(Path(tmp))
    lines = ["## Checkpoints at 1 M nodes (benchmarks/checkpoint_bench.py)", "",
             f"Uncompressed .npz, {N_NODES:,} nodes, histories of {N_STEPS:,} steps × {N_OBS} "
             f"points, median of {REPEATS} writes (temp file in the same folder, fsync, "
             "rename). Overhead: write time over the default interval of 10 minutes.", "",
             "| species | write [s] | per species [s] | size [MB] | per species [MB] | "
             "read [s] | overhead every 10 min |",
             "|---|---|---|---|---|---|---|", *rows, "",
             f"Each output time's fields are also kept once in the checkpoint folder (so that "
             f"`--resume` writes the outputs before the checkpoint again exactly): "
             f"{out_s:.2f} s and {out_mb:.0f} MB per species and output time; the folder is "
             "removed when the run finishes."]
    print("\n".join(lines))
    if "--write" in sys.argv:
        from perf_doc import replace_section

        replace_section(lines[0], lines)


if __name__ == "__main__":
    main()
