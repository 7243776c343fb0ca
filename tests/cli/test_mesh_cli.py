"""``fe3d mesh CASE [--out DIR]`` run as a separate process, and mesh reuse by ``fe3d run``.

Expected values: the tiny case is a 60 m × 20 m box with top_sand from 5 m to 1 m and
silt_base from 1 m to -1 m, so the unit volumes are 4800 m³ and 2400 m³ (length × width ×
thickness, exact by construction). Reuse is checked with a marker key written into the
cached ``mesh.json``: the reader ignores unknown keys, so the marker is carried only when the
cached files are reused (copied), never when the mesh is rebuilt.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]
TINY_TEXT = (ROOT / "cases" / "tiny" / "case.toml").read_text(encoding="utf-8")
MESH_FILES = {"mesh.msh", "mesh.vtu", "mesh.npz", "mesh.json"}


def fe3d(*args: str | Path, cwd: Path) -> subprocess.CompletedProcess[str]:
    env = {**os.environ, "PYTHONUTF8": "1", "NO_COLOR": "1", "COLUMNS": "200"}
    return subprocess.run(
        [sys.executable, "-m", "fe3d.cli", *map(str, args)], cwd=cwd, env=env,
        capture_output=True, text=True, encoding="utf-8", timeout=300, check=False,
    )


def tiny_copy(folder: Path, text: str = TINY_TEXT, name: str = "pellet.toml") -> Path:
    path = folder / name
    path.write_text(text, encoding="utf-8")
    return path


def mark(mesh_folder: Path) -> None:
    """Add a marker key to a cached mesh.json (ignored by the reader)."""
    meta_path = mesh_folder / "mesh.json"
    meta = json.loads(meta_path.read_text(encoding="utf-8"))
    meta["test_marker"] = "cached"
    meta_path.write_text(json.dumps(meta), encoding="utf-8")


def marked(folder: Path) -> bool:
    return json.loads((folder / "mesh.json").read_text(encoding="utf-8")).get(
        "test_marker") == "cached"


def test_mesh_help(tmp_path: Path) -> None:
    res = fe3d("mesh", "--help", cwd=tmp_path)
    assert res.returncode == 0, res.stderr
    assert "usage: fe3d mesh" in res.stdout
    assert "--out" in res.stdout


def test_mesh_writes_files_and_reports_quality_with_units(tmp_path: Path) -> None:
    case = tiny_copy(tmp_path)
    res = fe3d("mesh", case, cwd=tmp_path)
    assert res.returncode == 0, res.stderr
    folder = tmp_path / "meshes" / "pellet"  # default: meshes/<case file name>
    assert {p.name for p in folder.iterdir()} >= MESH_FILES
    out = res.stdout
    assert "mesh built in meshes/pellet/" in out
    assert "volume of top_sand: 4800 m³" in out
    assert "volume of silt_base: 2400 m³" in out
    assert "tetrahedra" in out and "nodes" in out
    assert "dihedral angle: min " in out and "°" in out
    assert "worst aspect ratio" in out and " m, z=" in out
    assert "faces: south (" in out and "top (" in out
    assert "wrote mesh.msh, mesh.vtu, mesh.npz, mesh.json" in out
    meta = json.loads((folder / "mesh.json").read_text(encoding="utf-8"))
    assert len(meta["mesh_inputs_sha256"]) == 64
    assert meta["units"] == ["top_sand", "silt_base"]
    assert res.stderr == ""
    again = fe3d("mesh", case, cwd=tmp_path)
    assert again.returncode == 0, again.stderr
    assert "mesh reused (inputs unchanged) in meshes/pellet/" in again.stdout


def test_mesh_out_folder(tmp_path: Path) -> None:
    res = fe3d("mesh", tiny_copy(tmp_path), "--out", tmp_path / "elsewhere", cwd=tmp_path)
    assert res.returncode == 0, res.stderr
    assert {p.name for p in (tmp_path / "elsewhere").iterdir()} >= MESH_FILES
    assert not (tmp_path / "meshes").exists()


@pytest.mark.parametrize(("old", "new", "start"), [
    ('cell_size = "8 m"', 'cell_size = "-8 m"', "error: mesh.cell_size = '-8 m': "),
    ('[mesh]\n', '[mesh]\nimport_file = "nowhere.msh"\n', "error: mesh.import_file = '"),
    ('[mesh]\n', '[mesh]\nimport_file = "junk.msh"\n', "error: mesh.import_file = '"),
], ids=["negative-size", "missing-import", "unreadable-import"])
def test_mesh_bad_case_one_line_exit_2(tmp_path: Path, old: str, new: str, start: str) -> None:
    assert TINY_TEXT.count(old) == 1
    (tmp_path / "junk.msh").write_text("not a mesh\n", encoding="utf-8")
    res = fe3d("mesh", tiny_copy(tmp_path, TINY_TEXT.replace(old, new)), cwd=tmp_path)
    assert res.returncode == 2
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1, res.stderr
    assert lines[0].startswith(start), lines[0]
    assert "Traceback" not in res.stderr
    assert not (tmp_path / "meshes" / "pellet" / "mesh.npz").exists()


def test_run_reuses_the_mesh_of_fe3d_mesh(tmp_path: Path) -> None:
    """`fe3d mesh` then `fe3d run` into the same folder, and into a separate run folder (the
    mesh is found at meshes/<case name>/ and copied in); a mesh-input change rebuilds."""
    case = tiny_copy(tmp_path)
    assert fe3d("mesh", case, "--out", tmp_path / "same", cwd=tmp_path).returncode == 0
    assert fe3d("mesh", case, cwd=tmp_path).returncode == 0
    mark(tmp_path / "same")
    mark(tmp_path / "meshes" / "pellet")
    res = fe3d("run", case, "--out", tmp_path / "same", "--quiet", "--overwrite", cwd=tmp_path)
    assert res.returncode == 0, res.stderr
    assert marked(tmp_path / "same")
    run = tmp_path / "runs" / "separate"
    res = fe3d("run", case, "--out", run, "--quiet", cwd=tmp_path)
    assert res.returncode == 0, res.stderr
    assert marked(run)  # copied from meshes/pellet
    assert (run / "mesh.npz").read_bytes() == \
        (tmp_path / "meshes" / "pellet" / "mesh.npz").read_bytes()
    assert {"mesh.npz", "results.vtkhdf", "summary.json"} <= {p.name for p in run.iterdir()}
    # a changed mesh input: neither cached mesh matches, the run builds its own
    finer = tiny_copy(tmp_path, TINY_TEXT.replace('cell_size = "8 m"', 'cell_size = "7 m"'))
    rebuilt = tmp_path / "runs" / "finer"
    res = fe3d("run", finer, "--out", rebuilt, "--quiet", cwd=tmp_path)
    assert res.returncode == 0, res.stderr
    assert not marked(rebuilt)
    assert marked(tmp_path / "meshes" / "pellet")  # the mesh folder is left as it was
