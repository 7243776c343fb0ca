"""Uncertainty ensembles: the case run once per member of a sample of its uncertain values.

The members are drawn by :func:`fe3d.studies.sampling.draw_sample` from the case's
``[uncertain]`` section (fe3d/case/uncertain.py) and run by :func:`fe3d.pipeline.run_case`
on the study's executor (:mod:`fe3d.studies.executors`: a local dask cluster or any cluster
by address). A member whose values leave every mesh input unchanged runs on one mesh built
once for the nominal case (with its plume corridor, which follows the nominal flow) and
handed to every worker once; a member that changes a mesh input (geometry, cell sizes,
source or well positions) meshes on its own, with its own corridor.

Each member keeps only compact results: its receptor histories, the plume's largest extent,
its node count and run time, in ``members/member_<k>.npz`` beside the study's
``ensemble.json`` (seed, case fingerprint, size) and ``ensemble_draws.csv`` (every member's
drawn values). Its run folder is written in a temporary folder on the worker and removed,
unless the study keeps them (``runs/member_<k>/``). An interrupted study started again with
the same case, seed and size runs only the members without a results file; a different
case, seed or size is refused. A member that fails is recorded with its drawn values and
the others go on.
"""

from __future__ import annotations

import hashlib
import json
import logging
import shutil
import tempfile
import time
from collections.abc import Callable, Iterator
from concurrent.futures import Future, as_completed
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np

from fe3d import __version__
from fe3d._typing import BoolArray, FloatArray
from fe3d.case.schema import Case, cross_checks
from fe3d.case.uncertain import UncertainInputs, parse_target, with_field
from fe3d.errors import CaseError, CaseErrors, Fe3dError
from fe3d.mesh.io import mesh_inputs_hash
from fe3d.mesh.site_mesh import SiteMesh
from fe3d.pipeline import mesh_case, run_case
from fe3d.post.files import write_atomic, write_text_atomic
from fe3d.post.series_read import read_concentration_series, read_largest_over_run
from fe3d.studies.executors import SerialExecutor, StudyExecutor
from fe3d.studies.run_folder import read_histories
from fe3d.studies.sampling import Sample, draw_sample

__all__ = [
    "Ensemble",
    "MemberFailure",
    "MemberFields",
    "MemberResult",
    "case_fingerprint",
    "member_case",
    "member_fields",
    "plan_ensemble",
    "run_ensemble",
]

logger = logging.getLogger(__name__)

MANIFEST = "ensemble.json"
DRAWS = "ensemble_draws.csv"


@dataclass(frozen=True)
class MemberFields:
    """Where one member's concentration was above the limit: ``output_times`` [s] shape
    ``(n_outputs,)``; ``above`` species → boolean ``(n_outputs, n_nodes)`` on the shared
    mesh; ``ever_above`` species → boolean ``(n_nodes,)``, above at one time step at least
    (the largest value over the run, theory.md O4)."""

    output_times: FloatArray
    above: dict[str, BoolArray]
    ever_above: dict[str, BoolArray]


@dataclass(frozen=True)
class MemberResult:
    """What one finished member keeps (SI units).

    ``times`` [s] shape ``(n_times,)``; ``history`` species → concentration [kg/m³] at the
    observation points, shape ``(n_times, n_points)``; ``largest_extent`` species → the
    largest distance [m] the part above the limit reached from its source; ``wall_time``
    [s] is the member's whole time on its worker (run, reading back, removing its folder);
    ``own_mesh`` says whether it meshed on
    its own (a mesh input was uncertain) or ran on the shared mesh; ``peak_memory`` [B] is
    the peak resident memory of the worker process so far (Linux ``ru_maxrss``);
    ``cpu_time`` [s] the processor time the member used (independent of the machine's load
    when its worker has a core to itself). ``fields`` (members on the shared mesh) travel
    from the worker to the driver, which saves them and drops them (:func:`member_fields`
    reads them back one member at a time).
    """

    index: int
    times: FloatArray
    history: dict[str, FloatArray]
    largest_extent: dict[str, float]
    n_nodes: int
    wall_time: float
    own_mesh: bool
    peak_memory: float = 0.0  # [B] the largest resident set of the process that ran it
    cpu_time: float = 0.0  # [s] processor time of the member in its worker
    fields: MemberFields | None = None  # on the way from the worker; kept on disk only


@dataclass(frozen=True)
class MemberFailure:
    """A member that did not finish: its index and the one-line reason."""

    index: int
    error: str


@dataclass(frozen=True)
class Ensemble:
    """A finished (or partly failed) ensemble.

    ``results`` are the finished members by index, ``failures`` those that did not finish;
    ``reused`` members were read from an earlier, interrupted start of the same study;
    ``driver_time`` [s] is the time the driver spent on its own work (sampling, member
    cases, submitting, writing member files, progress), outside the members' runs and the
    shared mesh.
    """

    case: Case
    sample: Sample
    site: SiteMesh | None  # the shared mesh, when any member ran on it
    results: tuple[MemberResult, ...]
    failures: tuple[MemberFailure, ...]
    reused: int
    folder: Path
    where: str
    driver_time: float
    wall_time: float

    @property
    def n_members(self) -> int:
        """Members of the sample."""
        return int(self.sample.values.shape[0])


# ----------------------------------------------------------------------------- members


def member_case(nominal: Case, inputs: UncertainInputs, values: FloatArray) -> Case:
    """The nominal case with the drawn ``values`` (one per uncertain value, in its unit)
    set and every rule checked.

    Raises
    ------
    CaseErrors
        When a drawn value is refused by its field or by a rule between sections.
    """
    case = nominal
    try:
        for value, x in zip(inputs.values, values, strict=True):
            target = parse_target(value.name)
            assert target is not None  # checked when the case was loaded
            case = with_field(case, target, float(x), value.unit,
                              key=f"uncertain.values[{value.name}]")
    except CaseError as exc:
        raise CaseErrors([exc]) from None
    problems = cross_checks(case)
    if problems:
        raise CaseErrors(problems)
    return case


def _run_member(index: int, case: Case, site: SiteMesh | None, base_dir: Path | None,
                keep: Path | None) -> MemberResult | MemberFailure:
    """Worker: run one member in a temporary folder (or ``keep``) and return its compact
    results; an :class:`Fe3dError` comes back as a failure with its one-line message."""
    started, cpu = time.perf_counter(), time.process_time()
    scratch = None if keep is not None else Path(tempfile.mkdtemp(prefix="fe3d-member-"))
    folder = keep if scratch is None else scratch / "run"  # a run folder not yet made
    try:
        summary = run_case(case, folder, base_dir=base_dir, mesh_folders=[], site=site,
                           overwrite=True,  # the study owns its members' folders
                           compact=keep is None)  # figures and reports only when kept
        times, history = read_histories(folder, case)
        fields = None if site is None else _above_limit(folder, case)
    except Fe3dError as exc:
        return MemberFailure(index, f"{type(exc).__name__}: " + "; ".join(
            str(exc).splitlines()))
    finally:
        if scratch is not None:
            shutil.rmtree(scratch, ignore_errors=True)
    return MemberResult(index, times, history,
                        {sp: float(p["largest_extent"]) for sp, p in summary.plume.items()},
                        summary.n_nodes, time.perf_counter() - started, site is None,
                        _peak_memory(), time.process_time() - cpu, fields)


def _above_limit(folder: Path, case: Case) -> MemberFields:
    """Where the run folder's concentration series is above each species' limit, at the
    output times and at one step at least."""
    out = case.output
    times, series = read_concentration_series(folder, list(case.species),
                                              time_unit=out.time_unit,
                                              conc_unit=out.concentration_unit)
    largest = read_largest_over_run(folder, list(case.species),
                                    conc_unit=out.concentration_unit)
    limit = {sp: case.species[sp].limit for sp in series}
    return MemberFields(times, {sp: series[sp] > limit[sp] for sp in series},
                        {sp: largest[sp] > limit[sp] for sp in series})


def _peak_memory() -> float:
    """Peak resident memory of this process [B] (``ru_maxrss`` is in KiB on Linux)."""
    import resource

    return float(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss) * 1024.0


def _member_file(folder: Path, index: int) -> Path:
    return folder / "members" / f"member_{index:04d}.npz"


def _save_member(folder: Path, result: MemberResult) -> None:
    arrays: dict[str, Any] = {"times": result.times, "n_nodes": result.n_nodes,
                              "wall_time": result.wall_time, "own_mesh": result.own_mesh,
                              "peak_memory": result.peak_memory, "cpu_time": result.cpu_time}
    arrays |= {f"history/{sp}": h for sp, h in result.history.items()}
    arrays |= {f"largest_extent/{sp}": e for sp, e in result.largest_extent.items()}
    if result.fields is not None:
        arrays["output_times"] = result.fields.output_times
        arrays |= {f"above/{sp}": np.packbits(a, axis=-1)
                   for sp, a in result.fields.above.items()}
        arrays |= {f"ever_above/{sp}": np.packbits(a)
                   for sp, a in result.fields.ever_above.items()}

    def write(path: Path) -> None:
        with path.open("wb") as fh:
            np.savez(fh, **arrays)

    write_atomic(_member_file(folder, result.index), write)


def member_fields(folder: Path, index: int, n_nodes: int) -> MemberFields | None:
    """The saved above-limit fields of member ``index`` of the study in ``folder`` (``None``
    when it ran on a mesh of its own)."""
    with np.load(_member_file(folder, index)) as data:
        if "output_times" not in data:
            return None
        def bits(prefix: str) -> dict[str, BoolArray]:
            return {k.split("/", 1)[1]: np.unpackbits(data[k], axis=-1, count=n_nodes)
                    .astype(bool) for k in data if k.startswith(prefix)}
        return MemberFields(data["output_times"], bits("above/"), bits("ever_above/"))


def _load_member(folder: Path, index: int) -> MemberResult | None:
    path = _member_file(folder, index)
    if not path.exists():
        return None
    with np.load(path) as data:
        keys = list(data.keys())
        return MemberResult(
            index, data["times"],
            {k.split("/", 1)[1]: data[k] for k in keys if k.startswith("history/")},
            {k.split("/", 1)[1]: float(data[k]) for k in keys
             if k.startswith("largest_extent/")},
            int(data["n_nodes"]), float(data["wall_time"]), bool(data["own_mesh"]),
            float(data["peak_memory"]), float(data["cpu_time"]))


# ----------------------------------------------------------------------------- study folder


def case_fingerprint(case: Case) -> str:
    """SHA-256 of every case input (the ``[uncertain]`` section included) except the output
    folder: two starts of a study may only share members when this is equal."""
    data = case.model_dump(mode="json", exclude={"output": {"folder"}})
    text = json.dumps(data, sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def _manifest(case: Case, sample: Sample) -> dict[str, Any]:
    return {"case_fingerprint": case_fingerprint(case), "seed": sample.seed,
            "members": int(sample.values.shape[0]),
            "values": [{"name": n, "unit": u} for n, u in zip(sample.names, sample.units,
                                                             strict=True)],
            "fe3d": __version__}


def _claim_folder(folder: Path, manifest: dict[str, Any]) -> None:
    """Write the manifest, or check that the folder's matches (resume); raise CaseError."""
    path = folder / MANIFEST
    if path.exists():
        try:
            old = json.loads(path.read_text(encoding="utf-8"))
        except (OSError, ValueError):
            old = {}
        differs = [k for k in ("case_fingerprint", "seed", "members", "values")
                   if old.get(k) != manifest[k]]
        if differs:
            words = {"case_fingerprint": "case", "seed": "seed", "members": "member count",
                     "values": "uncertain values"}
            err = CaseError("--out", str(folder), "holds an ensemble with another "
                            f"{', '.join(words[k] for k in differs)}; its members cannot be "
                            "reused: give another folder or remove this one")
            raise err
        return
    write_text_atomic(path, json.dumps(manifest, indent=2) + "\n")


def _write_draws(folder: Path, sample: Sample) -> None:
    header = ["member", *[f"{n} [{u or '-'}]" for n, u in zip(sample.names, sample.units,
                                                               strict=True)]]
    lines = [",".join(f'"{h}"' if "," in h else h for h in header)]
    lines += [",".join([str(k), *[f"{x:.10g}" for x in row]])
              for k, row in enumerate(sample.values)]
    write_text_atomic(folder / DRAWS, "\n".join(lines) + "\n")


# ----------------------------------------------------------------------------- driver


def _outcomes(executor: StudyExecutor, jobs: dict[int, tuple[Any, ...]]
              ) -> Iterator[tuple[int, MemberResult | MemberFailure, float]]:
    """Each member's outcome as it ends, with the driver's submission time [s] not yet
    counted. In this process the members run one by one here, so each is saved before the
    next starts; on a cluster all are submitted at once."""
    if isinstance(executor.executor, SerialExecutor):
        for k, args in jobs.items():
            yield k, _outcome(k, executor.executor.submit(_run_member, *args)), 0.0
        return
    tick = time.perf_counter()
    futures = {executor.executor.submit(_run_member, *args): k for k, args in jobs.items()}
    submit_time = time.perf_counter() - tick
    for fut in as_completed(futures):
        yield futures[fut], _outcome(futures[fut], fut), submit_time
        submit_time = 0.0


def _outcome(k: int, fut: Future[Any]) -> MemberResult | MemberFailure:
    try:
        outcome: MemberResult | MemberFailure = fut.result()
    except Exception as exc:  # a worker lost or a bug: the other members go on
        return MemberFailure(k, f"{type(exc).__name__}: {exc}")
    return outcome


OnMember = Callable[[int, int, MemberResult | MemberFailure], None]


def plan_ensemble(case: Case, n_members: int) -> tuple[UncertainInputs, Sample]:
    """The case's uncertain values and their sample of ``n_members`` (cheap: call it to
    check a study before starting a cluster).

    Raises
    ------
    CaseError
        The case has no ``[uncertain]`` section, or too few members for its correlations.
    """
    inputs = case.uncertain
    if inputs is None:
        err = CaseError("uncertain", "(missing)", "an ensemble needs an [uncertain] section "
                        "naming the uncertain values and their distributions")
        raise err
    return inputs, draw_sample(inputs, n_members)


def run_ensemble(case: Case, out_dir: Path, *, n_members: int, executor: StudyExecutor,
                 base_dir: Path | None = None, keep_runs: bool = False,
                 on_member: OnMember | None = None) -> Ensemble:
    """Run the members of the case's uncertain values that have no results yet.

    Parameters
    ----------
    case
        A case with an ``[uncertain]`` section.
    out_dir
        Study folder (``ensemble.json``, ``ensemble_draws.csv``, ``members/``, ``mesh/``).
    n_members
        Size of the Latin hypercube sample.
    executor
        Where the members run (:func:`fe3d.studies.executors.study_executor`).
    base_dir
        Folder that relative file names in the case are resolved from.
    keep_runs
        Keep every member's full run folder in ``out_dir/runs/member_<k>`` (VTK series
        included); the workers must then see ``out_dir``.
    on_member
        ``on_member(done, total, outcome)`` in the calling process as each member ends
        (``done`` counts the members reused from an earlier start too).

    Raises
    ------
    CaseError
        The case has no ``[uncertain]`` section, or the folder holds another study.
    """
    started = time.perf_counter()
    inputs, sample = plan_ensemble(case, n_members)
    out_dir.mkdir(parents=True, exist_ok=True)
    _claim_folder(out_dir, _manifest(case, sample))
    _write_draws(out_dir, sample)
    nominal = case.model_copy(update={"uncertain": None})
    finished = {k: r for k in range(n_members) if (r := _load_member(out_dir, k)) is not None}
    failures: dict[int, MemberFailure] = {}
    cases: dict[int, Case] = {}
    for k in range(n_members):
        if k in finished:
            continue
        try:
            cases[k] = member_case(nominal, inputs, sample.values[k])
        except CaseErrors as exc:
            failures[k] = MemberFailure(k, "; ".join(e.line() for e in exc.errors))
    done = 0
    for outcome in [*finished.values(), *failures.values()]:  # known before any run
        done += 1
        if on_member is not None:
            on_member(done, n_members, outcome)
    nominal_hash = mesh_inputs_hash(nominal)
    shared = {k for k, c in cases.items() if mesh_inputs_hash(c) == nominal_hash}
    driver = time.perf_counter() - started
    site = site_handle = None
    if shared or any(not r.own_mesh for r in finished.values()):
        site, _reused, _files = mesh_case(nominal, out_dir / "mesh", base_dir=base_dir)
    if shared:
        site_handle = executor.share(site)
    jobs = {k: (k, c, site_handle if k in shared else None, base_dir,
                out_dir / "runs" / f"member_{k:04d}" if keep_runs else None)
            for k, c in cases.items()}
    for k, outcome, submit_time in _outcomes(executor, jobs):
        tick = time.perf_counter()
        driver += submit_time
        if isinstance(outcome, MemberResult):
            _save_member(out_dir, outcome)
            finished[k] = replace(outcome, fields=None)  # on disk; read back one at a time
        else:
            failures[k] = outcome
        done += 1
        driver += time.perf_counter() - tick
        if on_member is not None:
            on_member(done, n_members, outcome)
    return Ensemble(nominal, sample, site, tuple(finished[k] for k in sorted(finished)),
                    tuple(failures[k] for k in sorted(failures)),
                    len(finished) - len([k for k in cases if k in finished]), out_dir,
                    executor.where, driver, time.perf_counter() - started)
