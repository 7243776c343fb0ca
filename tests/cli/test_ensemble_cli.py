"""``fe3d ensemble``: bad input is one line naming the key and exit code 2; a study killed
mid-run and started again runs only the missing members.

The bad-input cases call :func:`fe3d.cli.main` in this process (no run starts, so no
subprocess is needed to keep the suite fast); the kill uses a real process and SIGKILL.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from fe3d.case.builder import (
    Layer,
    Material,
    ObservationPoint,
    Source,
    Species,
    Time,
    box_case_text,
)
from fe3d.cli import main
from fe3d.post.report import CAUTION

BASE = box_case_text(
    title="Ensemble column (invented)", length=20.0, width=1.0, cell=1.0, dz=1.0,
    heads={"west": 0.5, "east": 0.0}, mesh_options={"corridor": False},
    layers=[Layer("sand", -1.0, Material(10.0))],
    species=[Species(limit="100 mg/L")],
    sources=[Source("inlet", shape="face_patch", face="west", concentration="1000 mg/L")],
    observation_points=[ObservationPoint("P", 5.0, 0.5, z=-0.5)], time=Time(6.0, 0.5))
CASE = BASE + """
[uncertain]
seed = 9

[[uncertain.values]]
name = "materials.sand.horizontal_conductivity"
distribution = "lognormal"
median = 10.0
ln_std_dev = 0.5
unit = "m/d"

[[uncertain.values]]
name = "materials.sand.porosity"
distribution = "uniform"
low = 0.2
high = 0.3

[[uncertain.correlations]]
between = ["materials.sand.horizontal_conductivity", "materials.sand.porosity"]
rank_correlation = 0.3
"""


def _write(tmp_path: Path, old: str = "", new: str = "") -> Path:
    assert not old or CASE.count(old) == 1, old
    path = tmp_path / "column.toml"
    path.write_text(CASE.replace(old, new) if old else CASE, encoding="utf-8")
    return path


@pytest.mark.parametrize(("old", "new", "args", "key"), [
    ('name = "materials.sand.porosity"', 'name = "materials.gravel.porosity"', [],
     "uncertain.values[materials.gravel.porosity].name"),
    ("ln_std_dev = 0.5", "ln_std_dev = -0.5", [],
     "uncertain.values[materials.sand.horizontal_conductivity].ln_std_dev"),
    ("low = 0.2", "low = 0.35", [], "uncertain.values[materials.sand.porosity].low"),
    ("rank_correlation = 0.3", "rank_correlation = -1.2", [],
     "uncertain.correlations[0].rank_correlation"),
    ("", "", ["--members", "1"], "--members"),
    ("", "", ["--workers", "0"], "--workers"),
], ids=["unknown-path", "negative-spread", "low-above-high", "correlation-range",
        "one-member", "no-workers"])
def test_bad_input_is_one_line_naming_the_key(tmp_path: Path, capsys: pytest.CaptureFixture,
                                              old: str, new: str, args: list[str],
                                              key: str):
    path = _write(tmp_path, old, new)
    members = [] if "--members" in args else ["--members", "4"]
    code = main(["ensemble", str(path), *members, *args, "--out", str(tmp_path / "out")])
    err = capsys.readouterr().err
    assert code == 2
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith(f"error: {key} = "), err
    assert not (tmp_path / "out").exists()  # nothing ran


def test_case_without_uncertain_section_is_refused(tmp_path: Path,
                                                   capsys: pytest.CaptureFixture):
    path = _write(tmp_path, CASE[CASE.index("[uncertain]"):], "")
    code = main(["ensemble", str(path), "--members", "3", "--out", str(tmp_path / "o")])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1 and err[0].startswith("error: uncertain = ")


def _fe3d(*args: str | Path, cwd: Path) -> subprocess.Popen[str]:
    env = {**os.environ, "PYTHONUTF8": "1", "NO_COLOR": "1", "COLUMNS": "200"}
    return subprocess.Popen([sys.executable, "-m", "fe3d.cli", *map(str, args)], cwd=cwd,
                            env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True, encoding="utf-8")


@pytest.mark.slow
def test_killed_study_resumes_with_only_the_missing_members(tmp_path: Path):
    """SIGKILL the driver once two members are saved; the same command again reuses every
    saved member, runs the rest, writes the tables and ends with the caution."""
    path = _write(tmp_path)
    out = tmp_path / "study"
    args = ("ensemble", path, "--members", "6", "--workers", "1", "--quiet", "--out", out)
    first = _fe3d(*args, cwd=tmp_path)
    deadline = time.monotonic() + 240
    while len(list((out / "members").glob("member_*.npz"))) < 2:
        assert first.poll() is None, first.communicate()
        assert time.monotonic() < deadline, "no member finished in 240 s"
        time.sleep(0.1)
    first.send_signal(signal.SIGKILL)
    first.communicate()
    saved = len(list((out / "members").glob("member_*.npz")))
    assert 2 <= saved < 6
    second = _fe3d(*args, cwd=tmp_path)
    stdout, stderr = second.communicate(timeout=300)
    assert second.returncode == 0, stderr
    text = " ".join(stdout.split())
    assert f"6 members finished ({saved} reused from an earlier start), 0 failed" in text
    assert " ".join(CAUTION.split()) in text
    for name in ("ensemble_exceedance.csv", "ensemble_percentiles.csv",
                 "ensemble_sensitivity.csv", "ensemble.md", "ensemble_exceedance.png",
                 "ensemble_draws.csv", "ensemble.json"):
        assert (out / name).is_file(), name
    assert len(list((out / "members").glob("member_*.npz"))) == 6
