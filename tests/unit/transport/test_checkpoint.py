"""Checkpoints of the transport run: stopped at a step and continued, a run ends exactly where
an uninterrupted run ends.

The reference is the uninterrupted run itself (a property of the code, not a published
value): a continued run repeats the same floating-point operations on the same numbers
(direct linear solves, deterministic assembly), so every later snapshot, history and budget
must equal the uninterrupted run's bit for bit. The check asserts exact equality, which is
stricter than the 1e-12 relative tolerance of the issue.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
import scipy.sparse as sp

from fe3d.case.builder import (
    Layer,
    Material,
    ObservationPoint,
    Solver,
    Source,
    Species,
    Time,
    box_case,
)
from fe3d.case.parts import TransportInputs
from fe3d.errors import CaseError
from fe3d.pipeline import mesh_and_flow
from fe3d.transport.checkpoint import Checkpointer, read_checkpoint, read_outputs
from fe3d.transport.run import run_transport

DAY = 86400.0


class _Killed(Exception):
    """The process died: no checkpoint is written on the way out."""


def _column(species: Species, time: Time, *, monotone: bool) -> object:
    """A 30 m sand column (K 10 m/d, head drop 1.5 m) fed at its west face from day 0 to day
    3 (a source switch: multistep schemes restart), with a point and a screen observed."""
    h = 1.0
    return box_case(
        length=30.0, width=h, cell=h, dz=h, heads={"west": 1.5, "east": 0.0},
        layers=[Layer("sand", -2 * h, Material(10.0, 10.0, porosity=0.3, bulk_density=1600.0,
                                               longitudinal_dispersivity=0.5,
                                               transverse_dispersivity=0.05))],
        species=[species],
        sources=[Source("inlet", species=species.name, shape="face_patch", face="west",
                        concentration="1000 mg/L", stop=3.0)],
        observation_points=[ObservationPoint("p10", 10.0, 0.5, z=-1.0),
                            ObservationPoint("w20", 20.0, 0.5, screen=(0.0, -2.0))],
        time=time, solver=Solver(linear_solver="direct", monotone=monotone))


LINEAR = (Species("tracer", options={"half_life": "20 d", "kd":
                                     "0.05 L/kg"}),
          Time(8.0, 0.25, scheme="bdf2", output_times=(1.0, 2.5, 5.0)), False)
NONLINEAR = (Species("solute", options={"sorption": "langmuir",
                                        "langmuir_capacity": "50 mg/kg",
                                        "langmuir_affinity": "5 m^3/kg"}),
             Time(8.0, 0.1, scheme="bdf2", adaptive=True, error_tolerance=1e-3,
                  max_step="1 d", output_times=(1.0, 2.5, 5.0)), False)


@pytest.fixture(scope="module", params=[LINEAR, NONLINEAR], ids=["linear", "langmuir"])
def prepared(request):
    species, time, monotone = request.param
    case = _column(species, time, monotone=monotone)
    site, flow = mesh_and_flow(case)
    inputs = TransportInputs.of(case)
    return site, flow, inputs, list(run_transport(site, flow, inputs))


def _stop_after(n: int, exc: BaseException):
    count = [0]

    def on_step(_t: float, _end: float) -> None:
        count[0] += 1
        if count[0] == n:
            raise exc
    return on_step


def _assert_same(got, want) -> None:
    assert got.time == want.time
    for name, c in want.concentration.items():
        np.testing.assert_array_equal(got.concentration[name], c, strict=True)
        np.testing.assert_array_equal(got.history[name], want.history[name], strict=True)
        for part in ("largest", "time_of_largest", "first_above"):
            np.testing.assert_array_equal(getattr(got.over_run[name], part),
                                          getattr(want.over_run[name], part), strict=True)
    np.testing.assert_array_equal(got.history_times, want.history_times, strict=True)
    assert got.budgets == want.budgets
    assert got.diagnostics == want.diagnostics


def _continue(site, flow, inputs, folder):
    saved = read_checkpoint(folder)
    assert saved is not None
    ckpt, case_print = saved
    assert case_print == "case"
    replayed = read_outputs(folder, ckpt)
    return replayed + list(run_transport(site, flow, inputs, resume_from=ckpt))


@pytest.mark.parametrize("stop_at", [1, 12, 23])
def test_checkpoint_interrupted_run_continues_bit_for_bit(prepared, tmp_path, stop_at):
    """Ctrl-C (a KeyboardInterrupt from the step callback) after ``stop_at`` steps saves a
    checkpoint; the outputs kept plus the continued run equal the uninterrupted run's
    snapshots exactly (fields, histories, budgets, diagnostics, fields over the run)."""
    site, flow, inputs, whole = prepared
    keeper = Checkpointer(tmp_path, case="case")
    with pytest.raises(KeyboardInterrupt):
        for k, snap in enumerate(run_transport(site, flow, inputs, checkpoints=keeper,
                                               on_step=_stop_after(stop_at,
                                                                   KeyboardInterrupt()))):
            keeper.add_output(k, snap)
    assert keeper.saved == 1
    resumed = _continue(site, flow, inputs, tmp_path)
    assert len(resumed) == len(whole)
    for got, want in zip(resumed, whole, strict=True):
        _assert_same(got, want)


@pytest.mark.parametrize("seed", [0, 1])
def test_checkpoint_after_a_kill_continues_from_the_last_periodic_one(prepared, tmp_path,
                                                                      seed):
    """A process killed at a random step (nothing saved on the way out) continues from its
    last periodic checkpoint (every 4 steps), bit for bit."""
    site, flow, inputs, whole = prepared
    n_steps = whole[-1].diagnostics.n_steps
    stop_at = int(np.random.default_rng(seed).integers(5, n_steps))
    keeper = Checkpointer(tmp_path, case="case", every_steps=4)
    with pytest.raises(_Killed):
        for k, snap in enumerate(run_transport(site, flow, inputs, checkpoints=keeper,
                                               on_step=_stop_after(stop_at, _Killed()))):
            keeper.add_output(k, snap)
    assert keeper.saved == (stop_at - 1) // 4
    resumed = _continue(site, flow, inputs, tmp_path)
    for got, want in zip(resumed, whole, strict=True):
        _assert_same(got, want)


def test_checkpoint_stop_request_saves_and_stops(prepared, tmp_path):
    """A stop asked for by a signal handler (``stop_signal``) ends the run after the current
    step with a checkpoint at that step and :class:`RunInterrupted` naming the signal."""
    from fe3d.transport.checkpoint import RunInterrupted

    site, flow, inputs, _ = prepared
    keeper = Checkpointer(tmp_path, case="case")

    def ask_stop(t: float, _end: float) -> None:
        if t >= 2.0 * DAY:
            keeper.stop_signal = 15
    with pytest.raises(RunInterrupted) as info:
        for k, snap in enumerate(run_transport(site, flow, inputs, checkpoints=keeper,
                                               on_step=ask_stop)):
            keeper.add_output(k, snap)
    assert info.value.signal_number == 15
    ckpt, _ = read_checkpoint(tmp_path)
    assert ckpt.time == info.value.time >= 2.0 * DAY


def _saved_after_three_steps(site, flow, inputs, folder):
    """The checkpoint a run stopped by Ctrl-C after three steps leaves in ``folder``."""
    keeper = Checkpointer(folder, case="case")
    with pytest.raises(KeyboardInterrupt):
        list(run_transport(site, flow, inputs, checkpoints=keeper,
                           on_step=_stop_after(3, KeyboardInterrupt())))
    ckpt, _ = read_checkpoint(folder)
    return ckpt


def test_checkpoint_of_another_mesh_is_refused(prepared, tmp_path):
    """A checkpoint resumed on another flow field is refused with one line naming --resume."""
    site, flow, inputs, _ = prepared
    ckpt = _saved_after_three_steps(site, flow, inputs, tmp_path)
    other = dataclasses.replace(flow, head=flow.head + 1e-9)
    with pytest.raises(CaseError, match=r"--resume.*another flow field"):
        next(run_transport(site, other, inputs, resume_from=ckpt))


def test_checkpoint_with_other_sampled_rows_is_refused(prepared, tmp_path):
    """A checkpoint saved with the observation points only, resumed with one more sampled
    row (a receptor), is refused with one line naming --resume."""
    site, flow, inputs, _ = prepared
    ckpt = _saved_after_three_steps(site, flow, inputs, tmp_path)
    extra = sp.csr_matrix(np.full((1, site.n_nodes), 1.0 / site.n_nodes))
    with pytest.raises(CaseError, match=r"--resume.*another set of sampled rows"):
        next(run_transport(site, flow, inputs, resume_from=ckpt, extra_probe=extra))


def test_checkpoint_saving_does_not_change_the_run(prepared, tmp_path):
    """A checkpoint after every step leaves every snapshot of the run exactly as it is
    without checkpoints (the state is copied out, never changed)."""
    site, flow, inputs, whole = prepared
    keeper = Checkpointer(tmp_path, case="case", every_steps=1)
    snaps = []
    for k, snap in enumerate(run_transport(site, flow, inputs, checkpoints=keeper)):
        keeper.add_output(k, snap)
        snaps.append(snap)
    assert keeper.saved == whole[-1].diagnostics.n_steps - 1  # none after the last step
    for got, want in zip(snaps, whole, strict=True):
        _assert_same(got, want)


def test_checkpoint_write_that_fails_keeps_the_previous_one(prepared, tmp_path, monkeypatch):
    """A write that fails half way (disk full) leaves the previous checkpoint whole and no
    temporary file behind (temp file in the same folder, renamed only when complete)."""
    site, flow, inputs, _ = prepared
    keeper = Checkpointer(tmp_path, case="case", every_steps=2)
    run = run_transport(site, flow, inputs, checkpoints=keeper,
                        on_step=_stop_after(5, KeyboardInterrupt()))
    with pytest.raises(KeyboardInterrupt):
        list(run)
    before = (tmp_path / "state.npz").read_bytes()

    def full_disk(fh, **_arrays):
        fh.write(b"PK\x03\x04 partial")
        raise OSError(28, "No space left on device")
    monkeypatch.setattr(np, "savez", full_disk)
    ckpt, _ = read_checkpoint(tmp_path)
    with pytest.raises(OSError, match="No space"):
        keeper.save(ckpt)
    assert (tmp_path / "state.npz").read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["state.npz"]


def _as_saved_before_4_dec(path, record: str, value: str) -> None:
    """Rewrite a saved file's header the way fe3d wrote it before 4 Dec 2026: the largest
    plume Courant numbers (``header[record][value]``) as values, the places where they
    were reached apart (``value + "_at"``)."""
    import json

    with np.load(path) as saved:
        arrays = {k: saved[k] for k in saved.files}
    header = json.loads(str(arrays.pop("header")))
    pairs = header[record][value]
    header[record][f"{value}_at"] = {k: v[1] for k, v in pairs.items()}
    header[record][value] = {k: v[0] for k, v in pairs.items()}
    np.savez(path, header=np.array(json.dumps(header)), **arrays)


def test_checkpoint_saved_before_the_plume_courant_record_resumes(prepared, tmp_path):
    """A checkpoint saved before the plume's Courant number and its place became one record
    (4 Dec 2026) still continues the run bit for bit."""
    site, flow, inputs, whole = prepared
    keeper = Checkpointer(tmp_path, case="case")
    with pytest.raises(KeyboardInterrupt):
        for k, snap in enumerate(run_transport(site, flow, inputs, checkpoints=keeper,
                                               on_step=_stop_after(12, KeyboardInterrupt()))):
            keeper.add_output(k, snap)
    _as_saved_before_4_dec(tmp_path / "state.npz", "statistics", "plume_courant")
    for output in tmp_path.glob("output_*.npz"):
        _as_saved_before_4_dec(output, "diagnostics", "max_plume_courant")
    resumed = _continue(site, flow, inputs, tmp_path)
    for got, want in zip(resumed, whole, strict=True):
        _assert_same(got, want)


def test_a_mesh_fingerprint_does_not_depend_on_the_cells_integer_type() -> None:
    """A checkpoint names its mesh by a SHA-256 fingerprint of the points and cells. Cells
    held as int32 (SiteMesh from issue 16 on) give the fingerprint the same int64 cells gave
    before, computed here with the standard library's hashlib the way the former fingerprint
    was (type, shape, then the whole array's bytes), so that a run checkpointed with int64
    cells resumes on the same mesh."""
    import hashlib

    from fe3d.transport.checkpoint import fingerprint

    rng = np.random.default_rng(3)
    points = rng.random((3, 2_500_001))  # more than one hashing block
    cells = rng.integers(0, points.shape[1], (4, 300_000))
    former = hashlib.sha256()
    for a in (points, cells.astype(np.int64)):
        former.update(f"{a.dtype.str}{a.shape}".encode())
        former.update(a.tobytes())
    assert fingerprint(points, cells.astype(np.int32)) == former.hexdigest()
    assert fingerprint(points, cells.astype(np.int64)) == former.hexdigest()
    assert fingerprint(points, cells[:, ::-1].astype(np.int32)) != former.hexdigest()
