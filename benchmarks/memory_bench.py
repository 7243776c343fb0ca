"""Memory per node of a whole run (issue 16 part 5): ``fe3d run`` from 50 k to 2 M nodes.

Each size runs :func:`fe3d.pipeline.run_case` (mesh, flow, travel paths, transport, output
files and figures, as ``fe3d run`` does) in its own process, so that its peak resident set
size is its own. A thread in that process reads the resident set size every 20 ms and the
run's progress callback marks the stages, so the table gives the peak of each stage as well
as the whole run's (``ru_maxrss``). The case is the invented Harrow Flats test box of the
other benchmarks (sand over silt, one solvent source box, an extraction well), 10 steps.

Targets (issue 16): peak memory ≤ 2 KiB per node; growth exponent of the whole-run time in
nodes ≤ 1.1 from 50 k to 2 M. Writes the "Memory per node" section of docs/performance.md
(``python benchmarks/memory_bench.py``; ``--quick`` runs the smallest size only and writes
nothing; ``--sizes=4.3:1.3,2.6:0.8`` picks plan cell : layer cell thickness pairs [m]).
``--one H DZ [--in-place] [--steps N]`` runs one size in this process and prints its row:
``--in-place`` solves the bounded steps in place whatever the model's size (as a model too
large for copies does, fe3d.transport.systems.splittings_in_place), ``--steps`` sets the
number of steps (10).
"""

from __future__ import annotations

import json
import math
import resource
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parents[1]
SIZES = [(4.3, 1.3), (2.6, 0.8), (2.0, 0.62), (1.5, 0.5), (1.19, 0.4)]
"""(plan cell, layer cell thickness) [m]: about 50 k, 220 k, 500 k, 1 M and 2 M nodes."""
STEPS = 10
STAGES = ["mesh", "flow", "travel paths", "flow outputs", "transport set-up", "transport",
          "outputs"]
"""The stages in the order of a run (the table's columns)."""
PAGE = 4096  # bytes per page of /proc/self/statm (Linux x86-64)


def run_case_of(h: float, dz: float, steps: int = STEPS) -> Any:
    """The Harrow Flats test box (invented) with a solvent source box upstream and an
    extraction well downstream, plan cell ``h`` and layer cell thickness ``dz`` [m]."""
    from fe3d.case.builder import Layer, Material, Source, Species, Time, box_case

    sand = Material(12.0, 3.0, porosity=0.3, longitudinal_dispersivity=2.0,
                    transverse_dispersivity=0.2)
    silt = Material(0.8, 0.2, porosity=0.35, bulk_density=1500.0)
    return box_case(
        title="memory benchmark (invented site)", length=400.0, width=200.0, top=10.0,
        cell=h, dz=dz, fine_cell=h, heads={"west": 9.5, "east": 8.3},
        layers=[Layer("sand", 2.0, sand), Layer("silt", -2.0, silt)],
        species=[Species("solvent", limit="5 ug/L", kd=0.1, half_life="3 yr")],
        time=Time(73.0 * steps, 73.0),
        sources=[Source("spill", species="solvent", concentration=100.0,
                        x=(40.0, 60.0), y=(90.0, 110.0), z=(6.0, 9.0))],
        sections={"wells": [{"name": "PW", "x": "300 m", "y": "100 m",
                             "screens": [["8 m", "3 m"]], "rate": "40 m^3/d"}]})


class _Sampler:
    """Resident set size [bytes] every ``every`` seconds, with the stage running then, and
    the wall time [s] spent in each stage (summed over its visits: the run names the
    transport before its set-up, which this benchmark marks, and again after each step)."""

    def __init__(self, every: float = 0.02) -> None:
        self.stage = "start"
        self.peak: dict[str, int] = {}
        self.spent: dict[str, float] = {}
        self._since = time.perf_counter()
        self._every = every
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._loop, daemon=True)
        self._thread.start()

    def _loop(self) -> None:
        statm = Path("/proc/self/statm")
        while not self._stop.is_set():
            rss = int(statm.read_text().split()[1]) * PAGE
            self.peak[self.stage] = max(self.peak.get(self.stage, 0), rss)
            time.sleep(self._every)

    def progress(self, stage: str, _done: float, _total: float) -> None:
        if stage != self.stage:
            self._switch(stage)

    def _switch(self, stage: str) -> None:
        now = time.perf_counter()
        self.spent[self.stage] = self.spent.get(self.stage, 0.0) + now - self._since
        self.stage, self._since = stage, now

    def stop(self) -> None:
        self._switch("stopped")
        self._stop.set()
        self._thread.join()


def _mark_substages(sampler: _Sampler) -> None:
    """Name the transport's set-up (operators, preconditioners, up to the first step) apart
    from its steps: the run reports it as "transport" (and the flow's files and figures as
    "flow outputs", itself). Wraps the pipeline's call, in this benchmark process only."""
    import fe3d.pipeline as pipeline

    def marked(stage: str, call: Any) -> Any:
        def wrapper(*args: Any, **kwargs: Any) -> Any:
            sampler.progress(stage, 0.0, 1.0)
            return call(*args, **kwargs)
        return wrapper

    pipeline.run_transport = marked("transport set-up", pipeline.run_transport)


def one(h: float, dz: float, *, in_place: bool = False, steps: int = STEPS,
        ) -> dict[str, Any]:
    """One whole run in this process; its sizes, stage times and peaks. ``in_place``: the
    bounded steps solved in place whatever the size (patched in this process only)."""
    from fe3d.pipeline import run_case
    from fe3d.transport import systems

    if in_place:
        systems.splittings_in_place = lambda _nodes, _memory: True
    case = run_case_of(h, dz, steps)
    sampler = _Sampler()
    _mark_substages(sampler)
    cpu, t0 = time.process_time(), time.perf_counter()
    with tempfile.TemporaryDirectory() as tmp:
        summary = run_case(case, Path(tmp) / "run", progress=sampler.progress, force=True)
        wall = time.perf_counter() - t0
        cpu = time.process_time() - cpu
        sampler.stop()
    mib = 1024.0 * 1024.0
    return {"nodes": int(summary.n_nodes), "cells": int(summary.n_cells), "steps": steps,
            "in_place": in_place, "wall_s": wall,
            "cpu_s": cpu, "stage_s": {s: v for s, v in sampler.spent.items() if s != "start"},
            "stage_peak_mib": {s: v / mib for s, v in sampler.peak.items()},
            "peak_mib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0}


def fit(rows: list[dict[str, Any]], key: str = "wall_s") -> tuple[float, float, float]:
    """Least-squares peak = a + b · nodes (a [MiB], b [KiB per node]) and the growth
    exponent of the whole-run time ``key`` (wall or CPU), d log t / d log n between the
    smallest and largest."""
    n = [r["nodes"] for r in rows]
    p = [r["peak_mib"] for r in rows]
    mean_n, mean_p = sum(n) / len(n), sum(p) / len(p)
    sxx = sum((x - mean_n) ** 2 for x in n)
    slope = sum((x - mean_n) * (y - mean_p) for x, y in zip(n, p, strict=True)) / sxx
    first, last = rows[0], rows[-1]
    growth = (math.log(last[key] / first[key])
              / math.log(last["nodes"] / first["nodes"]))
    return mean_p - slope * mean_n, slope * 1024.0, growth


def main() -> int:
    if len(sys.argv) >= 4 and sys.argv[1] == "--one":
        steps = int(sys.argv[sys.argv.index("--steps") + 1]) if "--steps" in sys.argv \
            else STEPS
        print(json.dumps(one(float(sys.argv[2]), float(sys.argv[3]),
                             in_place="--in-place" in sys.argv, steps=steps)))
        return 0
    sizes = SIZES[:1] if "--quick" in sys.argv else SIZES
    for arg in sys.argv[1:]:
        if arg.startswith("--sizes="):
            sizes = [(float(a), float(b)) for a, b in
                     (pair.split(":") for pair in arg.split("=", 1)[1].split(","))]
    rows = []
    for h, dz in sizes:
        out = subprocess.run([sys.executable, __file__, "--one", str(h), str(dz)],
                             capture_output=True, text=True, check=True, cwd=ROOT)
        row = json.loads(out.stdout.strip().splitlines()[-1])
        print(json.dumps(row), flush=True)
        rows.append(row)
    if "--quick" in sys.argv or len(rows) < 2:
        return 0
    write_section(rows)
    return 0


def write_section(rows: list[dict[str, Any]], notes: tuple[str, ...] = ()) -> None:
    """The "Memory per node" section of docs/performance.md from the measured rows, with
    ``notes`` (paragraphs) after the table."""
    base, per_node, growth = fit(rows)
    cpu_growth = fit(rows, "cpu_s")[2]
    load = Path("/proc/loadavg").read_text().split()[:3]
    seen = dict.fromkeys(s for r in rows for s in r["stage_peak_mib"] if s != "start")
    stages = sorted(seen, key=lambda s: STAGES.index(s) if s in STAGES else len(STAGES))
    lines = ["## Memory per node (benchmarks/memory_bench.py)", "",
             "A whole run (`fe3d.pipeline.run_case`, as `fe3d run`: mesh, flow, travel paths, "
             f"{STEPS} transport steps, output files and figures) of the invented Harrow Flats "
             "test box (sand over silt, one solvent source box, an extraction well), each "
             "size in its own process. Peak = the process's peak resident set size "
             "(`ru_maxrss`); per stage, the largest resident set size read every 20 ms while "
             "the stage ran. CPU = the process's own CPU time (less sensitive to the other "
             f"work on the machine than the wall time). Load average when written: "
             f"{' '.join(load)}.", "",
             "| nodes | tetrahedra | whole run [s] | CPU [s] | "
             + " | ".join(f"{s} [s]" for s in stages) + " | "
             + " | ".join(f"peak in {s} [MiB]" for s in stages)
             + " | peak [MiB] | peak per node [KiB] |",
             "|" + "---|" * (6 + 2 * len(stages))]
    for r in rows:
        lines.append(
            f"| {r['nodes']:,} | {r['cells']:,} | {r['wall_s']:.1f} | {r['cpu_s']:.1f} | "
            + " | ".join(f"{r['stage_s'].get(s, 0.0):.1f}" for s in stages) + " | "
            + " | ".join(f"{r['stage_peak_mib'].get(s, 0.0):.0f}" for s in stages)
            + f" | {r['peak_mib']:.0f} | {r['peak_mib'] * 1024.0 / r['nodes']:.2f} |")
    lines += ["", f"Least-squares fit of the peak: {base:.0f} MiB + {per_node:.2f} KiB per "
              f"node (target ≤ 2 KiB per node: **{'met' if per_node <= 2.0 else 'not met'}**). "
              f"Growth exponent of the whole-run time from {rows[0]['nodes']:,} to "
              f"{rows[-1]['nodes']:,} nodes: {growth:.2f} in wall time, {cpu_growth:.2f} in "
              f"CPU time (target ≤ 1.1: **{'met' if max(growth, cpu_growth) <= 1.1 else 'not met'}"
              "**).", *(f"\n{note}" for note in notes)]
    from perf_doc import replace_section

    replace_section("## Memory per node (benchmarks/memory_bench.py)", lines)


if __name__ == "__main__":
    sys.exit(main())
