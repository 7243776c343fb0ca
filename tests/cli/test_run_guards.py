"""What fe3d does with a user_reactions module, a folder it cannot write and a full disk
(issue 15 parts 4 and 5): one line and a distinct exit code, and no run folder left without
its state. Behaviour requirements of the issue, no outside reference.
"""

from __future__ import annotations

import contextlib
import errno
import io
import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from fe3d.cli import EXIT_BAD_INPUT, EXIT_CANNOT_WRITE, EXIT_CODE_STOPPED, main
from fe3d.post.run_place import MANIFEST, remove_stale_folders

ROOT = Path(__file__).parents[2]
TINY_TEXT = (ROOT / "cases" / "tiny" / "case.toml").read_text(encoding="utf-8")
RATES = '''
import numpy as np
{head}
def rates(c):
    return -1e-8 * c, -1e-8 * np.ones_like(c)
'''


def _cli(*args: str | Path) -> tuple[int, str, str]:
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = main([str(a) for a in args])
    return code, out.getvalue(), err.getvalue()


def _case_with_rates(folder: Path, module: str, head: str) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    (folder / f"{module}.py").write_text(RATES.format(head=head), encoding="utf-8")
    path = folder / "case.toml"
    path.write_text(TINY_TEXT + f'\n[user_reactions]\nfunction = "{module}:rates"\n'
                    'species = ["tracer"]\n', encoding="utf-8")
    return path


def test_check_imports_a_user_module_only_when_asked(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    marker = tmp_path / "imported.txt"
    path = _case_with_rates(tmp_path / "case", "rates_marker_h1",
                            f"open({str(marker)!r}, 'w').close()")
    code, out, _ = _cli("check", path)
    assert code == 0
    assert "user_reactions module rates_marker_h1:rates: NOT imported" in out
    assert not marker.exists()
    code, out, _ = _cli("check", path, "--run-user-code")
    assert code == 0
    assert "imported and tried" in out
    assert marker.exists()


@pytest.mark.parametrize(("module", "head", "allowed"), [
    ("rates_exit_h1", "import sys\nsys.exit(0)", "the module called sys.exit(0)"),
    ("rates_raise_h1", "raise RuntimeError('site rates broken')",
     "cannot be imported (RuntimeError: site rates broken)"),
])
def test_a_user_module_that_exits_or_raises_is_one_line_and_exit_2(tmp_path, monkeypatch,
                                                                    module, head, allowed):
    monkeypatch.chdir(tmp_path)
    path = _case_with_rates(tmp_path / "case", module, head)
    code, _, err = _cli("check", path, "--run-user-code")
    assert code == EXIT_BAD_INPUT
    (line,) = err.splitlines()
    assert line.startswith(f"error: user_reactions.function = '{module}:rates': ")
    assert allowed in line, line


def test_check_prints_a_warning_line_and_still_passes(tmp_path):
    """An unusual value warns on standard error (one line: key, value, usual range, source)
    and the case is still valid."""
    path = tmp_path / "case.toml"
    path.write_text(TINY_TEXT.replace("porosity = 0.3\n", "porosity = 0.85\n", 1),
                    encoding="utf-8")
    res = subprocess.run([sys.executable, "-m", "fe3d.cli", "check", str(path)], cwd=tmp_path,
                         capture_output=True, text=True, timeout=600, check=False)
    assert res.returncode == 0, res.stderr[-2000:]
    warnings = [ln for ln in res.stderr.splitlines() if "materials.sand.porosity" in ln]
    assert len(warnings) == 1, res.stderr
    assert warnings[0].startswith("WARNING fe3d.case.load: materials.sand.porosity = 0.85: "
                                  "outside the usual range 0.01–0.7 (Freeze & Cherry 1979")
    assert "case is valid" in res.stdout


def _tiny(tmp_path: Path) -> Path:
    path = tmp_path / "case" / "case.toml"
    path.parent.mkdir()
    path.write_text(TINY_TEXT, encoding="utf-8")
    return path


@pytest.mark.skipif(os.geteuid() == 0, reason="root writes into read-only folders")
def test_a_read_only_folder_is_one_line_and_nothing_is_written(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    case = _tiny(tmp_path)
    locked = tmp_path / "locked"
    locked.mkdir()
    locked.chmod(0o555)
    try:
        code, _, err = _cli("run", case, "--out", locked / "run", "--quiet")
    finally:
        locked.chmod(0o755)
    assert code == EXIT_CANNOT_WRITE
    assert len(err.strip().splitlines()) == 1 and "Permission denied" in err
    assert list(locked.iterdir()) == []


def test_a_folder_that_cannot_be_made_is_one_line(tmp_path, monkeypatch):
    """The same path as a read-only folder, simulated (root ignores permissions)."""
    monkeypatch.chdir(tmp_path)
    case = _tiny(tmp_path)

    def refuse(out_dir: Path) -> Path:
        raise PermissionError(errno.EACCES, os.strerror(errno.EACCES), str(out_dir.parent))

    monkeypatch.setattr("fe3d.pipeline.work_folder", refuse)
    code, _, err = _cli("run", case, "--out", tmp_path / "run", "--quiet")
    assert code == EXIT_CANNOT_WRITE
    (line,) = err.splitlines()
    assert line.startswith(f"error: cannot write or read {tmp_path}: Permission denied")
    assert not (tmp_path / "run").exists()


def _disk_full(path: Path, *_: object) -> None:
    raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(path))


def test_a_full_disk_during_the_run_leaves_a_folder_marked_failed(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    case = _tiny(tmp_path)
    monkeypatch.setattr("fe3d.post.vtk.write_atomic", _disk_full)
    code, _, err = _cli("run", case, "--out", tmp_path / "run", "--quiet")
    assert code == EXIT_CANNOT_WRITE
    (line,) = err.splitlines()
    assert "No space left on device" in line
    manifest = json.loads((tmp_path / "run" / MANIFEST).read_text(encoding="utf-8"))
    assert manifest["state"] == "failed"
    assert "No space left on device" in manifest["detail"]


def test_a_disk_too_full_for_the_manifest_keeps_the_earlier_run(tmp_path, monkeypatch):
    """Not even run.json can be written: the earlier run stays as it was, and the hidden
    work folder left beside it is removed by the next run once its process has ended."""
    monkeypatch.chdir(tmp_path)
    case = _tiny(tmp_path)
    earlier = tmp_path / "run"
    earlier.mkdir()
    (earlier / MANIFEST).write_text('{"state": "finished"}\n', encoding="utf-8")
    monkeypatch.setattr("fe3d.post.vtk.write_atomic", _disk_full)
    monkeypatch.setattr("fe3d.post.run_place.write_text_atomic", _disk_full)
    code, _, err = _cli("run", case, "--out", earlier, "--quiet", "--overwrite")
    assert code == EXIT_CANNOT_WRITE
    assert len(err.splitlines()) == 1
    assert [p.name for p in earlier.iterdir()] == [MANIFEST]
    assert json.loads((earlier / MANIFEST).read_text(encoding="utf-8"))["state"] == "finished"
    left = tmp_path / f".run.running-{os.getpid()}"
    assert left.is_dir()
    ended = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"],
                           capture_output=True, text=True, check=True)
    stale = tmp_path / f".run.running-{int(ended.stdout)}"
    left.rename(stale)
    assert remove_stale_folders(earlier) == [stale]
    assert not stale.exists()


def test_code_that_calls_sys_exit_during_a_run_is_one_line_and_exit_70(tmp_path, monkeypatch):
    """A library that calls sys.exit (meshio does on a file it cannot read) must not end fe3d
    silently with that code: one line, exit 70, and run.json says failed."""
    monkeypatch.chdir(tmp_path)
    case = _tiny(tmp_path)

    def exits(*_: object) -> None:
        raise SystemExit(0)

    monkeypatch.setattr("fe3d.post.vtk.write_atomic", exits)
    code, _, err = _cli("run", case, "--out", tmp_path / "run", "--quiet")
    assert code == EXIT_CODE_STOPPED
    (line,) = err.splitlines()
    assert line.startswith("error: code run by fe3d called sys.exit(0)")
    manifest = json.loads((tmp_path / "run" / MANIFEST).read_text(encoding="utf-8"))
    assert manifest["state"] == "failed"


FSIZE_RUN = """
import resource, signal, sys
signal.signal(signal.SIGXFSZ, signal.SIG_IGN)   # a write beyond the limit fails with EFBIG
resource.setrlimit(resource.RLIMIT_FSIZE, (64_000, 64_000))
from fe3d.cli import main
sys.exit(main(sys.argv[1:]))
"""


@pytest.mark.skipif(sys.platform != "linux", reason="RLIMIT_FSIZE as on Linux")
def test_a_real_write_limit_is_one_line_and_a_folder_marked_failed(tmp_path):
    """Real failing writes (no monkeypatch): files are limited to 64 kB in a child process,
    so the run's larger files cannot be written while run.json (a few kB) can."""
    case = _tiny(tmp_path)
    res = subprocess.run([sys.executable, "-c", FSIZE_RUN, "run", str(case), "--out",
                          str(tmp_path / "run"), "--quiet"], capture_output=True, text=True,
                         cwd=tmp_path, timeout=600, check=False)
    assert res.returncode == EXIT_CANNOT_WRITE, res.stderr[-2000:]
    lines = [ln for ln in res.stderr.splitlines() if not ln.startswith("WARNING")]
    assert len(lines) == 1 and "File too large" in lines[0], res.stderr[-2000:]
    manifest = json.loads((tmp_path / "run" / MANIFEST).read_text(encoding="utf-8"))
    assert manifest["state"] == "failed"
