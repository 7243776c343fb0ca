"""Checkpoints: the transport run's state between two steps, saved so that a stopped run
continues bit for bit (``fe3d run CASE --resume``).

A checkpoint folder holds ``state.npz`` (the latest state) and one ``output_KKKK.npz`` per
output time already yielded (written once, so that the outputs before the checkpoint can be
written again exactly). Each file is a NumPy ``.npz`` archive of arrays with a JSON header
in its ``header`` entry (an open format: any zip reader and NumPy read it), written to a
temporary file in the same folder and renamed over the old one (``os.replace``), so a file is
always either the old or the new checkpoint, never a mix.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import tempfile
import time
from collections.abc import Callable
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any

import numpy as np

from fe3d._typing import FloatArray
from fe3d.errors import CaseError
from fe3d.flow.solve import FlowField
from fe3d.mesh.site_mesh import SiteMesh
from fe3d.transport.accumulate import StatisticsState, TotalsState, TransportDiagnostics
from fe3d.transport.budget import MassBudget
from fe3d.transport.planner import PlannerState
from fe3d.transport.run_wide import RunWideField
from fe3d.transport.snapshot import Snapshot
from fe3d.transport.step import StepBudget, StepState

__all__ = [
    "CHECKPOINT_FOLDER",
    "FORMAT",
    "RESUME_KEY",
    "Checkpoint",
    "Checkpointer",
    "RunInterrupted",
    "check_resumable",
    "fingerprint",
    "read_checkpoint",
    "read_outputs",
    "run_fingerprints",
    "write_checkpoint",
    "write_output",
]

CHECKPOINT_FOLDER = "checkpoint"
"""The checkpoint folder's name inside a run folder."""

FORMAT = 3
"""Version of the checkpoint layout; a checkpoint of another version is not read (3: the
diagnostics no longer hold the share of nodes flux limiting left at low order)."""

RESUME_KEY = "--resume"
"""What a refused resume is named by: the command-line option that asks for it."""

_STATE = "state.npz"
_HASH_BLOCK = 1 << 20
"""Entries per block fed to a fingerprint (8 MiB of int64 or float64)."""


class RunInterrupted(KeyboardInterrupt):
    """The run stopped on a signal after saving a checkpoint at ``time`` [s] in
    ``folder`` (None when no checkpoint could be saved)."""

    def __init__(self, signal_number: int, time: float, folder: Path | None) -> None:
        super().__init__(f"signal {signal_number} at t = {time:.6g} s")
        self.signal_number, self.time, self.folder = signal_number, time, folder


@dataclass(frozen=True)
class Checkpoint:
    """Everything the run loop carries from one step to the next.

    ``state``: the fields [kg/m³], held masks, the older level and last budget of every
    species; ``planner``, ``totals``, ``statistics``: the step planner, the budget totals
    and the diagnostics; ``history_times`` [s] and ``history`` (species → ``(n_times,
    n_rows)`` [kg/m³]): every step so far; ``over_run``: the fields over the run so far;
    ``accepted``: the levels (t [s], fields)
    of the local error estimate; ``dt_prev`` [s]: the last step (None after a restart);
    ``outputs``: snapshots yielded so far; ``mesh`` and ``flow``: fingerprints of the mesh
    and flow field the state belongs to. Nothing else carries from step to step: Newton's
    start and the step systems depend on a step's own inputs (a direct solver; see
    :func:`fe3d.transport.run.run_transport` for the iterative ones)."""

    state: StepState
    planner: PlannerState
    totals: TotalsState
    statistics: StatisticsState
    history_times: FloatArray
    history: dict[str, FloatArray]
    over_run: dict[str, RunWideField]
    accepted: tuple[tuple[float, dict[str, FloatArray]], ...]
    dt_prev: float | None
    outputs: int
    mesh: str
    flow: str

    @property
    def time(self) -> float:
        """Time reached [s]."""
        return self.planner.t


def fingerprint(*arrays: FloatArray) -> str:
    """SHA-256 of the arrays' shapes, types and bytes (hex). Signed integer arrays are
    hashed as their int64 values, so that a mesh's cells give the same fingerprint held as
    int32 or int64 (a checkpoint saved when SiteMesh held int64 cells resumes on the same
    mesh now held in int32). Fed in blocks: no whole copy of an array."""
    digest = hashlib.sha256()
    for a in arrays:
        a = np.ascontiguousarray(a)
        kind = np.dtype(np.int64) if np.issubdtype(a.dtype, np.signedinteger) else a.dtype
        digest.update(f"{kind.str}{a.shape}".encode())
        flat = a.reshape(-1)
        for start in range(0, flat.size, _HASH_BLOCK):
            block = flat[start:start + _HASH_BLOCK].astype(kind, copy=False)
            digest.update(block.view(np.uint8))
    return digest.hexdigest()


def run_fingerprints(site: SiteMesh, flow: FlowField) -> tuple[str, str]:
    """Fingerprints of the mesh (points, cells) and of the flow (head, Darcy flux)."""
    return fingerprint(site.points, site.cells), fingerprint(flow.head, flow.darcy_flux)


def check_resumable(ckpt: Checkpoint, site: SiteMesh, flow: FlowField,
                    rows: int | None = None) -> None:
    """Raise CaseError naming ``--resume`` when ``ckpt`` was saved with another mesh or
    flow field or, when ``rows`` is given, with histories of other than ``rows`` columns
    (the rows the run samples at every step)."""
    mesh, water = run_fingerprints(site, flow)
    widths = {h.shape[1] for h in ckpt.history.values()}
    what = "mesh" if mesh != ckpt.mesh else "flow field" if water != ckpt.flow else \
        "set of sampled rows" if rows is not None and widths - {rows} else None
    if what is not None:
        allowed = f"was saved with another {what}: run again from the start (--overwrite)"
        raise CaseError(RESUME_KEY, f"checkpoint at t = {ckpt.time:.6g} s", allowed)


def _plain(x: Any) -> Any:
    """JSON-ready copy: tuples as lists, non-finite floats as the strings 'inf', '-inf',
    'nan' (read back with float())."""
    if isinstance(x, dict):
        return {k: _plain(v) for k, v in x.items()}
    if isinstance(x, list | tuple):
        return [_plain(v) for v in x]
    if isinstance(x, float) and not math.isfinite(x):
        return str(x)
    return x


def _save(path: Path, header: dict[str, Any], arrays: dict[str, np.ndarray]) -> None:
    """One ``.npz`` with the JSON ``header``, written to a temporary file in the same folder
    and renamed into place."""
    path.parent.mkdir(parents=True, exist_ok=True)
    first: dict[int, str] = {}  # an array held twice (fields, levels) is written once
    same_as = {k: first.setdefault(id(a), k) for k, a in arrays.items()}
    arrays = {k: a for k, a in arrays.items() if same_as[k] == k}
    same_as = {k: v for k, v in same_as.items() if k != v}
    text = json.dumps(_plain({"format": FORMAT, **header, "same_as": same_as}),
                      allow_nan=False)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            np.savez(fh, header=np.array(text), **arrays)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def _load(path: Path) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
    with np.load(path, allow_pickle=False) as z:
        arrays = {k: z[k] for k in z.files}
    header = json.loads(str(arrays.pop("header")))
    if header.get("format") != FORMAT:
        msg = f"{path}: checkpoint format {header.get('format')}, this fe3d reads {FORMAT}"
        raise ValueError(msg)
    for key, kept in header.pop("same_as").items():
        arrays[key] = arrays[kept]
    return header, arrays


def _extremes(saved: dict[str, Any]) -> dict[str, tuple[float, tuple[float, ...] | None]]:
    return {k: (float(v), None if where is None else tuple(float(x) for x in where))
            for k, (v, where) in saved.items()}


def _plume_courant(saved: dict[str, Any], where: dict[str, Any]
                   ) -> dict[str, tuple[float, tuple[float, ...] | None]]:
    """The largest plume Courant numbers and where, saved as (value, where) pairs, or, by
    fe3d before 4 Dec 2026, as values with the places apart (``where``; none before 3 Dec)."""
    pairs = {k: v if isinstance(v, list) else [v, where.get(k)] for k, v in saved.items()}
    return _extremes(pairs)


def _floats(saved: dict[str, Any]) -> dict[str, float]:
    return {k: float(v) for k, v in saved.items()}


def write_checkpoint(folder: Path, ckpt: Checkpoint, *, case: str) -> Path:
    """Save ``ckpt`` (and ``case``, the fingerprint of the case it belongs to) as
    ``folder/state.npz``, replacing the previous one atomically."""
    names = list(ckpt.state.fields)
    arrays: dict[str, np.ndarray] = {"history_times": ckpt.history_times}
    budgets = {}
    for k, name in enumerate(names):
        arrays[f"field_{k}"] = ckpt.state.fields[name]
        arrays[f"held_{k}"] = ckpt.state.held_before[name]
        arrays[f"history_{k}"] = ckpt.history[name]
        arrays.update(_run_wide_arrays(k, ckpt.over_run[name]))
        if ckpt.state.older is not None:
            arrays[f"older_{k}"] = ckpt.state.older[name]
        for j, (_, fields) in enumerate(ckpt.accepted):
            arrays[f"accepted_{j}_{k}"] = fields[name]
        b = ckpt.state.last_budget.get(name)
        if b is not None:
            arrays[f"budget_fixed_{k}"], arrays[f"budget_start_{k}"] = b.fixed, b.start
            budgets[name] = {"source_input": b.source_input, "produced": b.produced,
                             "decayed": b.decayed, "outflow": b.outflow,
                             "switch_on": b.switch_on}
    header = {"species": names, "case": case, "mesh": ckpt.mesh, "flow": ckpt.flow,
              "time": ckpt.time, "dt_prev": ckpt.dt_prev, "outputs": ckpt.outputs,
              "older": ckpt.state.older is not None, "last_budget": budgets,
              "accepted_times": [t for t, _ in ckpt.accepted],
              "planner": asdict(ckpt.planner), "totals": asdict(ckpt.totals),
              "statistics": asdict(ckpt.statistics)}
    path = folder / _STATE
    _save(path, header, arrays)
    return path


def read_checkpoint(folder: Path) -> tuple[Checkpoint, str] | None:
    """The checkpoint saved in ``folder`` and the fingerprint of its case, or None when the
    folder holds none."""
    path = folder / _STATE
    if not path.is_file():
        return None
    h, a = _load(path)
    names = h["species"]
    state = StepState(
        fields={n: a[f"field_{k}"] for k, n in enumerate(names)},
        held_before={n: a[f"held_{k}"] for k, n in enumerate(names)},
        older={n: a[f"older_{k}"] for k, n in enumerate(names)} if h["older"] else None,
        last_budget={n: StepBudget(
            source_input=float(b["source_input"]), produced=float(b["produced"]),
            decayed=float(b["decayed"]), outflow=_floats(b["outflow"]),
            switch_on=float(b["switch_on"]), fixed=a[f"budget_fixed_{names.index(n)}"],
            start=a[f"budget_start_{names.index(n)}"]) for n, b in h["last_budget"].items()})
    p, t, s = h["planner"], h["totals"], h["statistics"]
    planner = PlannerState(t=float(p["t"]), dt_want=float(p["dt_want"]),
                           cuts_here=p["cuts_here"], step_cuts=p["step_cuts"],
                           rejected=p["rejected"],
                           queue=tuple((float(t1), float(dt)) for t1, dt in p["queue"]))
    totals = TotalsState(initial=_floats(t["initial"]), source_input=_floats(t["source_input"]),
                         produced=_floats(t["produced"]), decayed=_floats(t["decayed"]),
                         outflow={k: _floats(v) for k, v in t["outflow"].items()})
    stats = StatisticsState(
        peclet=_floats(s["peclet"]), courant=_floats(s["courant"]),
        plume_courant=_plume_courant(s["plume_courant"], s.get("plume_courant_at", {})),
        lowest=_extremes(s["lowest"]),
        highest=_extremes(s["highest"]), n_steps=s["n_steps"], dt_min=float(s["dt_min"]),
        dt_max=float(s["dt_max"]), newton=s["newton"], sweeps=s["sweeps"], solver=s["solver"])
    accepted = tuple((float(tj), {n: a[f"accepted_{j}_{k}"] for k, n in enumerate(names)})
                     for j, tj in enumerate(h["accepted_times"]))
    ckpt = Checkpoint(state=state, planner=planner, totals=totals, statistics=stats,
                      history_times=a["history_times"],
                      history={n: a[f"history_{k}"] for k, n in enumerate(names)},
                      over_run={n: _run_wide_of(k, a) for k, n in enumerate(names)},
                      accepted=accepted,
                      dt_prev=None if h["dt_prev"] is None else float(h["dt_prev"]),
                      outputs=h["outputs"], mesh=h["mesh"], flow=h["flow"])
    return ckpt, h["case"]


def write_output(folder: Path, index: int, snap: Snapshot) -> Path:
    """Save the ``index``-th snapshot yielded (its fields, budgets, diagnostics and the
    number of history rows then) as ``folder/output_KKKK.npz``."""
    names = list(snap.concentration)
    header = {"species": names, "time": snap.time, "history_rows": len(snap.history_times),
              "budgets": {n: asdict(b) for n, b in snap.budgets.items()},
              "diagnostics": asdict(snap.diagnostics)}
    path = folder / f"output_{index:04d}.npz"
    arrays = {f"field_{k}": snap.concentration[n] for k, n in enumerate(names)}
    for k, n in enumerate(names):
        arrays.update(_run_wide_arrays(k, snap.over_run[n]))
    _save(path, header, arrays)
    return path


def _run_wide_arrays(k: int, f: RunWideField) -> dict[str, np.ndarray]:
    """The arrays of the ``k``-th species' fields over the run, by their saved names."""
    return {f"largest_{k}": f.largest, f"time_of_largest_{k}": f.time_of_largest,
            f"first_above_{k}": f.first_above}


def _run_wide_of(k: int, a: dict[str, np.ndarray]) -> RunWideField:
    """The ``k``-th species' fields over the run, from the saved arrays ``a``."""
    return RunWideField(largest=a[f"largest_{k}"], time_of_largest=a[f"time_of_largest_{k}"],
                        first_above=a[f"first_above_{k}"])


def read_outputs(folder: Path, ckpt: Checkpoint) -> list[Snapshot]:
    """The snapshots yielded before ``ckpt`` (saved by :func:`write_output`), with their
    histories cut from the checkpoint's."""
    out = []
    for index in range(ckpt.outputs):
        h, a = _load(folder / f"output_{index:04d}.npz")
        rows, d = h["history_rows"], h["diagnostics"]
        budgets = {n: MassBudget(**{**b, **{k: float(v) for k, v in b.items()
                                            if k not in ("species", "outflow")},
                                    "outflow": _floats(b["outflow"])})
                   for n, b in h["budgets"].items()}
        diagnostics = TransportDiagnostics(**{
            **{k: v for k, v in d.items() if k != "max_plume_courant_at"},
            **{k: _floats(d[k]) for k in ("max_grid_peclet", "max_courant")},
            "max_plume_courant": _plume_courant(d["max_plume_courant"],
                                                d.get("max_plume_courant_at", {})),
            "min_concentration": _extremes(d["min_concentration"]),
            "max_concentration": _extremes(d["max_concentration"]),
            "smallest_step": float(d["smallest_step"]),
            "largest_step": float(d["largest_step"])})
        out.append(Snapshot(
            time=float(h["time"]),
            concentration={n: a[f"field_{k}"] for k, n in enumerate(h["species"])},
            budgets=budgets, history_times=ckpt.history_times[:rows].copy(),
            history={n: v[:rows].copy() for n, v in ckpt.history.items()},
            diagnostics=diagnostics,
            over_run={n: _run_wide_of(k, a) for k, n in enumerate(h["species"])}))
    return out


class Checkpointer:
    """Saves the run loop's state into ``folder`` every ``every_steps`` accepted steps
    and/or every ``every_seconds`` of wall time (whichever comes first), and at once when a
    stop was asked for (``stop_signal``, set by a signal handler while ``listening``), after
    which the run stops with :class:`RunInterrupted`. ``case`` is the fingerprint of the
    case."""

    def __init__(self, folder: Path, *, case: str, every_steps: int | None = None,
                 every_seconds: float | None = None,
                 clock: Callable[[], float] = time.monotonic) -> None:
        self.folder, self.case = folder, case
        self.every_steps, self.every_seconds, self.clock = every_steps, every_seconds, clock
        self.stop_signal: int | None = None
        self.listening = False  # the transport is running: a signal waits for the step's end
        self.saved = 0  # checkpoints written
        self.write_seconds = 0.0  # wall time spent writing them [s]
        self._since_steps = 0
        self._since = clock()

    def offer(self, build: Callable[[], Checkpoint]) -> None:
        """Called by the run loop between steps: save when due, and stop (raise
        :class:`RunInterrupted` after saving) when a stop was asked for."""
        self._since_steps += 1
        if self.stop_signal is not None:
            ckpt = self.save(build())
            raise RunInterrupted(self.stop_signal, ckpt.time, self.folder)
        due_steps = self.every_steps is not None and self._since_steps >= self.every_steps
        due_time = self.every_seconds is not None and \
            self.clock() - self._since >= self.every_seconds
        if due_steps or due_time:
            self.save(build())

    def save(self, ckpt: Checkpoint) -> Checkpoint:
        """Write ``ckpt`` now; returns it."""
        start = time.perf_counter()
        write_checkpoint(self.folder, ckpt, case=self.case)
        self.write_seconds += time.perf_counter() - start
        self.saved += 1
        self._since_steps, self._since = 0, self.clock()
        return ckpt

    def add_output(self, index: int, snap: Snapshot) -> None:
        """Keep the ``index``-th snapshot yielded (see :func:`write_output`)."""
        write_output(self.folder, index, snap)
