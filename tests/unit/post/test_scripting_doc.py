"""docs/scripting.md's Python blocks run as written, one after another, in a fresh folder
holding a copy of the tiny case (the check is that the documented calls work and say what
the page says they do; the numbers are checked in test_handover and test_compare)."""

from __future__ import annotations

import re
import shutil
from pathlib import Path

import pytest

ROOT = Path(__file__).parents[3]
DOC = ROOT / "docs" / "scripting.md"


@pytest.mark.slow
def test_the_scripting_page_runs(tmp_path, monkeypatch, capsys):
    """Every ```python block, in order, in one namespace."""
    blocks = re.findall(r"```python\n(.*?)```", DOC.read_text(encoding="utf-8"), flags=re.S)
    assert len(blocks) >= 5
    shutil.copytree(ROOT / "cases" / "tiny", tmp_path / "cases" / "tiny")
    monkeypatch.chdir(tmp_path)
    namespace: dict[str, object] = {}
    for block in blocks:
        exec(compile(block, str(DOC), "exec"), namespace)  # our own page, not user input
    out = capsys.readouterr().out.splitlines()
    assert out[:2] == ["5.0", "2.0"]  # the half-lives the page names, in years
    assert (tmp_path / "runs" / "half_life_compared" / "comparison.md").is_file()
    assert (tmp_path / "runs" / "half_life_2yr" / "report.html").is_file()
