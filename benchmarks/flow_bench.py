"""Flow benchmark (``make bench``): steady flow at about 130 k and 1 M nodes.

Each size runs in its own process so that peak memory is per size. Reports mesh time, flow
time (tensors, assembly, AMG-CG set-up and solve), CG iterations and peak RSS, and appends a
"Flow" section to docs/performance.md. Target (issue): ≤ 30 s for the flow solve at ~1 M
nodes and CG iterations growing by ≤ 1.3× when the node count grows 8×.
"""

from __future__ import annotations

import json
import resource
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

CASE = """
title = "flow benchmark"
[box]
x = ["0 m", "1000 m"]
y = ["0 m", "1000 m"]
top = "0 m"
[materials.sand]
horizontal_conductivity = "10 m/d"
vertical_conductivity = "1 m/d"
porosity = 0.3
bulk_density = "1650 kg/m^3"
longitudinal_dispersivity = "5 m"
transverse_dispersivity = "0.5 m"
[materials.clay]
horizontal_conductivity = "0.01 m/d"
vertical_conductivity = "0.001 m/d"
porosity = 0.4
bulk_density = "1550 kg/m^3"
longitudinal_dispersivity = "1 m"
transverse_dispersivity = "0.1 m"
[materials.gravel]
horizontal_conductivity = "60 m/d"
porosity = 0.25
bulk_density = "1800 kg/m^3"
longitudinal_dispersivity = "5 m"
transverse_dispersivity = "0.5 m"
[[layers]]
name = "sand"
material = "sand"
bottom = "-8 m"
[[layers]]
name = "clay"
material = "clay"
bottom = "-12 m"
bottom_gradient = [0.002, 0.0]
[[layers]]
name = "gravel"
material = "gravel"
bottom = "-25 m"
[[fixed_heads]]
face = "west"
head = "2 m"
[[fixed_heads]]
face = "east"
head = "0 m"
[[recharge]]
name = "rain"
rate = "200 mm/yr"
[[wells]]
name = "PW"
x = "600 m"
y = "500 m"
screens = [["-14 m", "-24 m"]]
rate = "800 m^3/d"
[species.tracer]
limit = "1 mg/L"
[time]
end = "1 d"
step = "1 d"
[mesh]
cell_size = "{h} m"
layer_cell_thickness = "{dz} m"
"""


def one(h: float, dz: float) -> dict[str, float]:
    from fe3d.case.load import parse_case
    from fe3d.flow.solve import solve_flow
    from fe3d.mesh.build import build_mesh

    case = parse_case(CASE.format(h=h, dz=dz))
    t = time.perf_counter()
    site = build_mesh(case)
    t_mesh = time.perf_counter() - t
    t = time.perf_counter()
    flow = solve_flow(site, case)
    t_flow = time.perf_counter() - t
    return {"nodes": site.n_nodes, "cells": site.n_cells, "mesh_s": t_mesh, "flow_s": t_flow,
            "amg_setup_s": flow.timings.get("setup_s", 0.0),
            "cg_solve_s": flow.timings.get("solve_s", 0.0),
            "cg_iterations": flow.solver_iterations, "discrepancy": flow.discrepancy,
            "peak_mib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0}


def main() -> int:
    if len(sys.argv) == 4 and sys.argv[1] == "--one":
        print(json.dumps(one(float(sys.argv[2]), float(sys.argv[3]))))
        return 0
    sizes = [(10.0, 2.3), (5.0, 1.15)] if "--quick" not in sys.argv else [(40.0, 5.0)]
    rows = []
    for h, dz in sizes:
        out = subprocess.run([sys.executable, __file__, "--one", str(h), str(dz)],
                             capture_output=True, text=True, check=True)
        r = json.loads(out.stdout.strip().splitlines()[-1])
        print(r)
        rows.append(r)
    lines = ["", "## Flow (benchmarks/flow_bench.py)", "",
             "Layered 1 km × 1 km site (sand / clay / gravel, K from 0.001 to 60 m/d), fixed "
             "heads, recharge and a pumping well; CG with one classical (Ruge–Stüben) AMG "
             "V-cycle, relative tolerance 1e-12.", "",
             "| nodes | tetrahedra | mesh [s] | flow total [s] | AMG set-up [s] | CG solve [s] "
             "| CG iterations | budget discrepancy | peak RSS [MiB] |",
             "|---|---|---|---|---|---|---|---|---|"]
    for r in rows:
        lines.append(f"| {r['nodes']:,} | {r['cells']:,} | {r['mesh_s']:.1f} | "
                     f"{r['flow_s']:.1f} | {r['amg_setup_s']:.1f} | {r['cg_solve_s']:.1f} | "
                     f"{r['cg_iterations']} | {r['discrepancy']:.1e} | {r['peak_mib']:.0f} |")
    if len(rows) == 2:
        lines += ["", f"Node count grew {rows[1]['nodes'] / rows[0]['nodes']:.1f}×; CG "
                  f"iterations grew {rows[1]['cg_iterations'] / rows[0]['cg_iterations']:.2f}×."]
    perf = ROOT / "docs" / "performance.md"
    text = perf.read_text(encoding="utf-8") if perf.exists() else "# Performance\n"
    marker = "\n## Flow (benchmarks/flow_bench.py)"
    if marker in text:
        head, _, rest = text.partition(marker)
        nxt = rest.find("\n## ")
        text = head + ("" if nxt < 0 else rest[nxt:])
    perf.write_text(text.rstrip("\n") + "\n" + "\n".join(lines) + "\n", encoding="utf-8")
    return 0


if __name__ == "__main__":
    sys.exit(main())
