"""Command line: ``fe3d check``, ``fe3d mesh``, ``fe3d run``, ``fe3d refine``,
``fe3d ensemble`` and ``fe3d long-term`` (each CASE), ``fe3d report`` (a run folder) and
``fe3d compare`` (run folders).

Only this module prints or exits. Every :class:`~fe3d.errors.Fe3dError` becomes one line per
problem on standard error and exit code 2; Ctrl-C one line and exit code 130 (SIGTERM: 143;
a run says how to continue with ``--resume``); a file that cannot be written (disk full,
read-only) one line and 74; code that calls ``sys.exit`` one line and 70; no traceback is
shown.
"""

from __future__ import annotations

import argparse
import logging
import sys
from pathlib import Path

from fe3d import __version__
from fe3d.case.load import load_case
from fe3d.errors import CaseErrors, Fe3dError

__all__ = ["main"]

EXIT_BAD_INPUT = 2
EXIT_INTERRUPTED = 130  # the shell's code for a run stopped by Ctrl-C
EXIT_CANNOT_WRITE = 74  # a file could not be read or written: disk full, read-only (sysexits)
EXIT_CODE_STOPPED = 70  # code fe3d runs (a user module, a library) called sys.exit (sysexits)


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="fe3d",
        description="Screening-level 3D groundwater flow and contaminant transport in layered "
                    "aquifers. Results are screening estimates that depend on the inputs.")
    p.add_argument("--version", action="version", version=f"fe3d {__version__}")
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND")
    c = sub.add_parser("check", help="validate a case file and summarise the model",
                       description="Validate a case file and print a summary of the model "
                                   "(units, materials, estimated cell count) and the inputs "
                                   "outside their usual range. Writes nothing. A "
                                   "[user_reactions] module is Python code that runs when it "
                                   "is imported: check imports and tries it only with "
                                   "--run-user-code (fe3d run always runs it).")
    c.add_argument("case", type=Path, help="case file (TOML)")
    c.add_argument("--run-user-code", action="store_true",
                   help="import and try the case's user_reactions module (this runs its code)")
    m = sub.add_parser("mesh", help="build the mesh of a case and report its quality",
                       description="Build (or reuse, if the mesh inputs are unchanged) the mesh "
                                   "of a case, report its quality and where the surface rules "
                                   "applied, and write mesh.msh, mesh.vtu, mesh.npz and "
                                   "mesh.json.")
    m.add_argument("case", type=Path, help="case file (TOML)")
    m.add_argument("--out", type=Path, default=None,
                   help="mesh folder (default: meshes/<case name>)")
    r = sub.add_parser("run", help="run a case: mesh, flow, transport, outputs",
                       description="Run a case end to end and write the run folder: the fields "
                                   "(results.vtkhdf), histories, receptors, plume measures and "
                                   "mass budget (CSV), figures (PNG), summary (JSON), the "
                                   "handover report (Markdown and HTML) and run.json (how the "
                                   "run ended, every file with its checksum). The folder is "
                                   "replaced as a whole when the run ends.")
    r.add_argument("case", type=Path, help="case file (TOML)")
    r.add_argument("--out", type=Path, default=None,
                   help="run folder (default: output.folder of the case, else runs/<case name>)")
    r.add_argument("--quiet", action="store_true", help="no progress bar")
    r.add_argument("--overwrite", action="store_true",
                   help="replace an earlier run in the run folder (as a whole)")
    r.add_argument("--force", action="store_true",
                   help="run even when the estimated memory or output does not fit this "
                        "machine")
    r.add_argument("--resume", action="store_true",
                   help="continue the stopped run of the run folder from its last checkpoint "
                        "(refused when the case, mesh or flow changed)")
    r.add_argument("--checkpoint-every", default="10 min", metavar="INTERVAL",
                   help="save a checkpoint this often: a wall-clock time ('10 min', the "
                        "default), a number of steps ('500 steps') or 'off'; Ctrl-C and "
                        "SIGTERM always save one")
    lt = sub.add_parser("long-term", help="the largest plume the continuous sources can make",
                        description="Solve the steady transport of the sources that never "
                                    "stop (theory.md T17) and write steady_plume.vtu and "
                                    "steady_plume.csv: how far, how deep and how large the "
                                    "part above each limit can ever get.")
    lt.add_argument("case", type=Path, help="case file (TOML)")
    lt.add_argument("--out", type=Path, default=None,
                    help="folder (default: runs/<case name>_long_term)")
    rp = sub.add_parser("report", help="write the handover report of a run folder",
                        description="Write report.md and a self-contained report.html (figures "
                                    "embedded) from the files of a run folder.")
    rp.add_argument("run_dir", type=Path, metavar="RUN_DIR", help="run folder")
    rp.add_argument("--case", type=Path, default=None,
                    help="the case file the run was made from (for a folder without "
                         "inputs.json)")
    cp = sub.add_parser("compare", help="compare two or more run folders",
                        description="Write a side-by-side table of receptors, plume measures "
                                    "and observation points (comparison.csv, comparison.md) "
                                    "and overlaid breakthrough curves of two or more runs.")
    cp.add_argument("runs", type=Path, nargs="+", metavar="RUN_DIR", help="run folders")
    cp.add_argument("--out", type=Path, default=None, help="folder (default: comparison)")
    cp.add_argument("--labels", default=None, help="comma-separated names of the runs")
    f = sub.add_parser("refine", help="mesh-refinement study: levels, order, GCI, verdict",
                       description="Run the case on refinement levels (its own sizes, then every "
                                   "cell size and the time step divided by RATIO, RATIO², ...: "
                                   "the Courant number stays the same) concurrently, and give "
                                   "for every breakthrough quantity the values per level, the "
                                   "observed order, the extrapolated value, the grid convergence "
                                   "index and a verdict (converged, converging, oscillatory, "
                                   "diverging, unchanged, missing). Writes refinement.csv, "
                                   "refinement.md and refinement_breakthrough.png. The finest "
                                   "of three levels costs about RATIO⁸ times the base run.")
    f.add_argument("case", type=Path, help="case file (TOML)")
    f.add_argument("--out", type=Path, default=None,
                   help="study folder (default: runs/<case name>_refinement)")
    f.add_argument("--ratio", type=float, default=1.5,
                   help="refinement ratio between levels, in (1, 3] (default 1.5)")
    f.add_argument("--levels", type=int, default=3,
                   help="number of levels, 2 to 5 (default 3; an order needs 3)")
    f.add_argument("--refine", default="both", choices=("both", "mesh", "step"),
                   help="what the levels refine: cell sizes and time step together (both, "
                        "default: the Courant number fixed), the cell sizes alone (mesh) or "
                        "the time step alone on one mesh (step): the last two separate the "
                        "mesh's error from the step's")
    f.add_argument("--threshold", type=float, default=5.0,
                   help="GCI below which a quantity is 'converged' [%%] (default 5)")
    f.add_argument("--workers", type=int, default=None,
                   help="levels run at once on a local cluster (default: CPU cores, at most "
                        "the levels; 1: one after the other in this process)")
    f.add_argument("--scheduler", default=None, metavar="ADDRESS",
                   help="run the levels on the dask cluster whose scheduler is at ADDRESS "
                        "(e.g. tcp://10.0.0.5:8786) instead of a local cluster")
    e = sub.add_parser("ensemble", help="uncertainty ensemble over the case's [uncertain] "
                                        "values",
                       description="Run the case once per member of a Latin hypercube sample "
                                   "of the values named in its [uncertain] section (rank "
                                   "correlations imposed, seed recorded) on a dask cluster, "
                                   "and give the probability of exceeding each species' limit "
                                   "at each receptor over time, percentiles of peak "
                                   "concentration and first time above the limit, and which "
                                   "inputs matter. Started again on the same folder, it runs "
                                   "only the members that have no results yet.")
    e.add_argument("case", type=Path, help="case file (TOML) with an [uncertain] section")
    e.add_argument("--members", type=int, required=True, metavar="N",
                   help="number of members (runs), 2 to 100000")
    e.add_argument("--scheduler", default=None, metavar="ADDRESS",
                   help="run the members on the dask cluster whose scheduler is at ADDRESS "
                        "(default: a local cluster on this machine)")
    e.add_argument("--workers", type=int, default=None,
                   help="worker processes of the local cluster (default: CPU cores; 1: one "
                        "member after the other in this process)")
    e.add_argument("--out", type=Path, default=None,
                   help="study folder (default: runs/<case name>_ensemble)")
    e.add_argument("--keep-runs", action="store_true",
                   help="keep every member's full run folder (VTK series included) in "
                        "OUT/runs/")
    e.add_argument("--quiet", action="store_true", help="no progress bar")
    return p


def _check(case_path: Path, *, run_user_code: bool = False) -> int:
    from rich.console import Console
    from rich.markup import escape
    from rich.table import Table

    from fe3d.pipeline import check_case
    from fe3d.post.report import CAUTION
    from fe3d.run_size import estimate_run
    from fe3d.units import from_si

    case = load_case(case_path)
    user = case.user_reactions
    checked = case if run_user_code else case.model_copy(update={"user_reactions": None})
    check_case(checked, case_path.resolve().parent,  # builds or reuses the mesh; writes nothing
               [_default_mesh_folder(case_path),
                Path(case.output.folder or f"runs/{case_path.stem}")])
    con = Console()
    con.print(f"[bold]{escape(case.title)}[/bold]  ({escape(str(case_path))})")
    if user is not None:
        how = "imported and tried" if run_user_code else \
            "NOT imported (it is code that runs; give --run-user-code to try it)"
        con.print(f"user_reactions module {user.function}: {how}; fe3d run imports and runs "
                  "it", markup=False, highlight=False)
    verts = case.outline()[0]
    con.print(f"plan: x {min(v[0] for v in verts):g}–{max(v[0] for v in verts):g} m, y "
              f"{min(v[1] for v in verts):g}–{max(v[1] for v in verts):g} m "
              f"({len(verts)} vertices); faces {', '.join(case.face_names())}; top ≤ "
              f"{case.z_top:g} m, base ≥ {case.z_bottom_min:g} m")
    t = Table(title="materials (as used, converted)")
    for col in ("material", "K_h [m/d]", "K_v [m/d]", "porosity [-]", "ρ_b [kg/m³]",
                "α_L/α_TH/α_TV [m]"):
        t.add_column(col)
    for name, m in case.materials.items():
        t.add_row(name, f"{from_si(m.horizontal_conductivity, 'm/d'):.4g}",
                  f"{from_si(m.k_vertical, 'm/d'):.4g}", f"{m.porosity:.3g}",
                  f"{m.bulk_density:.4g}",
                  f"{m.longitudinal_dispersivity:g}/{m.transverse_dispersivity:g}/"
                  f"{m.alpha_vertical:g}")
    con.print(t)
    con.print("layers (top down): " + ", ".join(
        f"{ly.name} ({ly.material}) to "
        f"{'picks' if ly.bottom is None else format(ly.bottom, 'g') + ' m'}"
        for ly in case.layers))
    tu, cu = case.output.time_unit, case.output.concentration_unit
    for name, sp in case.species.items():
        hl = "none" if sp.half_life is None else f"{from_si(sp.half_life, tu):.4g} {tu}"
        con.print(f"species {name}: limit {from_si(sp.limit, cu):.4g} {cu}, half-life {hl}")
    steps = (f"steps following the plume (Courant ≤ {case.time.courant:g} in its cells)"
             if case.time.step is None else f"step ≤ {from_si(case.time.step, tu):.4g} {tu}")
    con.print(f"period {from_si(case.time.end, tu):g} {tu}, {steps}, "
              f"{len(case.output_schedule())} outputs")
    for line in estimate_run(case).lines():
        con.print(line, markup=False, highlight=False)
    if case.uncertain is not None:
        u = case.uncertain
        con.print(f"uncertain values for fe3d ensemble (seed {u.seed}): "
                  + ", ".join(f"{v.name} ({v.distribution})" for v in u.values)
                  + f"; {len(u.correlations)} rank correlation(s)", markup=False,
                  highlight=False)
    con.print("[green]case is valid[/green]")
    con.print(CAUTION)
    return 0


def _stopped(exc: BaseException, case_path: Path, out: Path | None, folder: Path) -> int:
    """One line for a run stopped by a signal; exit 130 (SIGINT) or 143 (SIGTERM)."""
    import signal

    from fe3d.transport.checkpoint import CHECKPOINT_FOLDER, RunInterrupted

    number = getattr(exc, "signal_number", signal.SIGINT)
    name = signal.Signals(number).name
    how = f"fe3d run {case_path}{f' --out {out}' if out else ''} --resume"
    if isinstance(exc, RunInterrupted) and exc.folder is not None:
        print(f"interrupted: {name}; checkpoint saved in {folder / CHECKPOINT_FOLDER}; "  # noqa: T201
              f"continue with: {how}", file=sys.stderr)
    else:
        print(f"interrupted: {name} before a checkpoint of this run; {folder} holds the "  # noqa: T201
              "outputs written so far (run.json says interrupted)", file=sys.stderr)
    return 128 + int(number)  # the shell's code for a process stopped by that signal


def _run(case_path: Path, out: Path | None, *, quiet: bool, overwrite: bool,
         force: bool, resume: bool = False, checkpoint_every: str = "10 min") -> int:
    from rich.console import Console
    from rich.progress import BarColumn, Progress, TextColumn, TimeElapsedColumn
    from rich.table import Table

    from fe3d.pipeline import StageClock, run_case
    from fe3d.post.report import CAUTION, quality_warnings
    from fe3d.resume import checkpoint_interval
    from fe3d.units import from_si

    interval = checkpoint_interval(checkpoint_every)
    case = load_case(case_path)
    folder = out or Path(case.output.folder or f"runs/{case_path.stem}")
    con = Console(stderr=False)
    tu, cu = case.output.time_unit, case.output.concentration_unit
    with Progress(TextColumn("{task.description}"), BarColumn(),
                  TextColumn("{task.fields[info]}"), TimeElapsedColumn(),
                  disable=quiet, console=con) as bar:
        task = bar.add_task("mesh", total=1.0, info="")
        steps = StepsSeen(tu)

        def progress(stage: str, done: float, total: float) -> None:
            info = steps.info(done, total) if stage == "transport" else ""
            bar.update(task, description=stage, completed=done / total if total else 0,
                       info=info)

        clock = StageClock(progress)
        try:
            summary = run_case(case, folder, progress=clock,
                               base_dir=case_path.resolve().parent,
                               mesh_folders=[_default_mesh_folder(case_path)],
                               overwrite=overwrite, force=force, inputs=[case_path],
                               resume=resume, checkpoint_every=interval)
        except KeyboardInterrupt as exc:
            bar.stop()
            return _stopped(exc, case_path, out, folder)
    t = Table(title=f"breakthrough ({summary.n_nodes:,} nodes, {summary.n_cells:,} cells, "
                    f"{summary.wall_time:.1f} s)")
    for col in ("point", "species", f"peak [{cu}]", "peak time", "first above limit",
                "mass-balance error"):
        t.add_column(col)
    for o in summary.observations:
        first = "not reached" if o.first_above_limit is None else \
            f"{from_si(o.first_above_limit, tu):.3g} {tu}"
        t.add_row(o.name, o.species, f"{from_si(o.peak, cu):.4g}",
                  f"{from_si(o.peak_time, tu):.3g} {tu}", first,
                  f"{summary.mass_balance_error[o.species]:.1e}")
    con.print(t)
    for sp, p in summary.plume.items():
        con.print(f"{sp}: part above the limit reaches {p['largest_extent']:.4g} m from the "
                  f"source at most ({from_si(p['time_of_largest_extent'], tu):.3g} {tu}), "
                  f"{p['final_extent']:.4g} m at the end")
    for a in summary.travel_times:
        when = "no pathline passes" if a["time"] is None else \
            f"{from_si(float(a['time']), tu):.3g} {tu}"  # type: ignore[arg-type]
        con.print(f"water travel time {a['source']} → {a['receptor']}: {when} "
                  "(advective, without sorption)")
    for name, h in summary.well_heads.items():
        con.print(f"head in well {name}: {h:.3f} m")
    con.print(f"time per stage: {clock.words()}", markup=False, highlight=False)
    con.print(f"flow budget discrepancy {summary.flow_discrepancy:.1e}; results in {folder}/")
    for w in quality_warnings(summary):
        con.print(f"[yellow]warning:[/yellow] {w}", markup=True, highlight=False)
    con.print(CAUTION)
    return 0


class StepsSeen:
    """The transport's progress line: the time reached, the last step and how many more
    steps of that length the run needs (plume-following steps can be short: a user sees
    it at once). ``unit``: the case's time unit."""

    def __init__(self, unit: str) -> None:
        self.unit, self.count = unit, 0
        self.last: float | None = None  # a resumed run starts late: no step before it

    def info(self, done: float, total: float) -> str:
        """Called after every step with the time reached and the end time [s]."""
        from fe3d.units import from_si

        step = 0.0 if self.last is None else done - self.last
        self.last = done
        self.count += step > 0.0
        text = f"t = {from_si(done, self.unit):.3g} / {from_si(total, self.unit):.3g} " \
               f"{self.unit}"
        if step <= 0.0:
            return text
        left = max(0, round((total - done) / step))
        return (f"{text}, step {from_si(step, self.unit):.3g} {self.unit} ({self.count:,} "
                f"steps; {left:,} more at this step)")


def _default_mesh_folder(case_path: Path) -> Path:
    """Where ``fe3d mesh`` writes by default and ``fe3d run`` also looks for a mesh."""
    return Path("meshes") / case_path.stem


def _mesh(case_path: Path, out: Path | None) -> int:
    from rich.console import Console
    from rich.markup import escape

    from fe3d.pipeline import mesh_case
    from fe3d.post.mesh_lines import mesh_lines
    from fe3d.post.report import CAUTION

    case = load_case(case_path)
    folder = out or _default_mesh_folder(case_path)
    site, reused, files = mesh_case(case, folder, base_dir=case_path.parent)
    con = Console()
    how = "reused (inputs unchanged)" if reused else "built"
    con.print(f"[bold]{case.title}[/bold]: mesh {how} in {folder}/")
    for line in mesh_lines(site):
        tag = {"warning": "[yellow]warning:[/yellow] ", "rule": "[yellow]rule:[/yellow] "}
        con.print(f"  {tag.get(line.kind, '')}{escape(line.text)}", highlight=False)
    con.print("wrote " + ", ".join(p.name for p in files))
    con.print(CAUTION)
    return 0


def _refine(case_path: Path, out: Path | None, *, ratio: float, levels: int, refine: str,
            threshold: float, workers: int | None, scheduler: str | None) -> int:
    from rich.console import Console

    from fe3d.errors import CaseError
    from fe3d.post.report import CAUTION
    from fe3d.studies.refinement import LevelResult, refinement_study

    problems = []
    if not 1.0 < ratio <= 3.0:
        problems.append(CaseError("--ratio", ratio, "must be in (1, 3]"))
    if not 2 <= levels <= 5:
        problems.append(CaseError("--levels", levels, "must be 2 to 5"))
    if not 0.0 < threshold < 100.0:
        problems.append(CaseError("--threshold", threshold, "must be a percentage in (0, 100)"))
    if workers is not None and workers < 1:
        problems.append(CaseError("--workers", workers, "must be 1 or more"))
    if problems:
        raise CaseErrors(problems)
    case = load_case(case_path)
    folder = out or Path(f"runs/{case_path.stem}_refinement")
    con = Console()
    what = {"both": "cell sizes and time step are divided by the same factor on each level, "
                    "so the Courant number stays fixed (its largest value still varies with "
                    "the smallest cells the mesher makes)",
            "mesh": "cell sizes are divided by the factor on each level, the time step kept "
                    "(the Courant number grows): the mesh's error alone",
            "step": "the time step is divided by the factor on each level, on one mesh: the "
                    "time step's error alone"}[refine]
    con.print(f"refinement study of {case_path}: {levels} levels, ratio {ratio:g}; {what}",
              highlight=False)

    def tell(lv: LevelResult) -> None:
        if lv.summary is None:
            con.print(f"level {lv.index} (÷{lv.factor:.4g}) [red]failed[/red]: {lv.error}",
                      highlight=False)
            return
        courant = ", ".join(f"{sp} {c:.3g}" for sp, c in lv.summary.max_courant.items())
        con.print(f"level {lv.index} (÷{lv.factor:.4g}) done: {lv.summary.n_nodes:,} nodes, "
                  f"{lv.summary.n_steps} steps, largest Courant {courant}", highlight=False)

    from fe3d.studies.executors import study_executor

    with study_executor(n_runs=levels, scheduler=scheduler,
                        workers=None if workers is None else min(workers, levels)) as ex:
        con.print(f"levels run on {ex.where}", highlight=False)
        study = refinement_study(case, folder, ratio=ratio, levels=levels, refined=refine,
                                 threshold=threshold / 100.0,
                                 base_dir=case_path.resolve().parent, executor=ex.executor,
                                 on_level=tell)
    for q in study.verdicts:
        con.print(study.line(q), markup=False, highlight=False)
    for line in study.dissimilar_layers:
        con.print(f"warning: {line}", markup=False, highlight=False)
    failed = [lv for lv in study.levels if lv.summary is None]
    for lv in failed:
        con.print(f"level {lv.index} failed: {lv.error}", markup=False, highlight=False)
    con.print(f"tables in {folder}/refinement.csv and refinement.md, curves in "
              "refinement_breakthrough.png", highlight=False)
    con.print(CAUTION)
    return 0


def _ensemble(case_path: Path, out: Path | None, *, members: int, scheduler: str | None,
              workers: int | None, keep_runs: bool, quiet: bool) -> int:
    from rich.console import Console
    from rich.progress import (
        BarColumn,
        MofNCompleteColumn,
        Progress,
        TextColumn,
        TimeElapsedColumn,
        TimeRemainingColumn,
    )

    from fe3d.errors import CaseError
    from fe3d.post.report import CAUTION
    from fe3d.studies.ensemble import (
        MemberFailure,
        MemberResult,
        plan_ensemble,
        run_ensemble,
    )
    from fe3d.studies.ensemble_results import summarise_ensemble, write_ensemble_tables
    from fe3d.studies.executors import study_executor
    from fe3d.units import from_si

    problems = []
    if not 2 <= members <= 100_000:
        problems.append(CaseError("--members", members, "must be 2 to 100000"))
    if workers is not None and workers < 1:
        problems.append(CaseError("--workers", workers, "must be 1 or more"))
    if workers is not None and scheduler is not None:
        problems.append(CaseError("--workers", workers, "sizes the local cluster only; the "
                                  "cluster at --scheduler has its own workers"))
    if problems:
        raise CaseErrors(problems)
    case = load_case(case_path)
    plan_ensemble(case, members)  # its errors before a cluster starts
    folder = out or Path(f"runs/{case_path.stem}_ensemble")
    con = Console()
    failed: list[MemberFailure] = []
    with study_executor(n_runs=members, scheduler=scheduler, workers=workers) as ex, \
            Progress(TextColumn("members"), BarColumn(), MofNCompleteColumn(),
                     TextColumn("{task.fields[info]}"), TimeElapsedColumn(),
                     TextColumn("left"), TimeRemainingColumn(), disable=quiet,
                     console=con) as bar:
        con.print(f"ensemble of {case_path}: {members} members on {ex.where}",
                  markup=False, highlight=False)
        task = bar.add_task("members", total=members, info="")

        def tell(done: int, total: int, outcome: MemberResult | MemberFailure) -> None:
            if isinstance(outcome, MemberFailure):
                failed.append(outcome)
            bar.update(task, completed=done, info=f"{len(failed)} failed" if failed else "")

        try:
            ensemble = run_ensemble(case, folder, n_members=members, executor=ex,
                                    base_dir=case_path.resolve().parent,
                                    keep_runs=keep_runs, on_member=tell)
        except KeyboardInterrupt:
            bar.stop()
            con.print(f"interrupted: the finished members are kept in {folder}/members; the "
                      "same command again runs only the others", markup=False,
                      highlight=False)
            return EXIT_INTERRUPTED
    stats = summarise_ensemble(ensemble)
    files = write_ensemble_tables(ensemble, stats)
    tu, cu = case.output.time_unit, case.output.concentration_unit
    con.print(f"{len(ensemble.results)} members finished ({ensemble.reused} reused from an "
              f"earlier start), {len(ensemble.failures)} failed; {ensemble.wall_time:.1f} s",
              markup=False, highlight=False)
    for f in ensemble.failures:
        drawn = ", ".join(f"{n} = {x:.4g}{' ' + u if u else ''}" for n, u, x in zip(
            ensemble.sample.names, ensemble.sample.units, ensemble.sample.values[f.index],
            strict=True))
        con.print(f"member {f.index} failed ({drawn}): {f.error}", markup=False,
                  highlight=False)
    for (point, sp), (k, n) in stats.ever_above.items():
        q = {x.measure: x for x in stats.quantities if x.point == point and x.species == sp}
        pk, first = q["peak"].percentiles, q["first above limit"].percentiles

        def show(v: float, unit: str) -> str:
            return "not reached" if v == float("inf") else f"{from_si(v, unit):.3g}"

        con.print(f"{point} {sp}: above the limit during the run in {k} of {n} members; "
                  f"peak P5/P50/P95 {'/'.join(show(v, cu) for v in pk)} {cu}; first above "
                  f"the limit P5/P50/P95 {'/'.join(show(v, tu) for v in first)} {tu}",
                  markup=False, highlight=False)
    con.print(f"results in {folder}/: {', '.join(files)}", markup=False, highlight=False)
    con.print(CAUTION)
    return 0


def _long_term(case_path: Path, out: Path | None) -> int:
    from rich.console import Console

    from fe3d.post.report import CAUTION
    from fe3d.studies.long_term import long_term_plume

    case = load_case(case_path)
    folder = out or Path(f"runs/{case_path.stem}_long_term")
    result = long_term_plume(case, folder, base_dir=case_path.resolve().parent)
    con = Console()
    for line in result.lines(case):
        con.print(line, markup=False, highlight=False)
    con.print(f"results in {folder}/", markup=False, highlight=False)
    con.print(CAUTION)
    return 0


def _report(run_dir: Path, case_path: Path | None) -> int:
    from fe3d.post.handover import write_handover
    from fe3d.post.report import CAUTION

    case = None if case_path is None else load_case(case_path)
    md, page = write_handover(run_dir, case=case)
    print(f"wrote {md} and {page}")  # noqa: T201
    print(CAUTION)  # noqa: T201
    return 0


def _compare(runs: list[Path], out: Path | None, labels: str | None) -> int:
    from fe3d.post.compare import write_comparison
    from fe3d.post.report import CAUTION

    written = write_comparison(runs, out or Path("comparison"),
                               labels=labels.split(",") if labels else None)
    print("wrote " + ", ".join(str(p) for p in written))  # noqa: T201
    print(CAUTION)  # noqa: T201
    return 0


def main(argv: list[str] | None = None) -> int:
    """Entry point of the ``fe3d`` command; returns the exit code."""
    args = _parser().parse_args(argv)
    logging.basicConfig(level=logging.WARNING, format="%(levelname)s %(name)s: %(message)s")
    for handler in logging.getLogger().handlers:  # the run's solver.log takes the INFO lines
        handler.setLevel(logging.WARNING)
    try:
        if args.command == "check":
            return _check(args.case, run_user_code=args.run_user_code)
        if args.command == "mesh":
            return _mesh(args.case, args.out)
        if args.command == "refine":
            return _refine(args.case, args.out, ratio=args.ratio, levels=args.levels,
                           refine=args.refine, threshold=args.threshold, workers=args.workers,
                           scheduler=args.scheduler)
        if args.command == "ensemble":
            return _ensemble(args.case, args.out, members=args.members,
                             scheduler=args.scheduler, workers=args.workers,
                             keep_runs=args.keep_runs, quiet=args.quiet)
        if args.command == "long-term":
            return _long_term(args.case, args.out)
        if args.command == "report":
            return _report(args.run_dir, args.case)
        if args.command == "compare":
            return _compare(args.runs, args.out, args.labels)
        return _run(args.case, args.out, quiet=args.quiet, overwrite=args.overwrite,
                    force=args.force, resume=args.resume,
                    checkpoint_every=args.checkpoint_every)
    except KeyboardInterrupt:
        print("interrupted: a run folder stopped this way holds the outputs written so far "  # noqa: T201
              "and says so in run.json", file=sys.stderr)
        return EXIT_INTERRUPTED
    except CaseErrors as exc:
        for line in exc.lines():  # the first MAX_ERROR_LINES, then a count of the rest
            print(f"error: {line}", file=sys.stderr)  # noqa: T201
        return EXIT_BAD_INPUT
    except Fe3dError as exc:
        print(f"error: {exc}", file=sys.stderr)  # noqa: T201
        return EXIT_BAD_INPUT
    except OSError as exc:  # disk full, a read-only folder, a file that vanished
        where = f" {exc.filename}" if exc.filename else ""
        print(f"error: cannot write or read{where}: {exc.strerror or exc}; a run folder left "  # noqa: T201
              "behind says in run.json how far it got", file=sys.stderr)
        return EXIT_CANNOT_WRITE
    except SystemExit as exc:  # argparse exits before this block; here it is other code
        print(f"error: code run by fe3d called sys.exit({exc.code!r}) (a user_reactions "  # noqa: T201
              "module, or a library that could not read a data file); the command did not "
              "finish", file=sys.stderr)
        return EXIT_CODE_STOPPED


if __name__ == "__main__":
    sys.exit(main())
