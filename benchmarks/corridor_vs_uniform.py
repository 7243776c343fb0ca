"""The plume corridor against a uniformly fine mesh (issue 11 benchmark): same accuracy at the
receptors, how many nodes each needs.

Run ``.venv/bin/python benchmarks/corridor_vs_uniform.py`` (a few minutes on two shared cores;
``--half-width`` and ``--length`` set the site's plan size). It prints one table with units
and writes nothing.

The site is the patch-source site of tests/verification/_patch_source.py (invented: a 40 m ×
10 m patch held at 20 mg/L on the inflow face of a 20 m sand, v = 0.4 m/d, R = 1.6, limit
c0/4000), with α_L = 2.5 m and α_T = 0.25 m (as in the verification test N23) and a plan
larger than the plume, as a real site is: by default 800 m × 2 × 250 m (the model holds the
half y ≥ 0). The reference is the exact finite-patch solution (Wexler 1992, *Analytical
solutions for one-, two-, and three-dimensional solute transport in ground-water systems with
uniform flow*, USGS TWRI 3-B7; checked against its PDE in tests/verification/
test_patch_source.py). Every run uses fe3d's default transport settings (bounded
Crank–Nicolson, steps that follow the plume at Courant 1).

Meshes:

* ``corridor``: fe3d's default mesher: 20 m cells, and the plume corridor (grid Péclet 2
  along the pathline from the patch: 5 m plan cells, cell layers from the vertical spread)
  placed by the mesher from a first flow solve;
* ``uniform fine``: no corridor, the corridor's finest plan cell (Pe* · α_L = 5 m) and its
  thinnest cell layer everywhere;
* ``uniform coarse``: no corridor, 20 m cells everywhere (the corridor mesh's cells away
  from the plume), for contrast.

Reported per mesh: nodes, the first time above the limit at 100, 200 and 300 m and its
error against the exact solution, the lowest value, the run time, and the node ratio
uniform fine / corridor. Results are screening estimates that depend on the inputs; they do
not replace local regulations or licensed professional judgement.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "tests" / "verification"))

from _patch_source import YEAR, PatchSite, SiteResult, run_site  # noqa: E402

from fe3d.case.builder import with_changes  # noqa: E402
from fe3d.case.schema import Case  # noqa: E402
from fe3d.mesh.corridor import Corridor  # noqa: E402


def uniform(base: Case, corridor: Corridor | None) -> dict[str, Case]:
    """The uniform cases beside the corridor case ``base``: the corridor's finest plan cell
    and thinnest cell layer everywhere, and the base case's own sizes without a corridor."""
    assert corridor is not None, "the corridor case must build a corridor"
    fine = corridor.cell_size_range[0]
    dz = min(corridor.layer_thickness.values(), default=base.mesh.layer_cell_thickness)
    return {
        "uniform fine": with_changes(base, mesh={"corridor": False, "cell_size": f"{fine} m",
                                                 "layer_cell_thickness": f"{dz} m"}),
        "uniform coarse": with_changes(base, mesh={"corridor": False}),
    }


def table(results: dict[str, SiteResult]) -> str:
    """The results with units."""
    head = (f"{'mesh':<15} {'nodes':>8} {'x [m]':>6} {'first fe3d [yr]':>15} "
            f"{'exact [yr]':>10} {'error [%]':>9} {'lowest [mg/L]':>13} {'run [s]':>7}")
    lines = [head, "-" * len(head)]
    for name, r in results.items():
        for p in r.receptors:
            fe3d = "never" if p.first_fe3d is None else f"{p.first_fe3d / YEAR:.3f}"
            exact = "never" if p.first_exact is None else f"{p.first_exact / YEAR:.3f}"
            err = "-" if p.first_error is None else f"{100 * p.first_error:+.2f}"
            lines.append(f"{name:<15} {r.n_nodes:8d} {p.x:6.0f} {fe3d:>15} {exact:>10} "
                         f"{err:>9} {r.most_negative * 1e3:13.2e} {r.seconds:7.1f}")
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    """Build the three meshes, run each, print the table and the node ratio."""
    from fe3d.pipeline import mesh_and_flow

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--half-width", type=float, default=250.0, help="model half-width [m]")
    ap.add_argument("--length", type=float, default=800.0, help="model length [m]")
    args = ap.parse_args(argv)
    site = PatchSite(alpha_l=2.5, alpha_t=0.25, fine_cell=20.0, dz=2.0,
                     half_width=args.half_width, length=args.length,
                     head_drop=3.0 * args.length / 600.0)  # the same gradient, 0.005
    exact = site.exact_first_times()
    base = with_changes(site.case(step=0.1), time={"step": None})  # fe3d's defaults
    results = {}

    def run(name: str, case: Case) -> Corridor | None:
        t0 = time.perf_counter()
        mesh, flow = mesh_and_flow(case)
        results[name] = run_site(site, case, (mesh, flow), exact)
        print(f"{name}: {results[name].n_nodes} nodes, mesh + flow + transport "
              f"{time.perf_counter() - t0:.0f} s", flush=True)
        return mesh.report.corridor

    corridor = run("corridor", base)
    for name, case in uniform(base, corridor).items():
        run(name, case)
    print("\n".join(corridor.lines()) if corridor is not None else "no corridor")
    print(f"Plume corridor against a uniform mesh: patch site {site.length:g} m × "
          f"2 × {site.half_width:g} m, α_L {site.alpha_l:g} m, {site.end:g} yr, limit "
          f"{site.c0 * site.limit_ratio * 1e3:g} µg/L, fe3d's default transport settings")
    print(table(results))
    ratio = results["uniform fine"].n_nodes / results["corridor"].n_nodes
    worst = {n: max(abs(p.first_error or 0.0) for p in r.receptors) for n, r in results.items()}
    print(f"nodes, uniform fine / corridor: {ratio:.2f}; largest |error| of the first time "
          "above the limit: " + ", ".join(f"{n} {100 * e:.2f} %" for n, e in worst.items()))
    print("Screening estimates that depend on the inputs; follow local regulations and "
          "licensed professional practice.")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
