"""Cost of one transport step through the engine itself: the default bounded step against the
SUPG step, in SpMV equivalents and in load-independent counts (issue 11's benchmark).

The Harrow Flats test box of ``benchmarks/run.py`` (invented: 400 m × 200 m, sand over silt,
fixed heads west and east) with a fixed-concentration source box is meshed (no plume
corridor, so that both schemes share one mesh) and its flow solved; then, for each scheme and
Courant number (1 and 10, from the largest cell rate |a|/h), the run's own step context is
built (``fe3d.transport.run.step_context``) and ``take_step`` marches ``STEPS`` steps from
the source switching on, exactly as ``run_transport`` would (budgets included, probes and
outputs excluded). Each step's CPU time is divided by the CPU time of one SpMV of a matrix on
the mesh's CSR pattern measured right beside it (the unit survives a shared, loaded machine
better than wall time; the wall time per step is reported too).
Beside the times, the counts that do not depend on the load, read from the step's debug log
record (fe3d.transport.step): Krylov iterations of the step's solve and of the target's
solve (each iteration is two products with the preconditioned operator), limiter passes and
row sweeps (rows the passes swept, over the number of rows: 1 per full pass).

- ``supg``: SUPG, backward Euler, no flux limiting (fe3d's former default);
- ``bounded``: fe3d's defaults (low-order backward Euler step, Crank–Nicolson Galerkin
  target, flux limiter; theory.md T16b).

Usage: ``python benchmarks/step_cost.py [--quick | --size h,dz]`` (``--quick``: a small mesh
only; ``--size``: one mesh of plan cell ``h`` and layer cell ``dz`` [m]; default: about
223 k and 1 M nodes, each in its own process). Prints one JSON line per size and a Markdown
table; docs/performance.md quotes the table. The load average is recorded before and after
each size.
"""

from __future__ import annotations

import json
import logging
import os
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "benchmarks"))

from run import C0, SOURCE_BOX, site_case  # noqa: E402

from fe3d.case.builder import Source, with_changes  # noqa: E402
from fe3d.case.parts import TransportInputs  # noqa: E402
from fe3d.pipeline import mesh_and_flow  # noqa: E402
from fe3d.transport.run import next_state, step_context  # noqa: E402
from fe3d.transport.sources import initial_fields  # noqa: E402
from fe3d.transport.step import StepState, take_step  # noqa: E402
from fe3d.transport.timeschemes import step_coefficients  # noqa: E402

STEPS = 12
"""Steps timed per scheme and Courant number; the median of the second half is reported (the
solvers' start windows fill over the first steps)."""

SCHEMES = {
    "supg": ({"supg": True, "monotone": False, "flux_limiting": False}, "backward_euler"),
    "bounded": ({}, None),
}
"""Solver settings and time scheme of each variant (``None``: the case default)."""

SIZES = [(2.6, 0.8), (1.5, 0.5)]
"""(plan cell size, layer cell thickness) [m]: about 223 k and 1 M nodes."""

COUNTED = ("step_iterations", "target_iterations", "limiter_passes", "limiter_row_sweeps")
"""Load-independent counts the step's debug record carries (fe3d.transport.step)."""


class _Counts(logging.Handler):
    """Collects the counts of the step log records (one per species and step)."""

    def __init__(self) -> None:
        super().__init__(logging.DEBUG)
        self.records: list[dict[str, float]] = []

    def emit(self, record: logging.LogRecord) -> None:
        if hasattr(record, "step_iterations"):
            self.records.append({k: float(getattr(record, k)) for k in COUNTED})


def _spmv_seconds(A: Any) -> float:
    """CPU time of one SpMV (mean of 10): CPU rather than wall time, so that the unit and the
    steps are both counted while this process runs (the machine is shared)."""
    x = np.ones(A.shape[0])
    t = time.process_time()
    for _ in range(10):
        A @ x
    return (time.process_time() - t) / 10


def measure(h: float, dz: float) -> dict[str, Any]:
    """Step costs of both variants at Courant 1 and 10 on one mesh."""
    (x0, x1), (y0, y1), (z0, z1) = SOURCE_BOX
    base = with_changes(site_case(h, dz), mesh={"corridor": False}, sources=[
        Source("spill", species="solvent", shape="box", x=(x0, x1), y=(y0, y1), z=(z0, z1),
               concentration=f"{C0} kg/m^3")])
    load_before = os.getloadavg()
    site, flow = mesh_and_flow(base)
    handler = _Counts()
    logger = logging.getLogger("fe3d.transport.step")
    logger.addHandler(handler)
    logger.setLevel(logging.DEBUG)
    unit_matrix = site.pattern.matrix(np.ones(site.pattern.indices.size))
    out: dict[str, Any] = {"nodes": site.n_nodes, "cells": site.n_cells, "variants": {}}
    for name, (solver, scheme) in SCHEMES.items():
        for courant in (1.0, 10.0):
            probe = with_changes(base, time={"end": "1 d", "step": "1 d"})
            rate = step_context(site, flow, TransportInputs.of(probe), None)
            dt = courant / max(s.courant_rate for s in rate.species)
            time_changes: dict[str, Any] = {"end": f"{dt * STEPS} s", "step": f"{dt} s"}
            if scheme is not None:
                time_changes["scheme"] = scheme
            case = with_changes(base, time=time_changes, solver=solver)
            inputs = TransportInputs.of(case)
            ctx = step_context(site, flow, inputs, None)
            start = initial_fields(inputs, site, ctx.sources)
            state = StepState(fields={s.name: start[s.name] for s in ctx.species},
                              held_before={s.name: np.zeros(site.n_nodes, dtype=bool)
                                           for s in ctx.species}, older=None, last_budget={})
            costs, seconds, units, lows, counts = [], [], [], [], []
            dt_prev = None
            for k in range(STEPS):
                formula = step_coefficients(case.time.scheme, dt, dt_prev)
                before = _spmv_seconds(unit_matrix)
                handler.records.clear()
                t, cpu = time.perf_counter(), time.process_time()
                result = take_step(ctx, state, k * dt, (k + 1) * dt, dt, formula)
                spent, spent_cpu = time.perf_counter() - t, time.process_time() - cpu
                unit = 0.5 * (before + _spmv_seconds(unit_matrix))
                costs.append(spent_cpu / unit)
                seconds.append(spent)
                units.append(unit)
                counts.append({c: sum(r[c] for r in handler.records) for c in COUNTED})
                state = next_state(result, site.n_nodes, restart=False)
                dt_prev = dt
                lows.append(float(min(c.min() for c in state.fields.values())))
            half = STEPS // 2
            out["variants"][f"{name} C{courant:g}"] = {
                "dt_s": dt, "step_spmv": float(np.median(costs[half:])),
                "first_steps_spmv": float(np.median(costs[:half])),
                "step_s": float(np.median(seconds[half:])),
                "spmv_ms": 1e3 * float(np.median(units[half:])),
                **{c: [r[c] for r in counts] for c in COUNTED},
                "lowest_fraction_of_c0": min(lows) / C0}
    logger.removeHandler(handler)
    out["load_average"] = [list(load_before), list(os.getloadavg())]
    return out


def _krylov_products(v: dict[str, Any]) -> float:
    """Median over the second half of the steps of 2 × (step solve + target solve) Krylov
    iterations: products with the preconditioned operator per step."""
    its = np.add(v["step_iterations"], v["target_iterations"])[STEPS // 2:]
    return 2.0 * float(np.median(its))


def table(rows: list[dict[str, Any]]) -> list[str]:
    """Markdown table of the step costs, the bounded/SUPG ratio and the counts."""
    lines = ["| nodes | Courant | SpMV, CPU [ms] | SUPG step [SpMV] | bounded step [SpMV] "
             "| ratio | SUPG step, wall [s] | bounded step, wall [s] | Krylov products per "
             "step, SUPG / bounded (step + target) | limiter passes | limiter row sweeps | "
             "lowest c/c0 SUPG / bounded | load average before / after |",
             "|---|---|---|---|---|---|---|---|---|---|---|---|---|"]
    for r in rows:
        v = r["variants"]
        load = " / ".join(f"{x[0]:.1f}" for x in r["load_average"])
        for c in ("1", "10"):
            s, b = v[f"supg C{c}"], v[f"bounded C{c}"]
            half = STEPS // 2
            passes = " ".join(f"{p:.0f}" for p in b["limiter_passes"][half:])
            sweeps = float(np.median(b["limiter_row_sweeps"][half:]))
            lines.append(
                f"| {r['nodes']:,} | {c} | {b['spmv_ms']:.1f} | {s['step_spmv']:.0f} | "
                f"{b['step_spmv']:.0f} | {b['step_spmv'] / s['step_spmv']:.2f} | "
                f"{s['step_s']:.3f} | {b['step_s']:.3f} | {_krylov_products(s):.0f} / "
                f"{_krylov_products(b):.0f} | {passes} | {sweeps:.2f} | "
                f"{s['lowest_fraction_of_c0']:.1e} / {b['lowest_fraction_of_c0']:.1e} | "
                f"{load} |")
    return lines


def _one_size(h: float, dz: float) -> dict[str, Any]:
    """Measure one mesh in a fresh process (its peak memory and caches its own)."""
    out = subprocess.run([sys.executable, __file__, "--size", f"{h},{dz}"], check=True,
                         capture_output=True, text=True).stdout
    return json.loads(out.strip().splitlines()[-1])


def main() -> int:
    if "--size" in sys.argv:
        h, dz = (float(x) for x in sys.argv[sys.argv.index("--size") + 1].split(","))
        print(json.dumps(measure(h, dz)), flush=True)
        return 0
    sizes = [(6.0, 2.0)] if "--quick" in sys.argv else SIZES
    rows = []
    for h, dz in sizes:
        rows.append(_one_size(h, dz))
        print(json.dumps(rows[-1]), flush=True)
    print("\n".join(table(rows)))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
