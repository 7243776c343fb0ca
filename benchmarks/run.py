"""Speed and memory benchmark of the foundation pipeline (``make bench``).

Builds box meshes of increasing size from the tiny case's physics, and times: meshing, the
flow solve, transport operator assembly, one transport step, and one sparse matrix-vector
product (SpMV) of the step matrix, reporting the step cost in SpMV-equivalents and peak
memory (resident set size). Writes docs/performance.md. Not part of ``make test``.
"""

from __future__ import annotations

import resource
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]


def _peak_mib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def run(cell: float, dz: float) -> dict[str, float]:
    from fe3d.case.load import parse_case
    from fe3d.flow.solve import solve_flow
    from fe3d.mesh.build import build_mesh
    from fe3d.transport import run as transport

    text = (ROOT / "cases" / "tiny" / "case.toml").read_text()
    text = text.replace('cell_size = "8 m"', f'cell_size = "{cell} m"')
    text = text.replace('fine_cell_size = "4 m"', f'fine_cell_size = "{cell} m"')
    text = text.replace('layer_cell_thickness = "1 m"', f'layer_cell_thickness = "{dz} m"')
    text = text.replace('end = "2 yr"', 'end = "60 d"').replace('output_interval = "0.5 yr"',
                                                                'output_interval = "60 d"')
    case = parse_case(text)
    t = time.perf_counter()
    site = build_mesh(case)
    t_mesh = time.perf_counter() - t
    t = time.perf_counter()
    flow = solve_flow(site, case)
    t_flow = time.perf_counter() - t
    t = time.perf_counter()
    stamps: list[float] = []
    gen = transport.run_transport(site, flow, case,
                                  on_step=lambda _a, _b: stamps.append(time.perf_counter()))
    for _ in gen:
        pass
    t_total = time.perf_counter() - t
    step_times = np.diff(stamps)  # steps after the first reuse the operator and solver
    # the transport operators in closed form (what each species assembles per step length),
    # and one SpMV of the resulting step matrix
    from fe3d.mesh.geometry import p1_gradients
    from fe3d.transport.assembly import transport_operators

    grads, vol = p1_gradients(site.points, site.cells)
    m = site.n_cells
    ones = np.ones(m)
    t = time.perf_counter()
    M, K = transport_operators(site.cells, grads, vol, m=0.3 * ones, k=1e-9 * ones,
                               q=flow.darcy_flux, a=flow.darcy_flux / 0.3, tau=1e3 * ones,
                               theta_d=np.repeat(1e-6 * np.eye(3)[:, :, None], m, axis=2),
                               n=site.n_nodes)
    A = (M / 86400.0 + K).tocsr()
    t_asm = time.perf_counter() - t
    x = np.ones(A.shape[0])
    t = time.perf_counter()
    for _ in range(20):
        A @ x
    t_spmv = (time.perf_counter() - t) / 20
    return {"nodes": site.n_nodes, "cells": site.n_cells, "mesh_s": t_mesh, "flow_s": t_flow,
            "transport_s": t_total,
            "step_s": float(np.median(step_times)), "asm_one_form_s": t_asm,
            "spmv_ms": t_spmv * 1e3, "step_in_spmv": float(np.median(step_times)) / t_spmv,
            "peak_mib": _peak_mib()}


def main() -> int:
    sizes = [(2.0, 0.5), (1.0, 0.25), (0.6, 0.15)]
    if "--quick" in sys.argv:
        sizes = [(4.0, 1.0)]
    rows = []
    for cell, dz in sizes:
        r = run(cell, dz)
        rows.append(r)
        print({k: round(v, 4) if isinstance(v, float) else v for k, v in r.items()})
    lines = ["# Performance", "",
             "Measured by `make bench` (benchmarks/run.py) on the 2-core development machine; "
             "timings on a shared machine vary by ±20–50 %.", "",
             "| nodes | tetrahedra | mesh [s] | flow [s] | transport operators [s] | "
             "transport step [s] | SpMV [ms] | step / SpMV | peak RSS [MiB] |",
             "|---|---|---|---|---|---|---|---|---|"]
    for r in rows:
        lines.append(f"| {r['nodes']:,} | {r['cells']:,} | {r['mesh_s']:.2f} | {r['flow_s']:.2f}"
                     f" | {r['asm_one_form_s']:.2f} | {r['step_s']:.3f} | {r['spmv_ms']:.2f} | "
                     f"{r['step_in_spmv']:.0f} | {r['peak_mib']:.0f} |")
    lines += ["", "The transport step is one species with its operator and solver reused "
              "(median over the steps after the first), including the budget, probes and "
              "diagnostics of the step. 'Transport operators' is the closed-form assembly of "
              "the mass and spatial operators of one species. Peak RSS is for the whole "
              "process up to that row.", "",
              "Against the transport targets of the transport-core issue (at 1 M nodes: "
              "operator build ≤ 5 s, a linear step ≤ 25 SpMV at Courant ≈ 1): the closed-form "
              "build scales to about 3.5 s per million tetrahedra, but a step costs 300–500 "
              "SpMV here (GMRES to a relative 1e-10 with a fresh AMG V-cycle per iteration, "
              "the tiny case's Courant number about 3, plus the budget and probes). Not met "
              "yet; a looser tolerance tied to the budget target and a cheaper preconditioner "
              "at low Courant numbers are the next steps.", ""]
    # replace only this script's part (the top of the file, before the next section)
    perf = ROOT / "docs" / "performance.md"
    old = perf.read_text(encoding="utf-8") if perf.exists() else ""
    rest = old[old.index("\n## "):] if "\n## " in old else ""
    perf.write_text("\n".join(lines).rstrip("\n") + "\n" + rest, encoding="utf-8")
    return 0


if __name__ == "__main__":
    sys.exit(main())
