"""run_case: the one composition of the stages (case → mesh → flow → transport → outputs)."""

from __future__ import annotations

import json
import logging
import shutil
import time
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

from fe3d._typing import FloatArray
from fe3d.case.parts import FlowInputs, TransportInputs, TravelInputs
from fe3d.case.schema import Case
from fe3d.errors import CaseError
from fe3d.flow.drawdown import well_drawdown
from fe3d.flow.paths import TravelPaths, travel_paths
from fe3d.flow.solve import FlowField, solve_flow
from fe3d.linalg import SpdPreconditioner
from fe3d.mesh.build import build_mesh, obtain_mesh
from fe3d.mesh.corridor import Corridor, site_corridor
from fe3d.mesh.io import mesh_inputs_hash, save_cached
from fe3d.mesh.site_mesh import SiteMesh
from fe3d.post.beside import Beside
from fe3d.post.handover import write_handover
from fe3d.post.outputs import SeriesWriter, write_flow_figures, write_flow_files
from fe3d.post.report import RunSummary
from fe3d.post.run_place import (
    RunState,
    check_target,
    move_into_place,
    work_folder,
    write_manifest,
)
from fe3d.post.vtk import write_mesh
from fe3d.reactions.kinetics import user_kinetics
from fe3d.resume import (
    DEFAULT_INTERVAL,
    CheckpointInterval,
    SavedRun,
    case_fingerprint,
    claim_saved_run,
    stop_on_signals,
)
from fe3d.run_size import check_fits, estimate_mesh_size, estimate_run
from fe3d.transport.checkpoint import (
    CHECKPOINT_FOLDER,
    RESUME_KEY,
    Checkpointer,
    RunInterrupted,
    check_resumable,
    read_outputs,
)
from fe3d.transport.run import run_transport

__all__ = ["FirstPass", "StageClock", "check_case", "estimate_mesh_size", "first_pass",
           "mesh_and_flow", "mesh_case", "plume_corridor", "run_case", "run_mesh"]

logger = logging.getLogger(__name__)

Progress = Callable[[str, float, float], None]


@dataclass(frozen=True)
class FirstPass:
    """The plume corridor's first pass: the mesh as the case writes it, its steady flow,
    and the corridor found along the pathlines (None when nothing needs refining: that mesh
    and flow are then the final ones)."""

    mesh: SiteMesh
    flow: FlowField
    corridor: Corridor | None


def first_pass(case: Case, *, base_dir: Path | None = None, first: SiteMesh | None = None,
               preconditioner: SpdPreconditioner | None = None) -> FirstPass | None:
    """The first pass of the corridor mesher: mesh the case as it is written (or take that
    mesh as ``first``), solve the flow (with ``preconditioner``'s AMG hierarchy, kept there
    for later solves), track forward pathlines from every source and turn them into a
    corridor (:func:`fe3d.mesh.corridor.site_corridor`). ``None`` when ``mesh.corridor`` is
    off, the mesh is imported or the case has no source."""
    mc = case.mesh
    if not mc.corridor or mc.import_file is not None or not case.sources:
        return None
    first = first or build_mesh(case)
    flow = solve_flow(first, FlowInputs.of(case), base_dir=base_dir,
                      preconditioner=preconditioner)
    paths = travel_paths(first, flow, TravelInputs.of(case))
    lines = {name: [(p.points, p.times, p.cells) for p in found]
             for name, found in paths.forward.items()}
    corridor = site_corridor(case, first, lines)
    if corridor is not None:
        logger.info("%s", "; ".join(corridor.lines()))
    return FirstPass(first, flow, corridor)


def plume_corridor(case: Case, *, base_dir: Path | None = None,
                   first: SiteMesh | None = None) -> Corridor | None:
    """The corridor of :func:`first_pass`; ``None`` when there is no first pass or nothing
    needs refining."""
    done = first_pass(case, base_dir=base_dir, first=first)
    return None if done is None else done.corridor


def run_mesh(case: Case, folders: list[Path], out_dir: Path, *, base_dir: Path | None = None,
             preconditioner: SpdPreconditioner | None = None,
             ) -> tuple[SiteMesh, FlowField | None]:
    """The run's mesh, saved in ``out_dir``, and its flow when that is already solved.

    When the first pass (:func:`first_pass`) finds nothing to refine, its mesh is the run's
    and so is its flow (solved with ``preconditioner``), unless a mesh of the same mesh
    inputs is cached in ``folders``: that one is taken, so that a rerun or a resumed run
    keeps its mesh. Otherwise the mesh refined along the corridor (or as written) is reused
    from ``folders`` or built (:func:`fe3d.mesh.build.obtain_mesh`) and its flow is
    ``None``."""
    site, flow, _reused = _final_mesh(
        case, first_pass(case, base_dir=base_dir, preconditioner=preconditioner), folders,
        out_dir, preconditioner=preconditioner)
    return site, flow


def _final_mesh(case: Case, done: FirstPass | None, folders: list[Path], out_dir: Path, *,
                preconditioner: SpdPreconditioner | None = None,
                ) -> tuple[SiteMesh, FlowField | None, bool]:
    """The mesh after the first pass ``done``, saved in ``out_dir``, its flow when that is
    the first pass's, and whether the mesh was reused from ``folders``: the first pass's own
    when it found nothing to refine and no mesh of the same inputs is cached, else the
    cached or newly built one (:func:`fe3d.mesh.build.obtain_mesh`, refined along the
    corridor). Pass ``done`` straight from :func:`first_pass`: in the second case its mesh
    and flow, and ``preconditioner``'s hierarchy built on them, are let go before the final
    mesh is built, so the two meshes are not held at once."""
    if done is not None and done.corridor is None and not _mesh_cached(case, folders):
        save_cached(done.mesh, out_dir, mesh_inputs_hash(case))
        return done.mesh, done.flow, False
    corridor = None if done is None else done.corridor
    del done
    if preconditioner is not None:
        preconditioner.forget()
    site, reused = obtain_mesh(case, folders, save_to=out_dir, corridor=corridor)
    return site, None, reused


def _mesh_cached(case: Case, folders: list[Path]) -> bool:
    """Whether a folder's ``mesh.json`` names the hash of the case's mesh inputs without a
    corridor (:func:`fe3d.mesh.build.obtain_mesh` then reuses that folder's mesh)."""
    digest = mesh_inputs_hash(case)
    for folder in folders:
        try:
            meta = json.loads((folder / "mesh.json").read_text(encoding="utf-8"))
        except (OSError, ValueError):
            continue
        if isinstance(meta, dict) and meta.get("mesh_inputs_sha256") == digest:
            return True
    return False


def mesh_and_flow(case: Case, *, base_dir: Path | None = None) -> tuple[SiteMesh, FlowField]:
    """Build the mesh (refined along the plume corridor, :func:`first_pass`) and solve the
    steady flow of ``case``; when the first pass finds nothing to refine, its mesh and flow
    are returned (no second mesh or flow solve)."""
    done = first_pass(case, base_dir=base_dir)
    if done is not None and done.corridor is None:
        return done.mesh, done.flow
    corridor = None if done is None else done.corridor
    del done  # the first pass's mesh and flow are let go before the final mesh is built
    site = build_mesh(case, corridor=corridor)
    return site, solve_flow(site, FlowInputs.of(case), base_dir=base_dir)


def check_case(case: Case, base_dir: Path | None, mesh_folders: list[Path]) -> None:
    """Every check that needs more than the case file: the user's reaction code imports, and
    the rules that depend on the mesh, on the mesh as written (the first pass of the corridor
    solves its flow) and on the mesh refined along the plume corridor that a run will use
    (built, or reused from ``mesh_folders``; nothing is written). Raises
    :class:`~fe3d.errors.CaseErrors` naming each problem."""
    from fe3d.flow.site_rules import check_mesh_rules

    check_user_code(case, base_dir)
    first = check_mesh_rules(case, mesh_folders)
    corridor = plume_corridor(case, base_dir=base_dir, first=first)
    if corridor is not None:
        check_mesh_rules(case, mesh_folders, corridor=corridor)


def check_user_code(case: Case, base_dir: Path | None = None) -> None:
    """Import and probe the user's reaction function named in the case, if any, so that a
    module that cannot be imported is reported before any work (raises CaseError).

    This runs the user's code. A module that calls ``sys.exit`` while it is imported or
    probed is reported like one that raises: one CaseError naming the key."""
    from fe3d.errors import CaseError

    user = case.user_reactions
    if user is not None:
        try:
            user_kinetics(user.function, n_species=len(user.species),
                          key_path="user_reactions.function", search_dirs=[base_dir or Path()])
        except SystemExit as exc:
            allowed = (f"the module called sys.exit({exc.code!r}) when imported or tried; a "
                       "reaction module must only define functions")
            key = "user_reactions.function"
            raise CaseError(key, user.function, allowed) from None


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
             site: SiteMesh | None = None, overwrite: bool = False,
             inputs: Sequence[Path] = (), force: bool = False,
             compact: bool = False, resume: bool = False,
             checkpoint_every: CheckpointInterval = DEFAULT_INTERVAL) -> RunSummary:
    """Run every stage and write the run folder (with ``solver.log`` and the manifest
    ``run.json``); returns the summary.

    The run works in a fresh folder beside ``out_dir`` and replaces ``out_dir`` with it as a
    whole when it ends, finished, failed or interrupted (the manifest says which). An
    ``out_dir`` holding an earlier run is replaced only with ``overwrite``; one holding
    anything else, or one of the ``inputs`` (the case file), is refused with a
    :class:`~fe3d.errors.CaseError` before any work (:mod:`fe3d.post.run_place`). A mesh
    cached in ``out_dir`` by an earlier run is reused. Without ``force``, a run whose
    estimated memory or output does not fit this machine is refused before any work
    (:func:`fe3d.run_size.check_fits`). ``compact`` (for the members of a study): no
    figures, plume surfaces or handover report, only the tables, ``summary.json`` and the
    fields. See :func:`_run_case` for the other arguments.

    The transport saves a checkpoint (``checkpoint/`` in the run folder) as often as
    ``checkpoint_every`` says and when SIGINT or SIGTERM stops it
    (:class:`~fe3d.transport.checkpoint.RunInterrupted`); a finished run keeps none.
    ``resume``: continue the stopped run of ``out_dir`` from its newest checkpoint
    (:func:`fe3d.resume.claim_saved_run`; refused with one line naming ``--resume`` when
    there is none or the case, mesh or flow changed, and then ``out_dir`` is left as it
    was): the outputs written before the checkpoint are written again from it and the run
    goes on, so that the folder ends as an uninterrupted run's would.
    """
    saved = claim_saved_run(case, out_dir) if resume else None
    check_target(out_dir, overwrite=overwrite or resume, inputs=inputs)
    if not force:
        check_fits(estimate_run(case), out_dir)
    check_user_code(case, base_dir)  # before anything is written
    work = work_folder(out_dir)
    keeper = Checkpointer(work / CHECKPOINT_FOLDER, case=case_fingerprint(case),
                          every_steps=checkpoint_every.steps,
                          every_seconds=checkpoint_every.seconds)
    if saved is not None:
        shutil.copytree(saved.checkpoint_folder, keeper.folder)
    state: RunState = "failed"
    detail = ""
    refused = False
    try:
        with solver_log(work / "solver.log"), stop_on_signals(keeper):
            summary = _run_case(case, work, progress=progress, base_dir=base_dir,
                                mesh_folders=[out_dir, *([saved.folder] if saved else []),
                                              *(mesh_folders or [])],
                                site=site, compact=compact, keeper=keeper, saved=saved)
        if not compact:
            write_handover(work, case=case)  # report.md and report.html from the run's files
        state = "finished"
        shutil.rmtree(keeper.folder, ignore_errors=True)  # a finished run keeps none
    except KeyboardInterrupt:
        state, detail = "interrupted", "interrupted by the user (Ctrl-C or a signal)"
        raise
    except CaseError as exc:
        refused = exc.key_path == RESUME_KEY  # the mesh or flow changed: leave out_dir be
        detail = str(exc).splitlines()[0]
        raise
    except Exception as exc:
        detail = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise
    finally:
        if refused:
            shutil.rmtree(work, ignore_errors=True)
        else:
            write_manifest(work, state, detail=detail)
            move_into_place(work, out_dir)
            if saved is not None and saved.taken_over:
                shutil.rmtree(saved.folder, ignore_errors=True)
    return summary


def _run_case(case: Case, out_dir: Path, *, progress: Progress | None = None,
              base_dir: Path | None = None, mesh_folders: list[Path] | None = None,
              site: SiteMesh | None = None, compact: bool = False,
              keeper: Checkpointer, saved: SavedRun | None = None) -> RunSummary:
    """Run every stage and write the run folder; returns the summary.

    ``progress(stage, done, total)`` is called as work advances (for a progress bar);
    ``base_dir`` resolves relative file names in the case (usually the case file's folder);
    ``mesh_folders`` are further folders (after the run folder) where a mesh cached with the
    same mesh inputs is reused from, and copied into the run folder; ``site``, when given,
    is used as it is (no corridor pass, no cache): a mesh shared by the members of a study;
    ``keeper`` saves the transport's checkpoints; ``saved``: the stopped run to continue.
    """
    started = time.perf_counter()
    # a caller's own clock (the command line's) is used as it is, so that it also learns
    # of the work done beside the transport
    clock = progress if isinstance(progress, StageClock) else StageClock(progress)
    tell = clock.tell
    out_dir.mkdir(parents=True, exist_ok=True)
    tell("mesh", 0, 1)
    kept = SpdPreconditioner()  # the flow's AMG hierarchy, for the drawdown's solve
    flow = None  # solved by the corridor's first pass when its mesh is the run's
    if site is None:  # reuse a mesh cached (run folder first) when nothing changed
        site, flow = run_mesh(case, [out_dir, *(mesh_folders or [])], out_dir,
                              base_dir=base_dir, preconditioner=kept)
    files = [p.name for p in write_mesh(
        site, out_dir, formats=("msh", "vtu") if case.output.vtu_series else ())]
    tell("flow", 0, 1)
    flow_inputs = FlowInputs.of(case)
    if flow is None:
        flow = solve_flow(site, flow_inputs, base_dir=base_dir, preconditioner=kept)
    if saved is not None:
        check_resumable(saved.checkpoint, site, flow)
    # the drawdown of the wells: one more flow solve (the same matrix, so the same
    # hierarchy), skipped by compact runs (ensembles)
    drawdown = None if compact else well_drawdown(site, flow_inputs, flow, base_dir=base_dir,
                                                  preconditioner=kept)
    del kept  # the hierarchy is not held through the transport
    tell("travel paths", 0, 1)
    paths = travel_paths(site, flow, TravelInputs.of(case))
    tell("flow outputs", 0, 1)  # the flow's files, then its figures beside the transport
    files += write_flow_files(out_dir, case, site, flow, paths, drawdown=drawdown)
    writer = SeriesWriter(out_dir, case, site, flow.porosity, flow=flow, figures=not compact,
                          drawdown=drawdown, receptors_every_step=True)
    flow_figures = Beside(lambda: _flow_figures(out_dir, case, site, flow, paths, writer,
                                                drawdown=drawdown), name="flow figures")
    try:
        # its set-up counts as transport, not paths; a resumed run starts where it stopped
        tell("transport", 0.0 if saved is None else saved.checkpoint.time, case.time.end)
        _transport(case, site, flow, writer, keeper=keeper, saved=saved, base_dir=base_dir,
                   on_step=lambda t, end: tell("transport", t, end))
    except BaseException:
        flow_figures.wait()  # it draws in the run folder: let it end before that moves
        raise
    tell("outputs", 0, 1)
    files += flow_figures.result()
    clock.beside("flow figures", flow_figures.seconds, flow_figures.cpu_seconds,
                 "the transport")
    summary = writer.finish(flow, paths, files, started)
    logger.info("time per stage: %s", clock.words())
    return summary


def _flow_figures(out_dir: Path, case: Case, site: SiteMesh, flow: FlowField,
                  paths: TravelPaths, writer: SeriesWriter, *,
                  drawdown: FloatArray | None) -> list[str]:
    """The work beside the transport: the flow's figures, then what the run's figures at
    the end can prepare (:meth:`fe3d.post.run_figures.PlumeFigures.prepare`); none for a
    run without figures. Returns the names of the files written."""
    if writer.figures is None:
        return []
    names = write_flow_figures(out_dir, case, site, flow, paths, drawdown=drawdown)
    writer.figures.prepare()
    return names


def _transport(case: Case, site: SiteMesh, flow: FlowField, writer: SeriesWriter, *,
               keeper: Checkpointer, saved: SavedRun | None, base_dir: Path | None,
               on_step: Callable[[float, float], None]) -> None:
    """The transport stage: every snapshot to ``writer`` (first those kept by ``saved``'s
    checkpoint, written again) and to ``keeper``'s checkpoint folder; the receptors are
    sampled at every step (``writer.receptor_probe``). Signals wait for the
    end of a step (:func:`fe3d.resume.stop_on_signals`, set again here: the mesher may have
    put its own handlers in place)."""
    resume_from = None if saved is None else saved.checkpoint
    index = 0
    if resume_from is not None:
        for snap in read_outputs(keeper.folder, resume_from):
            writer.add(snap)
        index = resume_from.outputs
    keeper.listening = True
    try:
        with stop_on_signals(keeper):
            for snap in run_transport(site, flow, TransportInputs.of(case), base_dir=base_dir,
                                      on_step=on_step, resume_from=resume_from,
                                      checkpoints=keeper, extra_probe=writer.receptor_probe):
                writer.add(snap)
                keeper.add_output(index, snap)
                index += 1
        if keeper.stop_signal is not None:  # asked for at the last step
            raise RunInterrupted(keeper.stop_signal, case.time.end, None)
    except BaseException:
        writer.close()  # the output times written so far stay readable
        raise
    finally:
        keeper.listening = False


class StageClock:
    """Passes progress on and times each stage [s] (wall clock) from its first report to
    the next stage's."""

    def __init__(self, progress: Progress | None) -> None:
        self.progress = progress
        self.spent: dict[str, float] = {}
        # stage -> (wall clock [s], its thread's processor time [s], beside which stage)
        self.alongside: dict[str, tuple[float, float, str]] = {}
        self._stage: str | None = None
        self._since = time.perf_counter()

    def __call__(self, stage: str, done: float, total: float) -> None:
        """A clock is itself a progress callback (:meth:`tell`)."""
        self.tell(stage, done, total)

    def tell(self, stage: str, done: float, total: float) -> None:
        if stage != self._stage:
            now = time.perf_counter()
            if self._stage is not None:
                self.spent[self._stage] = self.spent.get(self._stage, 0.0) + now - self._since
            self._stage, self._since = stage, now
        if self.progress is not None:
            self.progress(stage, done, total)

    def beside(self, stage: str, seconds: float, cpu_seconds: float, other: str) -> None:
        """Note that the work of ``stage`` ran on its own thread beside the stage ``other``
        for ``seconds`` [s] of wall clock and ``cpu_seconds`` [s] of its processor time
        (its own stage time is only the moment it took to start)."""
        self.alongside[stage] = (seconds, cpu_seconds, other)

    def words(self) -> str:
        """The stages so far and their times, the running one included, then the work done
        beside another stage and its own time."""
        running = {} if self._stage is None else {
            self._stage: self.spent.get(self._stage, 0.0) + time.perf_counter() - self._since}
        stages = ", ".join(f"{k} {v:.1f} s" for k, v in {**self.spent, **running}.items())
        beside = "".join(f"; {k} written beside {other} in {v:.1f} s ({cpu:.1f} s CPU)"
                         for k, (v, cpu, other) in self.alongside.items())
        return stages + beside


def mesh_case(case: Case, out_dir: Path, *, base_dir: Path | None = None,
              ) -> tuple[SiteMesh, bool, list[Path]]:
    """Build (or reuse, when the mesh inputs and the plume corridor are unchanged) the mesh
    of ``case`` and write ``mesh.msh``, ``mesh.vtu``, ``mesh.npz`` and ``mesh.json`` in
    ``out_dir``. The corridor needs a first mesh and flow solve (:func:`first_pass`), which
    run every time; only the final mesh is reused, and when the first pass finds nothing to
    refine its mesh is the final one (no second build).

    Returns the mesh, whether it was reused, and the files written.
    """
    out_dir.mkdir(parents=True, exist_ok=True)
    site, _flow, reused = _final_mesh(case, first_pass(case, base_dir=base_dir), [out_dir],
                                      out_dir)
    files = write_mesh(site, out_dir)
    return site, reused, [*files, out_dir / "mesh.npz", out_dir / "mesh.json"]
