"""Fuzzing of the case file and its data files (issue 15 part 6).

Hypothesis mutates the demo case (cases/demo: case.toml, boreholes.csv, tank_release.csv):
deleted lines, values replaced by wrong types, wrong or absurd units, out-of-range, non-finite
and huge values, unknown keys, broken TOML, and, in the data files, deleted rows, bad cells,
binary and oversized content, a folder, a FIFO or a link in the file's place. Every mutation
must give either a valid case or, from ``fe3d check`` run in-process, exit code 2 with error
lines only (one per problem, each ``key = value: what is allowed``, at most
MAX_ERROR_LINES + 1), no traceback, and nothing written.

A behaviour requirement of the issue, no outside reference. Derandomized, so every run tries
the same 320 mutations (250 of the case file, 70 of the data files).
"""

from __future__ import annotations

import contextlib
import io
import os
import re
import shutil
from pathlib import Path

import pytest
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st

from fe3d.case.data_files import MAX_DATA_FILE_BYTES
from fe3d.case.load import load_case
from fe3d.cli import EXIT_BAD_INPUT, main
from fe3d.errors import MAX_ERROR_LINES, CaseErrors

DEMO = Path(__file__).parents[2] / "cases" / "demo"
CASE_TEXT = (DEMO / "case.toml").read_text(encoding="utf-8")
CASE_LINES = CASE_TEXT.splitlines()
DATA_FILES = ("boreholes.csv", "tank_release.csv")
FILE_KEYS = {"boreholes.csv": "stratigraphy.borehole_file",
             "tank_release.csv": "sources[tank_leak].release_file"}
ERROR_LINE = re.compile(r"^error: \S.* = .*: .+$|^error: … and [\d,]+ more errors$")
_KEY_LINE = re.compile(r"^(\s*[A-Za-z_][\w.\-\"]*\s*=\s*)(.+)$")

SETTINGS = settings(derandomize=True, deadline=None, database=None, print_blob=True,
                    suppress_health_check=[HealthCheck.too_slow,
                                           HealthCheck.function_scoped_fixture])

# values a careless or hostile user might write, as TOML text
_UNITS = ["m", "m/d", "mm/yr", "kg/m^3", "mg/L", "L/kg", "yr", "d", "s", "m^2/s", "m^3/d",
          "deg", "parsec/fortnight", "furlong", "K", "", "m^-1", "1/d"]
_NUMBERS = ["0", "-1", "1e300", "-1e300", "1e-300", "5e-324", "1e308", "nan", "inf", "-inf",
            "1.0", "0.3", "12", "1e-9", "999999999999999999999"]
quantity = st.builds(lambda n, u: f'"{n} {u}"'.replace(' "', '"'),
                     st.sampled_from(_NUMBERS), st.sampled_from(_UNITS))
plain = st.sampled_from([*_NUMBERS, "true", "false", '""', '"x"', "[]", "{}", '["1 m"]',
                         '[["1 m", "2 m"]]', "{ a = 1 }", "1979-05-27", '"[/bold] $a^$"',
                         '"\\u0000"'])
odd_text = st.text(alphabet=st.characters(codec="utf-8", exclude_categories=["Cs"]),
                   max_size=40).map(lambda t: '"' + t.replace("\\", "\\\\").replace('"', '\\"')
                                    .replace("\n", "\\n").replace("\r", "\\r") + '"')
# huge values are drawn as a placeholder and expanded in the test (a drawn value is shown
# in hypothesis's report, which must stay small)
HUGE = {"@@huge_string@@": '"' + "x" * 200_000 + '"',
        "@@long_array@@": "[" + ", ".join(["1"] * 20_000) + "]",
        "@@deep_array@@": "[" * 40 + "]" * 40,
        "@@long_number@@": '"' + "9" * 5000 + ' m"'}
huge = st.sampled_from(sorted(HUGE))
value = st.one_of(quantity, plain, odd_text, huge)


def _value_lines() -> list[int]:
    return [i for i, ln in enumerate(CASE_LINES) if _KEY_LINE.match(ln)
            and not ln.lstrip().startswith("#")]


VALUE_LINES = _value_lines()
TABLE_LINES = [i for i, ln in enumerate(CASE_LINES) if ln.startswith("[")]


@st.composite
def case_mutation(draw: st.DrawFn) -> str:
    """The demo case text with one (or, one time in four, two) mutations."""
    lines = list(CASE_LINES)
    for _ in range(draw(st.sampled_from([1, 1, 1, 2]))):
        kind = draw(st.sampled_from(["value", "value", "value", "delete", "unknown", "table",
                                     "truncate", "garbage"]))
        if kind == "value":
            i = draw(st.sampled_from(VALUE_LINES))
            m = _KEY_LINE.match(lines[i]) if i < len(lines) else None
            if m is not None:
                lines[i] = m.group(1) + draw(value)
        elif kind == "delete":
            del lines[draw(st.integers(0, len(lines) - 1))]
        elif kind == "unknown":
            lines.insert(draw(st.sampled_from(TABLE_LINES)) + 1,
                         f"{draw(st.sampled_from(['colour', 'porosity_', 'x', 'zz']))} = "
                         f"{draw(value)}")
        elif kind == "table":
            name = draw(st.sampled_from(["materials.fen_sand", "time", "[wells]", "bogus",
                                         "species.solvent.kd", "output"]))
            lines.insert(draw(st.integers(0, len(lines))), f"[{name}]")
        elif kind == "truncate":
            text = "\n".join(lines)
            lines = text[:draw(st.integers(0, len(text)))].splitlines()
        else:
            lines.insert(draw(st.integers(0, len(lines))),
                         draw(st.sampled_from(["= 3", "[[", "a = \"open", "\x01\x02", "a.b.c",
                                               "x = 1\nx = 2", "title = 'again'"])))
    return "\n".join(lines) + "\n"


@pytest.fixture(scope="module")
def case_dir(tmp_path_factory: pytest.TempPathFactory) -> Path:
    folder = tmp_path_factory.mktemp("fuzz") / "case"
    shutil.copytree(DEMO, folder)
    return folder


def _listing(folder: Path) -> dict[str, tuple[int, int]]:
    return {str(p.relative_to(folder.parent)): (p.lstat().st_size, p.lstat().st_mtime_ns)
            for p in sorted(folder.parent.rglob("*"))} if folder.exists() else {}


def assert_valid_or_one_line_each(case_path: Path, *, names: str | None = None) -> str:
    """Valid, or exit 2 with error lines only (the first naming ``names``, when given);
    nothing written. Returns which."""
    before = _listing(case_path.parent)
    try:
        load_case(case_path)
    except CaseErrors:
        pass
    else:
        return "valid"
    err = io.StringIO()
    with contextlib.redirect_stderr(err), contextlib.redirect_stdout(io.StringIO()):
        code = main(["check", str(case_path)])
    lines = err.getvalue().splitlines()
    assert code == EXIT_BAD_INPUT, lines
    problems = [ln for ln in lines if not ln.startswith("WARNING")]
    assert 1 <= len(problems) <= MAX_ERROR_LINES + 1, problems
    for ln in problems:
        assert ERROR_LINE.match(ln), ln
        assert len(ln) < 2000, ln[:200]
    if names is not None:
        assert problems == [problems[0]] and problems[0].startswith(f"error: {names} = "), \
            problems
    assert _listing(case_path.parent) == before
    return "refused"


@settings(SETTINGS, max_examples=250)
@given(text=case_mutation())
def test_every_mutation_of_the_case_file_is_valid_or_one_line_each(case_dir: Path,
                                                                   text: str) -> None:
    path = case_dir / "mutated.toml"
    for token, expanded in HUGE.items():
        text = text.replace(token, expanded)
    path.write_text(text, encoding="utf-8")
    event(assert_valid_or_one_line_each(path))


def _csv_mutation(data: st.DataObject, text: str) -> str:
    rows = [r.split(",") for r in text.splitlines()]
    kind = data.draw(st.sampled_from(["cell", "cell", "delete", "add", "header", "quote"]))
    i = data.draw(st.integers(0, len(rows) - 1))
    if kind == "cell":
        j = data.draw(st.integers(0, len(rows[i]) - 1))
        rows[i][j] = data.draw(st.sampled_from([*_NUMBERS, "", "x", "1 m", "-", " ", "1,2", "ü",
                                                "a" * 500]))
    elif kind == "delete":
        del rows[i]
    elif kind == "add":
        rows.insert(i, data.draw(st.sampled_from([["1"], ["a", "b", "c", "d", "e", "f", "g",
                                                          "h", "i"], [], ["#"]])))
    elif kind == "header":
        rows[0] = data.draw(st.sampled_from([["time"], ["x", "y"], ["borehole", "x", "y"],
                                             ["time [d]", "mass_rate [g/d]"], ["a" * 300]]))
    else:
        rows[i] = ['"' + ",".join(rows[i])]
    return "\n".join(",".join(r) for r in rows) + "\n"


@settings(SETTINGS, max_examples=70)
@given(name=st.sampled_from(DATA_FILES),
       kind=st.sampled_from(["csv", "csv", "csv", "binary", "nul", "huge", "folder", "fifo",
                             "link", "empty"]),
       data=st.data())
def test_every_mutation_of_a_data_file_is_valid_or_one_line_each(
        tmp_path_factory: pytest.TempPathFactory, name: str, kind: str,
        data: st.DataObject) -> None:
    folder = tmp_path_factory.mktemp("fuzz_data") / "case"
    shutil.copytree(DEMO, folder)
    target = folder / name
    original = target.read_text(encoding="utf-8")
    target.unlink()
    if kind == "csv":
        target.write_text(_csv_mutation(data, original), encoding="utf-8")
    elif kind == "binary":
        target.write_bytes(data.draw(st.binary(min_size=1, max_size=200)) + b"\xff\xfe")
    elif kind == "nul":
        target.write_text(original[:40] + "\0" + original[40:], encoding="utf-8")
    elif kind == "huge":  # a sparse file: larger than the bound without writing it
        with target.open("wb") as fh:
            fh.truncate(MAX_DATA_FILE_BYTES + 1)
    elif kind == "folder":
        target.mkdir()
    elif kind == "fifo":
        os.mkfifo(target)
    elif kind == "link":
        outside = folder.parent / f"outside_{name}"
        outside.write_text(original, encoding="utf-8")
        target.symlink_to(outside)
    else:
        target.write_text("", encoding="utf-8")
    whole_file = kind in ("binary", "nul", "huge", "folder", "fifo", "link", "empty")
    outcome = assert_valid_or_one_line_each(folder / "case.toml",
                                            names=FILE_KEYS[name] if whole_file else None)
    assert outcome == "refused" or not whole_file, kind


def test_the_unmutated_demo_case_is_valid(case_dir: Path) -> None:
    """The fuzzers' starting point loads (otherwise every mutation would be refused)."""
    assert assert_valid_or_one_line_each(case_dir / "case.toml") == "valid"
