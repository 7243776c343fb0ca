"""run_case: the one composition of the stages (case → mesh → flow → transport → outputs)."""

from __future__ import annotations

import logging
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path

import numpy as np

from fe3d.case.schema import Case
from fe3d.flow.paths import travel_paths
from fe3d.flow.solve import FlowField, solve_flow, unit_materials
from fe3d.mesh.build import build_mesh, obtain_mesh
from fe3d.mesh.site_mesh import SiteMesh
from fe3d.post.figures import plot_breakthrough, plot_heads
from fe3d.post.plume import plume_extent, write_isosurface
from fe3d.post.probes import breakthrough
from fe3d.post.report import ObservationResult, RunSummary, write_report, write_summary_json
from fe3d.post.tables import (
    write_flow_budget,
    write_histories,
    write_mass_budget,
    write_plume_table,
)
from fe3d.post.vtk import write_field, write_mesh, write_pathlines, write_pvd
from fe3d.reactions.kinetics import user_kinetics
from fe3d.transport.budget import MassBudget
from fe3d.transport.run import Snapshot, run_transport
from fe3d.units import from_si, to_seconds

__all__ = ["mesh_and_flow", "mesh_case", "run_case"]

logger = logging.getLogger(__name__)

Progress = Callable[[str, float, float], None]


def mesh_and_flow(case: Case, *, base_dir: Path | None = None) -> tuple[SiteMesh, FlowField]:
    """Build the mesh and solve the steady flow of ``case``."""
    site = build_mesh(case)
    flow = solve_flow(site, case, base_dir=base_dir)
    return site, flow


def check_user_code(case: Case, base_dir: Path | None = None) -> None:
    """Import and probe the user's reaction function named in the case, if any, so that a
    module that cannot be imported is reported before any work (raises CaseError)."""
    user = case.user_reactions
    if user is not None:
        user_kinetics(user.function, n_species=len(user.species),
                      key_path="user_reactions.function", search_dirs=[base_dir or Path()])


@contextmanager
def solver_log(path: Path) -> Iterator[None]:
    """Write the INFO messages of fe3d (flow solve, every transport step, Newton iterations
    and residuals, step cuts) to ``path`` while the block runs; the console keeps its own
    level."""
    root = logging.getLogger("fe3d")
    handler = logging.FileHandler(path, mode="w", encoding="utf-8")
    handler.setLevel(logging.INFO)
    handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(name)s: %(message)s"))
    old_level = root.level
    root.addHandler(handler)
    root.setLevel(logging.INFO)
    try:
        yield
    finally:
        root.removeHandler(handler)
        root.setLevel(old_level)
        handler.close()


def run_case(case: Case, out_dir: Path, *, progress: Progress | None = None,
             base_dir: Path | None = None, mesh_folders: list[Path] | None = None,
             ) -> RunSummary:
    """Run every stage and write the run folder (with ``solver.log``); returns the summary.

    See :func:`_run_case` for the arguments.
    """
    check_user_code(case, base_dir)  # before anything is written
    out_dir.mkdir(parents=True, exist_ok=True)
    with solver_log(out_dir / "solver.log"):
        return _run_case(case, out_dir, progress=progress, base_dir=base_dir,
                         mesh_folders=mesh_folders)


def _run_case(case: Case, out_dir: Path, *, progress: Progress | None = None,
              base_dir: Path | None = None, mesh_folders: list[Path] | None = None,
              ) -> RunSummary:
    """Run every stage and write the run folder; returns the summary.

    ``progress(stage, done, total)`` is called as work advances (for a progress bar);
    ``base_dir`` resolves relative file names in the case (usually the case file's folder);
    ``mesh_folders`` are further folders (after the run folder) where a mesh cached with the
    same mesh inputs is reused from, and copied into the run folder.
    """
    started = time.perf_counter()
    tell = progress or (lambda _s, _d, _t: None)
    out_dir.mkdir(parents=True, exist_ok=True)
    tu, cu = case.output.time_unit, case.output.concentration_unit
    tell("mesh", 0, 1)
    # reuse a mesh cached (run folder first) when the mesh inputs are unchanged
    site, _reused = obtain_mesh(case, [out_dir, *(mesh_folders or [])], save_to=out_dir)
    files = [p.name for p in write_mesh(site, out_dir)]
    tell("flow", 0, 1)
    flow = solve_flow(site, case, base_dir=base_dir)
    mats, _ = unit_materials(case, site)
    theta = np.array([m.porosity for m in mats])[site.cell_layer]
    day = 86400.0
    write_field(site, out_dir / "flow.vtu", point_data={"head [m]": flow.head},
                cell_data={"darcy_flux [m/d]": (flow.darcy_flux * day).T,
                           "seepage_velocity [m/d]": (flow.darcy_flux / theta * day).T,
                           "conductivity [m/d]": (flow.conductivity * day).T})
    write_flow_budget(out_dir / "flow_budget.csv", flow)
    files += ["flow.vtu", "flow_budget.csv"]
    tell("travel paths", 0, 1)
    paths = travel_paths(site, flow, case)
    tsec = to_seconds(tu)
    write_pathlines(out_dir / "pathlines_forward.vtp",
                    [(p.points, p.times) for lines in paths.forward.values() for p in lines],
                    time_unit_seconds=tsec, time_unit=tu)
    write_pathlines(out_dir / "pathlines_backward.vtp",
                    [(p.points, p.times) for lines in paths.backward.values() for p in lines],
                    time_unit_seconds=tsec, time_unit=tu)
    top = site.faces["top"]
    under_top = np.isin(site.cells, np.unique(top)).sum(axis=0) >= 3
    centres = site.points[:2, site.cells[:, under_top]].mean(axis=1)
    plot_heads(out_dir / "heads_plan.png", site.points, top, flow.head,
               (centres, flow.darcy_flux[:2, under_top]),
               markers={**{o.name: (o.x, o.y) for o in case.observation_points},
                        **{w.name: (w.x, w.y) for w in case.wells}},
               pathlines=[p.points for lines in paths.forward.values() for p in lines]
               + [p.points for lines in paths.backward.values() for p in lines],
               title=f"{case.title}: head on the top face")
    files += ["pathlines_forward.vtp", "pathlines_backward.vtp", "heads_plan.png"]

    # lumped nodal volumes for the plume measures (∫φ_j dV = V_e/4 per cell node)
    vol = np.abs(site.cell_volumes())
    node_volume = np.bincount(site.cells.ravel(), weights=np.tile(vol / 4.0, 4),
                              minlength=site.n_nodes)
    node_pore = np.bincount(site.cells.ravel(), weights=np.tile(theta * vol / 4.0, 4),
                            minlength=site.n_nodes)
    origins = {sp: next((s.plan_centre for s in case.sources
                         if s.species == sp and s.plan_centre is not None),
                        (float(site.points[0].mean()), float(site.points[1].mean())))
               for sp in case.species}
    plume_rows: list[tuple[str, float, float, float, float, float]] = []
    series: list[tuple[float, str]] = []
    budgets: list[MassBudget] = []
    last: Snapshot | None = None
    scale = from_si(1.0, cu)
    for snap in run_transport(site, flow, case, base_dir=base_dir,
                              on_step=lambda t, end: tell("transport", t, end)):
        k = len(series)
        name = f"concentration_{k:04d}.vtu"
        write_field(site, out_dir / name,
                    point_data={f"{sp} [{cu}]": c * scale for sp, c in snap.concentration.items()})
        series.append((from_si(snap.time, tu), name))
        write_pvd(out_dir / "concentration.pvd", series, time_unit=tu)
        for sp, c in snap.concentration.items():
            lim = case.species[sp].limit
            ext = plume_extent(site.points, node_volume, node_pore, c, lim, origins[sp])
            plume_rows.append((sp, snap.time, lim, ext.volume, ext.dissolved_mass, ext.extent))
            write_isosurface(out_dir / f"plume_{sp}_{k:04d}.vtp", site.points, site.cells,
                             c * scale, lim * scale, name=f"{sp} [{cu}]")
        write_plume_table(out_dir / "plume.csv", plume_rows, time_unit=tu, conc_unit=cu)
        budgets += list(snap.budgets.values())
        write_mass_budget(out_dir / "mass_budget.csv", budgets, time_unit=tu)
        last = snap
    assert last is not None
    names = [o.name for o in case.observation_points]
    write_histories(out_dir / "histories.csv", last.history_times, last.history, names,
                    time_unit=tu, conc_unit=cu)
    limits = {sp: s.limit for sp, s in case.species.items()}
    if names:
        plot_breakthrough(out_dir / "breakthrough.png", last.history_times, last.history, names,
                          limits, time_unit=tu, conc_unit=cu, title=case.title)
        files.append("breakthrough.png")
    files += [f"plume_{sp}_{k:04d}.vtp" for k in range(len(series)) for sp in case.species]
    files += ["concentration.pvd", *[f for _, f in series], "mass_budget.csv", "histories.csv",
              "plume.csv", "summary.json", "report.md", "solver.log"]
    obs_results = []
    for sp, values in last.history.items():
        for j, o in enumerate(case.observation_points):
            b = breakthrough(last.history_times, values[:, j], limits[sp])
            obs_results.append(ObservationResult(
                name=o.name, kind=o.kind, species=sp, peak=b.peak, peak_time=b.peak_time,
                first_above_limit=b.first_above_limit, limit=limits[sp]))
    worst = {sp: max(b.relative_error for b in budgets if b.species == sp)
             for sp in case.species}
    d = last.diagnostics
    summary = RunSummary(
        title=case.title, site=case.site, n_nodes=site.n_nodes, n_cells=site.n_cells,
        end_time=case.time.end, n_steps=d.n_steps, observations=obs_results,
        step_range=(d.smallest_step, d.largest_step), step_cuts=d.step_cuts,
        rejected_steps=d.rejected_steps, method=_method_words(case),
        limiting_blocked=d.limiting_blocked, monotone=case.solver.monotone,
        mass_balance_error=worst, flow_inflow=flow.total_inflow,
        flow_discrepancy=flow.discrepancy, max_grid_peclet=d.max_grid_peclet,
        max_courant=d.max_courant,
        min_concentration={k: v[0] for k, v in d.min_concentration.items()},
        min_concentration_at={k: v[1] for k, v in d.min_concentration.items()},
        source_max={sp: max([src.peak_concentration for src in case.sources
                             if src.species == sp and src.peak_concentration is not None]
                            + [c for w in case.wells for name, c in
                               w.injection_concentration.items() if name == sp],
                            default=0.0) for sp in case.species},
        plume={sp: {"largest_extent": max(r[5] for r in rows),
                    "time_of_largest_extent": max(rows, key=lambda r: r[5])[1],
                    "largest_volume": max(r[3] for r in rows),
                    "final_extent": rows[-1][5]}
               for sp in case.species
               for rows in [[r for r in plume_rows if r[0] == sp]]},
        travel_times=[{"source": a.source, "receptor": a.receptor, "time": a.time,
                       "closest": a.closest, "reach": a.reach} for a in paths.arrivals],
        well_heads=dict(flow.well_heads),
        wall_time=time.perf_counter() - started, time_unit=tu, concentration_unit=cu,
        files=files)
    write_summary_json(out_dir / "summary.json", summary)
    write_report(out_dir / "report.md", summary)
    return summary


def _method_words(case: Case) -> str:
    """The transport method in words, for the report (theory.md T6, T13–T16b)."""
    sc = case.solver
    names = {"backward_euler": "backward Euler", "crank_nicolson": "Crank–Nicolson",
             "bdf2": "BDF2"}
    time_words = names[case.time.scheme] + (", adaptive steps" if case.time.adaptive else "")
    if sc.monotone:
        space = ("low-order monotone (lumped storage, discrete upwinding)"
                 + (" with flux limiting" if sc.flux_limiting else ""))
    elif sc.supg:
        space = "SUPG" + (" with shock capturing" if sc.shock_capturing else "")
    else:
        space = "Galerkin, no stabilisation" + (" with shock capturing"
                                                if sc.shock_capturing else "")
    return f"{time_words}; {space}; linear solver {sc.linear_solver}, " \
           f"relative tolerance {sc.tolerance:.0e}"


def mesh_case(case: Case, out_dir: Path) -> tuple[SiteMesh, bool, list[Path]]:
    """Build (or reuse, when the mesh inputs are unchanged) the mesh of ``case`` and write
    ``mesh.msh``, ``mesh.vtu``, ``mesh.npz`` and ``mesh.json`` in ``out_dir``.

    Returns the mesh, whether it was reused, and the files written.
    """
    out_dir.mkdir(parents=True, exist_ok=True)
    site, reused = obtain_mesh(case, [out_dir], save_to=out_dir)
    files = write_mesh(site, out_dir)
    return site, reused, [*files, out_dir / "mesh.npz", out_dir / "mesh.json"]
