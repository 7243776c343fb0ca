"""Site-scale accuracy check of issue 11: a continuous patch source against its exact solution.

Run ``.venv/bin/python benchmarks/patch_source.py`` (under a minute on two shared cores; options:
``--fine-cell 2.5`` for a finer corridor, ``--quick`` for the default settings at 0.1 yr
only). It prints one table with units and writes nothing.

The site (invented; tests/verification/_patch_source.py, ``PatchSite``): half of a 600 m ×
200 m sand 20 m thick, K = 20 m/d, gradient 0.005, porosity 0.25 (v = 0.4 m/d), R = 1.6,
α_L = 0.5 m, α_T = 0.05 m; a 40 m × 10 m patch at the top of the west face held at 20 mg/L
from t = 0; limit c0/4000 = 5 µg/L; receptors on the centreline at 100, 200 and 300 m, at the
patch's mid-height (z = −5 m); 5 m plan cells in a corridor along the centreline (grid Péclet
10 along the flow), 20 m elsewhere, 1 m cell layers; 4 yr. Symmetry: the no-flux top and the
south face (y = 0) are mirrors through the patch, so the model holds a quarter of the
mirrored 40 m × 20 m patch and the exact reference (Wexler 1992, finite patch source) is that
whole patch in an unbounded medium.

Runs: fe3d's default settings, ``solver.monotone``, ``solver.monotone`` with
``solver.flux_limiting``, and (for contrast, not a default) ``time.scheme = "crank_nicolson"``,
each with 0.1 yr and 0.02 yr steps, all on one mesh and flow field.

Reported per run and receptor: the first time above the limit from fe3d and exact (and the
relative error; negative = early), the values at the end, the most negative concentration
anywhere in the run as a multiple of the limit, the solute mass that entered (fe3d's source
input) against the exact net inflow through the patch (advective c0 q A t plus the 1D
dispersive part, ``entered_mass``), and fe3d's Courant and grid Péclet numbers.

Finite model against the semi-infinite reference, checked every run (printed under the
table): (1) the north face and the base are no-flux mirrors; adding their images to the
reference moves the exact first times and end values by the amounts printed (days, and
multiples of the limit); (2) the exact concentration at the outflow face at the end time is
printed as a multiple of the limit: when it is ~0, the outflow condition cannot reach back to
the receptors; (3) fe3d's own outflow through the east face is printed as a share of the
input (it is fe3d's numerical spreading, not physics). The inflow face outside the patch is
not the same condition: the reference holds c = 0 there, fe3d lets clean water in with zero
total flux (theory.md T3); both keep c ≈ 0 there and differ only next to the patch edges.

Results are screening estimates that depend on the inputs; they do not replace local
regulations or licensed professional judgement.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "tests" / "verification"))

from _patch_source import (  # noqa: E402
    DAY,
    YEAR,
    PatchSite,
    SiteResult,
    patch_concentration,
    run_site,
)

from fe3d.case.builder import Solver  # noqa: E402

OPTIONS: dict[str, tuple[Solver | None, str | None]] = {  # name: (solver, time scheme)
    "default": (None, None),
    "monotone": (Solver(monotone=True), None),
    "monotone+limiting": (Solver(monotone=True, flux_limiting=True), None),
    "crank_nicolson": (None, "crank_nicolson"),  # SUPG, second order in time (for contrast)
}
STEPS = (0.1, 0.02)  # [yr]


def _yr(t: float | None) -> str:
    return "never" if t is None else f"{t / YEAR:7.3f}"


def _pct(e: float | None) -> str:
    return "   -  " if e is None else f"{100 * e:+6.1f}"


def table(site: PatchSite, results: dict[tuple[str, float], SiteResult]) -> str:
    """The results as a text table with units."""
    limit = site.c0 * 1e-3 * site.limit_ratio
    head = (f"{'scheme':<18} {'dt [yr]':>7} {'x [m]':>5} {'first fe3d [yr]':>15} "
            f"{'first exact [yr]':>16} {'error [%]':>9} {'end fe3d [mg/L]':>15} "
            f"{'end exact [mg/L]':>16} {'end err [%]':>11}")
    lines = [head, "-" * len(head)]
    for (name, step), r in results.items():
        for p in r.receptors:
            end_err = (p.end_fe3d - p.end_exact) / p.end_exact
            lines.append(f"{name:<18} {step:7.2f} {p.x:5.0f} {_yr(p.first_fe3d):>15} "
                         f"{_yr(p.first_exact):>16} {_pct(p.first_error):>9} "
                         f"{p.end_fe3d * 1e3:15.4f} {p.end_exact * 1e3:16.4f} "
                         f"{_pct(end_err):>11}")
    lines.append("")
    head2 = (f"{'scheme':<18} {'dt [yr]':>7} {'min c [mg/L]':>12} {'min c/limit':>11} "
             f"{'entered [kg]':>12} {'exact [kg]':>10} {'entered err [%]':>15} "
             f"{'east out/in':>11} {'budget err':>10} {'Courant':>7} {'Pe_grid':>7} "
             f"{'nodes':>6} {'run [s]':>7}")
    lines += [head2, "-" * len(head2)]
    for (name, step), r in results.items():
        exact = sum(r.entered_exact)
        lines.append(f"{name:<18} {step:7.2f} {r.most_negative * 1e3:12.4f} "
                     f"{r.most_negative / limit:11.1f} {r.entered:12.2f} {exact:10.2f} "
                     f"{_pct((r.entered - exact) / exact):>15} "
                     f"{r.outflow / r.entered:11.1e} {r.budget_error:10.1e} "
                     f"{r.max_courant:7.2f} "
                     f"{r.max_grid_peclet:7.1f} {r.n_nodes:6d} {r.seconds:7.1f}")
    return "\n".join(lines)


def boundary_checks(site: PatchSite) -> str:
    """How much the finite model's faces could matter, from the exact solution."""
    limit_ratio = site.limit_ratio
    free = site.exact_first_times()
    walled = site.exact_first_times(walls=True)
    shift = max(abs(a - b) for a, b in zip(free, walled, strict=True)
                if a is not None and b is not None)
    t_end = site.end * YEAR
    ends = [float(patch_concentration(x, 0.0, site.receptor_z, t_end,
                                      **site.reference(walls=w)))
            for x in site.receptors for w in (False, True)]
    end_shift = max(abs(ends[i] - ends[i + 1]) for i in range(0, len(ends), 2))
    at_outlet = float(patch_concentration(site.length, 0.0, 0.0, t_end, **site.reference()))
    adv, disp = site.exact_entered()
    c_nominal = site.velocity / site.retardation * 0.1 * YEAR / site.fine_cell
    return (
        f"north face and base as mirrors: exact first times move by at most {shift / DAY:.1e} d,"
        f" end values by {end_shift / limit_ratio:.1e} × limit\n"
        f"exact c at the outflow face (x = {site.length:.0f} m, centreline, top) at "
        f"{site.end:g} yr: {at_outlet / limit_ratio:.1e} × limit\n"
        f"exact entered mass = advective c0·q·A·t {adv:.2f} kg + dispersive {disp:.3f} kg "
        f"(A = {site.patch_half_width * site.patch_height:.0f} m², the model's quarter of "
        "the mirrored patch)\n"
        f"nominal Courant v·dt/(R·h) at 0.1 yr and h = {site.fine_cell:g} m: {c_nominal:.2f}; "
        f"grid Péclet h/α_L = {site.fine_cell / site.alpha_l:.0f} (fe3d's Courant and Péclet "
        "columns are its own maxima over all cells)")


def main(argv: list[str] | None = None) -> int:
    """Run every option and step, print the table."""
    from fe3d.pipeline import mesh_and_flow

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--fine-cell", type=float, default=5.0, help="corridor cell size [m]")
    ap.add_argument("--quick", action="store_true", help="default settings, 0.1 yr only")
    args = ap.parse_args(argv)
    site = PatchSite(fine_cell=args.fine_cell)
    t0 = time.perf_counter()
    exact_first = site.exact_first_times()
    mesh_flow = mesh_and_flow(site.case(step=STEPS[0]))
    results: dict[tuple[str, float], SiteResult] = {}
    runs = [("default", STEPS[0])] if args.quick else [(n, s) for n in OPTIONS for s in STEPS]
    for name, step in runs:
        solver, scheme = OPTIONS[name]
        case = site.case(step=step, solver=solver, scheme=scheme)
        results[(name, step)] = run_site(site, case, mesh_flow, exact_first)
    print(f"Patch source at site scale (issue 11), corridor cells {site.fine_cell:g} m, "
          f"{site.end:g} yr, limit {site.c0 * site.limit_ratio * 1e3:g} ug/L")
    print(table(site, results))
    edge = next(iter(results.values())).corridor_edge
    print(f"median plan edge along the centreline: {edge:.2f} m (grid Péclet "
          f"{edge / site.alpha_l:.1f} by edge length)")
    print(boundary_checks(site))
    print(f"total {time.perf_counter() - t0:.0f} s")
    print("Screening estimates that depend on the inputs; follow local regulations and "
          "licensed professional practice.")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
