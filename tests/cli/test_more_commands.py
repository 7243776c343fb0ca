"""``fe3d long-term``, ``fe3d report``, ``fe3d compare``, ``--overwrite`` and Ctrl-C from the
command line (issues 13 and 15): exit codes, one line for a failure, the caution, the files.
Behaviour requirements of the issues; the physics behind each command is verified in
tests/verification/test_steady_plume.py, tests/unit/post/test_handover.py and
tests/unit/post/test_compare.py."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from fe3d.post.report import CAUTION

ROOT = Path(__file__).resolve().parents[2]
TINY_TEXT = (ROOT / "cases" / "tiny" / "case.toml").read_text(encoding="utf-8")


def fe3d(*args: str | Path, cwd: Path) -> subprocess.CompletedProcess[str]:
    env = {**os.environ, "PYTHONUTF8": "1", "NO_COLOR": "1", "COLUMNS": "200"}
    return subprocess.run([sys.executable, "-m", "fe3d.cli", *map(str, args)], cwd=cwd,
                          env=env, capture_output=True, text=True, encoding="utf-8",
                          timeout=600, check=False)


def flat(text: str) -> str:
    return " ".join(text.split())


@pytest.fixture(scope="module")
def tiny_case(tmp_path_factory: pytest.TempPathFactory) -> Path:
    folder = tmp_path_factory.mktemp("cases")
    path = folder / "pellet.toml"
    path.write_text(TINY_TEXT, encoding="utf-8")
    return path


@pytest.mark.slow
def test_run_refuses_a_second_run_without_overwrite_then_report_and_compare(
        tiny_case: Path, tmp_path: Path) -> None:
    out = tmp_path / "run"
    assert fe3d("run", tiny_case, "--out", out, "--quiet", cwd=tmp_path).returncode == 0
    again = fe3d("run", tiny_case, "--out", out, "--quiet", cwd=tmp_path)
    assert again.returncode == 2
    assert again.stderr.strip().splitlines() == [
        f"error: --out = '{out}': holds an earlier run; give --overwrite to replace it as a "
        "whole"]
    res = fe3d("run", tiny_case, "--out", out, "--quiet", "--overwrite", cwd=tmp_path)
    assert res.returncode == 0, res.stderr
    assert json.loads((out / "run.json").read_text(encoding="utf-8"))["state"] == "finished"
    into_case = fe3d("run", tiny_case, "--out", tiny_case.parent, "--quiet", cwd=tmp_path)
    assert into_case.returncode == 2 and "holds the input file pellet.toml" in into_case.stderr
    (out / "report.html").unlink()
    rep = fe3d("report", out, cwd=tmp_path)
    assert rep.returncode == 0, rep.stderr
    assert (out / "report.html").is_file() and flat(CAUTION) in flat(rep.stdout)
    cmp = fe3d("compare", out, out, "--labels", "a,b", "--out", tmp_path / "cmp",
               cwd=tmp_path)
    assert cmp.returncode == 0, cmp.stderr
    assert (tmp_path / "cmp" / "comparison.csv").is_file()
    bad = fe3d("report", tmp_path / "nowhere", cwd=tmp_path)
    assert bad.returncode == 2 and len(bad.stderr.strip().splitlines()) == 1


@pytest.mark.slow
def test_long_term_plume_of_a_continuous_source(tiny_case: Path, tmp_path: Path) -> None:
    """The tiny case's spill without its stop time runs for ever: a long-term plume."""
    case = tmp_path / "forever.toml"
    assert TINY_TEXT.count('stop = "200 d"\n') == 1
    case.write_text(TINY_TEXT.replace('stop = "200 d"\n', ""), encoding="utf-8")
    res = fe3d("long-term", case, "--out", tmp_path / "lt", cwd=tmp_path)
    assert res.returncode == 0, res.stderr
    assert "tracer: above the limit" in flat(res.stdout)
    assert flat(CAUTION) in flat(res.stdout)
    written = {p.name for p in (tmp_path / "lt").iterdir()}
    assert {"steady_plume.vtu", "steady_plume.csv"} <= written
    stopped = fe3d("long-term", tiny_case, "--out", tmp_path / "lt2", cwd=tmp_path)
    assert stopped.returncode == 0 and "no long-term plume" in flat(stopped.stdout)


def test_ctrl_c_is_one_line_and_exit_130(tiny_case: Path, tmp_path: Path,
                                         monkeypatch: pytest.MonkeyPatch,
                                         capsys: pytest.CaptureFixture[str]) -> None:
    import fe3d.pipeline
    from fe3d.cli import main

    def interrupted(*_args: object, **_kwargs: object) -> None:
        raise KeyboardInterrupt

    monkeypatch.setattr(fe3d.pipeline, "run_case", interrupted)
    code = main(["run", str(tiny_case), "--out", str(tmp_path / "run"), "--quiet"])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 130
    assert len(err) == 1 and err[0].startswith("interrupted:")
