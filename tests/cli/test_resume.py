"""``fe3d run --resume``: a run stopped by Ctrl-C, SIGTERM or SIGKILL continues from its last
checkpoint and its folder ends as an uninterrupted run's.

The reference is the uninterrupted run of the same case (a property of the code, no outside
value): the tables must be equal byte for byte and the fields of ``results.vtkhdf`` exactly,
because the continued run repeats the same floating-point operations (direct solves) and
writes the outputs before the checkpoint again from the values it saved.
"""

from __future__ import annotations

import csv
import hashlib
import json
import os
import signal
import subprocess
import sys
import time
import xml.etree.ElementTree as ET
from pathlib import Path

import h5py
import numpy as np
import pytest

from fe3d.case.builder import (
    Layer,
    Material,
    ObservationPoint,
    Solver,
    Source,
    Species,
    Time,
    box_case_text,
)
from fe3d.case.load import load_case
from fe3d.cli import main
from fe3d.pipeline import run_case

CASE = box_case_text(
    title="Column that is stopped and continued (invented)", length=30.0, width=1.0,
    cell=1.0, dz=1.0, heads={"west": 1.5, "east": 0.0}, mesh_options={"corridor": False},
    layers=[Layer("sand", -2.0, Material(10.0, 10.0, porosity=0.3, bulk_density=1600.0,
                                         longitudinal_dispersivity=0.5,
                                         transverse_dispersivity=0.05))],
    species=[Species(limit="100 mg/L", options={"half_life": "20 d"})],
    sources=[Source("inlet", shape="face_patch", face="west", concentration="1000 mg/L",
                    stop=3.0)],
    observation_points=[ObservationPoint("P", 10.0, 0.5, z=-1.0),
                        ObservationPoint("W", 20.0, 0.5, screen=(0.0, -2.0))],
    time=Time(8.0, 0.02, scheme="crank_nicolson", output_times=(1.0, 2.5, 5.0)),
    solver=Solver(linear_solver="direct"))
TABLES = ("histories.csv", "plume.csv", "mass_budget.csv", "receptors.csv")


def _fe3d(*args: str | Path, cwd: Path) -> subprocess.Popen[str]:
    env = {**os.environ, "PYTHONUTF8": "1", "NO_COLOR": "1", "COLUMNS": "100"}
    return subprocess.Popen([sys.executable, "-m", "fe3d.cli", *map(str, args)], cwd=cwd,
                            env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def _datasets(path: Path) -> dict[str, np.ndarray]:
    out: dict[str, np.ndarray] = {}
    with h5py.File(path, "r") as f:
        f.visititems(lambda name, obj: out.__setitem__(name, obj[()])
                     if isinstance(obj, h5py.Dataset) else None)
    return out


def _assert_like_reference(run: Path, ref: Path) -> None:
    for name in TABLES:
        if (ref / name).exists():
            assert (run / name).read_bytes() == (ref / name).read_bytes(), name
    got, want = _datasets(run / "results.vtkhdf"), _datasets(ref / "results.vtkhdf")
    assert got.keys() == want.keys()
    for key, value in want.items():
        np.testing.assert_array_equal(got[key], value, err_msg=key, strict=True)
    manifest = json.loads((run / "run.json").read_text(encoding="utf-8"))
    assert manifest["state"] == "finished"
    assert not (run / "checkpoint").exists()  # a finished run keeps none
    assert not list(run.parent.glob(f".{run.name}.*"))  # no hidden folder left behind


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    folder = tmp_path_factory.mktemp("resume")
    case_file = folder / "case.toml"
    case_file.write_text(CASE, encoding="utf-8")
    assert main(["run", str(case_file), "--out", str(folder / "ref"), "--quiet"]) == 0
    return case_file, folder / "ref"


def _stop_at_step(n: int):
    count = [0]

    def progress(stage: str, _done: float, _total: float) -> None:
        if stage == "transport":
            count[0] += 1
            if count[0] == n:
                raise KeyboardInterrupt
    return progress


@pytest.mark.parametrize("stop_at", [3, 170])
def test_resume_after_ctrl_c_ends_like_an_uninterrupted_run(reference, tmp_path, stop_at):
    """Stopped at a step (before and after an output time and the source's stop at 3 d), the
    folder is marked interrupted and keeps a checkpoint; ``--resume`` continues and the
    tables and fields end equal to the uninterrupted run's."""
    case_file, ref = reference
    run = tmp_path / "run"
    with pytest.raises(KeyboardInterrupt):
        run_case(load_case(case_file), run, progress=_stop_at_step(stop_at))
    manifest = json.loads((run / "run.json").read_text(encoding="utf-8"))
    assert manifest["state"] == "interrupted"
    assert (run / "checkpoint" / "state.npz").is_file()
    listed = {f["name"]: f["sha256"] for f in manifest["files"]}  # the checkpoint too
    saved = {p.relative_to(run).as_posix() for p in (run / "checkpoint").iterdir()}
    assert saved and saved <= set(listed)
    for name in saved:
        assert hashlib.sha256((run / name).read_bytes()).hexdigest() == listed[name]
    assert main(["run", str(case_file), "--out", str(run), "--resume", "--quiet"]) == 0
    _assert_like_reference(run, ref)


def _wait_for_checkpoint(tmp_path: Path, proc: subprocess.Popen[str]) -> None:
    deadline = time.monotonic() + 240.0
    while not list(tmp_path.glob(".run.running-*/checkpoint/state.npz")):
        assert proc.poll() is None, proc.communicate()
        assert time.monotonic() < deadline, "no checkpoint appeared"
        time.sleep(0.02)


def test_resume_after_sigterm_and_after_sigkill(reference, tmp_path):
    """SIGTERM: exit code 143, one line naming how to continue, a folder marked interrupted
    whose CSV, VTK and VTKHDF files all read. SIGKILL (nothing runs on the way out): the
    hidden work folder is taken over by ``--resume``. Both end equal to the uninterrupted
    run."""
    case_file, ref = reference
    run = tmp_path / "run"
    proc = _fe3d("run", case_file, "--out", run, "--checkpoint-every", "5 steps", "--quiet",
                 cwd=tmp_path)
    _wait_for_checkpoint(tmp_path, proc)
    proc.send_signal(signal.SIGTERM)
    _, err = proc.communicate(timeout=240)
    assert proc.returncode == 143, err
    assert err.count("\n") == 1 and "SIGTERM" in err and "--resume" in err, err
    assert json.loads((run / "run.json").read_text(encoding="utf-8"))["state"] == "interrupted"
    for path in run.glob("*.csv"):
        with path.open(encoding="utf-8", newline="") as fh:
            assert list(csv.reader(fh)), path
    for path in [*run.glob("*.vtu"), *run.glob("*.vtp"), *run.glob("*.pvd")]:
        ET.parse(path)
    assert _datasets(run / "results.vtkhdf")

    proc = _fe3d("run", case_file, "--out", run, "--resume", "--checkpoint-every", "5 steps",
                 "--quiet", cwd=tmp_path)
    _wait_for_checkpoint(tmp_path, proc)
    proc.send_signal(signal.SIGKILL)
    proc.communicate(timeout=240)
    assert list(tmp_path.glob(".run.running-*"))  # the killed run's work folder

    proc = _fe3d("run", case_file, "--out", run, "--resume", "--quiet", cwd=tmp_path)
    _, err = proc.communicate(timeout=240)
    assert proc.returncode == 0, err
    _assert_like_reference(run, ref)


def test_resume_refused_without_checkpoint_or_after_a_change(reference, tmp_path):
    """One line naming --resume and exit 2: no checkpoint; the case changed (the run folder
    is left exactly as it was)."""
    case_file, _ = reference
    run = tmp_path / "run"
    assert main(["run", str(case_file), "--out", str(run), "--resume", "--quiet"]) == 2
    assert not run.exists()
    with pytest.raises(KeyboardInterrupt):
        run_case(load_case(case_file), run, progress=_stop_at_step(40))
    before = {p.name: p.read_bytes() for p in run.rglob("*") if p.is_file()}
    changed = tmp_path / "changed.toml"
    changed.write_text(CASE.replace('"20 d"', '"25 d"'), encoding="utf-8")
    assert main(["run", str(changed), "--out", str(run), "--resume", "--quiet"]) == 2
    assert {p.name: p.read_bytes() for p in run.rglob("*") if p.is_file()} == before
    assert not list(tmp_path.glob(".run.*"))


@pytest.mark.parametrize("text", ["0 steps", "-5 min", "5 m", "often"])
def test_checkpoint_interval_refused_with_one_line(reference, tmp_path, capsys, text):
    """A bad --checkpoint-every gives one line naming it and exit 2, before any work."""
    case_file, _ = reference
    code = main(["run", str(case_file), "--out", str(tmp_path / "run"), "--quiet",
                 "--checkpoint-every", text])
    err = capsys.readouterr().err
    assert code == 2
    assert err.count("\n") == 1 and err.startswith("error: --checkpoint-every"), err
    assert not (tmp_path / "run").exists()
