"""``fe3d check`` applies the rules that depend on the mesh (issue 11, part 7): a case that
would fail in ``fe3d run`` fails in ``fe3d check`` with one line per problem and exit code 2.
Behaviour requirements of the issue, no outside reference (common practice, no source)."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from fe3d.case.load import parse_case
from fe3d.case.parts import FlowInputs
from fe3d.cli import main
from fe3d.errors import CaseError
from fe3d.flow.site_rules import mesh_rule_problems
from fe3d.flow.solve import solve_flow
from fe3d.mesh.build import build_mesh

ROOT = Path(__file__).resolve().parents[2]
TINY_TEXT = (ROOT / "cases" / "tiny" / "case.toml").read_text(encoding="utf-8")
# the tiny case: top 5 m, 1 m cell layers, so the top cells end at 4 m; levels at whole metres
LOW_STREAM = ('[[head_dependent]]\nname = "brook"\nkind = "stream"\nstage = "3.5 m"\n'
              'leakance = "1 d^-1"\nzone = [["40 m", "0 m"], ["60 m", "0 m"], ["60 m", "20 m"],'
              ' ["40 m", "20 m"]]\n')


def _check(tmp_path: Path, text: str, capsys: pytest.CaptureFixture[str],
           monkeypatch: pytest.MonkeyPatch) -> tuple[int, list[str]]:
    monkeypatch.chdir(tmp_path)
    path = tmp_path / "pellet.toml"
    path.write_text(text, encoding="utf-8")
    code = main(["check", str(path)])
    err = capsys.readouterr().err
    return code, [line for line in err.splitlines() if line.startswith("error:")]


def test_check_reports_every_mesh_rule_one_line_each(tmp_path, capsys, monkeypatch):
    """(A thin source box was the second rule here; boxes now get cell levels through their
    top and base, theory.md M5, so a thin box always holds nodes.)"""
    code, lines = _check(tmp_path, TINY_TEXT + LOW_STREAM, capsys, monkeypatch)
    assert code == 2
    assert lines == [
        "error: head_dependent[brook].stage = '3.5 m': must not lie below the bottom of the "
        "top cells under the zone (4 m)"]
    assert [p.name for p in tmp_path.iterdir()] == ["pellet.toml"]  # check writes nothing


def test_check_passes_the_tiny_case_and_the_run_rule_agrees(tmp_path, capsys, monkeypatch):
    code, lines = _check(tmp_path, TINY_TEXT, capsys, monkeypatch)
    assert (code, lines) == (0, [])
    case = parse_case(TINY_TEXT + LOW_STREAM)
    with pytest.raises(CaseError, match=r"head_dependent\[brook\]\.stage = '3\.5 m'"):
        # the run stops on the rule check reports
        solve_flow(build_mesh(case), FlowInputs.of(case))


def test_observation_screen_below_the_mesh_is_reported(tmp_path):
    """A screen reaching below the model's base names its key. The parser refuses that for a
    box case, so the case is changed after validation to reach the mesh rule alone."""
    text = TINY_TEXT.replace('screen = ["4.5 m", "1.5 m"]', 'screen = ["4.5 m", "-0.5 m"]')
    case = parse_case(text)
    site = build_mesh(case)
    assert mesh_rule_problems(case, site) == []
    moved = case.model_copy(update={"observation_points": [
        o.model_copy(update={"screen": (4.5, -1.5)}) if o.screen else o
        for o in case.observation_points]})
    (problem,) = mesh_rule_problems(moved, site)
    assert problem.line().startswith("observation_points[fence_well].screen = [4.5, -1.5]: "
                                     "must lie inside the model's mesh at x = 50 m")


def test_check_applies_the_rules_to_the_corridor_mesh_a_run_builds(tmp_path, capsys,
                                                                    monkeypatch):
    """With 2.5 m cell layers the mesh as written has its top cells down to 3 m, so a stream
    stage of 3.5 m passes there; the plume corridor refines the sand's cell layers (top cells
    ending higher up), and the run would refuse the stage on that mesh. ``check`` must
    refuse it too, naming the corridor mesh's floor."""
    text = TINY_TEXT.replace('layer_cell_thickness = "1 m"', 'layer_cell_thickness = "2.5 m"')
    # the spill box through the whole sand: no cell level of its own (theory.md M5)
    text = text.replace('z = ["2 m", "4 m"]', 'z = ["2 m", "5 m"]')
    assert text.count('"2.5 m"') == 1 and 'z = ["2 m", "5 m"]' in text
    case = parse_case(text + LOW_STREAM)
    assert mesh_rule_problems(case, build_mesh(case)) == []  # the mesh as written passes
    code, lines = _check(tmp_path, text + LOW_STREAM, capsys, monkeypatch)
    assert code == 2
    assert len(lines) == 1, lines
    found = re.fullmatch(r"error: head_dependent\[brook\]\.stage = '3\.5 m': must not lie "
                         r"below the bottom of the top cells under the zone \(([\d.]+) m\)",
                         lines[0])
    assert found is not None, lines
    assert float(found.group(1)) > 3.5
    assert [p.name for p in tmp_path.iterdir()] == ["pellet.toml"]  # check writes nothing
