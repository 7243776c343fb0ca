"""Cost of one transport step through the engine itself: the default bounded step against the
SUPG step, in SpMV equivalents (issue 11's benchmark).

The Harrow Flats test box of ``benchmarks/run.py`` (invented: 400 m × 200 m, sand over silt,
fixed heads west and east) with a fixed-concentration source box is meshed (no plume
corridor, so that both schemes share one mesh) and its flow solved; then, for each scheme and
Courant number (1 and 10, from the largest cell rate |a|/h), the run's own step context is
built (``fe3d.transport.run.step_context``) and ``take_step`` marches ``STEPS`` steps from
the source switching on, exactly as ``run_transport`` would (budgets included, probes and
outputs excluded). Each step is timed and divided by the time of one SpMV of a matrix on the
mesh's CSR pattern measured right beside it (the unit survives a shared, loaded machine).

- ``supg``: SUPG, backward Euler, no flux limiting (fe3d's former default);
- ``bounded``: fe3d's defaults (low-order backward Euler step, Crank–Nicolson Galerkin
  target, flux limiter; theory.md T16).

Usage: ``python benchmarks/step_cost.py [--quick]`` (``--quick``: a small mesh only). Prints one
JSON line per size and a Markdown table; docs/performance.md quotes the table.
"""

from __future__ import annotations

import json
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

SIZES = [(6.0, 2.0), (2.6, 0.8)]
"""(plan cell size, layer cell thickness) [m]: about 25 k and 200 k nodes."""


def _spmv_seconds(A: Any) -> float:
    x = np.ones(A.shape[0])
    t = time.perf_counter()
    for _ in range(5):
        A @ x
    return (time.perf_counter() - t) / 5


def measure(h: float, dz: float) -> dict[str, Any]:
    """Step costs of both variants at Courant 1 and 10 on one mesh."""
    (x0, x1), (y0, y1), (z0, z1) = SOURCE_BOX
    base = with_changes(site_case(h, dz), mesh={"corridor": False}, sources=[
        Source("spill", species="solvent", shape="box", x=(x0, x1), y=(y0, y1), z=(z0, z1),
               concentration=f"{C0} kg/m^3")])
    site, flow = mesh_and_flow(base)
    unit_matrix = site.pattern.matrix(np.ones(site.pattern.indices.size))
    out: dict[str, Any] = {"nodes": site.n_nodes, "cells": site.n_cells, "variants": {}}
    for name, (solver, scheme) in SCHEMES.items():
        for courant in (1.0, 10.0):
            probe = with_changes(base, time={"end": "1 d", "step": "1 d"})
            rate = step_context(site, flow, TransportInputs.of(probe), None)
            dt = courant / max(s.coefficients.courant_rate for s in rate.species)
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
            costs, seconds, lows = [], [], []
            dt_prev = None
            for k in range(STEPS):
                formula = step_coefficients(case.time.scheme, dt, dt_prev)
                before = _spmv_seconds(unit_matrix)
                t = time.perf_counter()
                result = take_step(ctx, state, k * dt, (k + 1) * dt, dt, formula)
                spent = time.perf_counter() - t
                unit = 0.5 * (before + _spmv_seconds(unit_matrix))
                costs.append(spent / unit)
                seconds.append(spent)
                state = next_state(result, site.n_nodes, restart=False)
                dt_prev = dt
                lows.append(float(min(c.min() for c in state.fields.values())))
            half = STEPS // 2
            out["variants"][f"{name} C{courant:g}"] = {
                "dt_s": dt, "step_spmv": float(np.median(costs[half:])),
                "first_steps_spmv": float(np.median(costs[:half])),
                "step_s": float(np.median(seconds[half:])),
                "lowest_fraction_of_c0": min(lows) / C0}
    return out


def table(rows: list[dict[str, Any]]) -> list[str]:
    """Markdown table of the step costs and the bounded/SUPG ratio."""
    lines = ["| nodes | Courant | SUPG step [SpMV] | bounded step [SpMV] | ratio | lowest c/c0 "
             "SUPG / bounded |", "|---|---|---|---|---|---|"]
    for r in rows:
        v = r["variants"]
        for c in ("1", "10"):
            s, b = v[f"supg C{c}"], v[f"bounded C{c}"]
            lines.append(f"| {r['nodes']:,} | {c} | {s['step_spmv']:.0f} | {b['step_spmv']:.0f} | "
                         f"{b['step_spmv'] / s['step_spmv']:.1f} | "
                         f"{s['lowest_fraction_of_c0']:.1e} / {b['lowest_fraction_of_c0']:.1e} |")
    return lines


def main() -> int:
    sizes = SIZES[:1] if "--quick" in sys.argv else SIZES
    rows = []
    for h, dz in sizes:
        rows.append(measure(h, dz))
        print(json.dumps(rows[-1]), flush=True)
    print("\n".join(table(rows)))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
