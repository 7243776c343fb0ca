"""Guards on what a case file may say (issue 15 part 3 and 5): hard bounds that refuse, usual
ranges that warn, non-finite numbers and deep nesting, the cap on error lines, where the run
folder named in the case may be, and the rules for data files (regular, bounded, UTF-8 text,
inside the case folder, content never echoed).

Sources of the ranges are named in fe3d/case/plausible.py beside each number; these tests
check behaviour (which value is refused or warned, and what the line says).
"""

from __future__ import annotations

import os
import shutil
from pathlib import Path

import pytest

from fe3d.case.data_files import MAX_CASE_FILE_BYTES, MAX_DATA_FILE_BYTES
from fe3d.case.load import load_case, parse_case
from fe3d.case.plausible import plausibility_warnings
from fe3d.errors import MAX_ERROR_LINES, CaseError, CaseErrors

ROOT = Path(__file__).parents[3]
TINY_TEXT = (ROOT / "cases" / "tiny" / "case.toml").read_text(encoding="utf-8")
DEMO = ROOT / "cases" / "demo"


def _lines(text: str, base_dir: Path | None = None) -> list[str]:
    with pytest.raises(CaseErrors) as info:
        parse_case(text, base_dir=base_dir)
    return [e.line() for e in info.value.errors]


def _edit(old: str, new: str, text: str = TINY_TEXT) -> str:
    assert old in text, old
    return text.replace(old, new, 1)


@pytest.mark.parametrize(("old", "new", "key"), [
    ('limit = "10 ug/L"', 'limit = "1e300 kg/m^3"', "species.tracer.limit"),
    ('kd = "0.1 L/kg"', 'kd = "1e300 L/kg"', "species.tracer.kd"),
    ('top = "5 m"', 'top = "1e300 m"', "box.top"),
    ('head = "4.6 m"', 'head = "1e300 m"', "fixed_heads[0].head"),
    ('concentration = "5 mg/L"', 'concentration = "1e300 mg/L"',
     "sources[drum_spill].concentration"),
    ('horizontal_conductivity = "10 m/d"', 'horizontal_conductivity = "12 parsec/fortnight"',
     "materials.sand.horizontal_conductivity"),
    ('horizontal_conductivity = "10 m/d"', 'horizontal_conductivity = "1e300 m/d"',
     "materials.sand.horizontal_conductivity"),
    ('bulk_density = "1600 kg/m^3"', 'bulk_density = "1.6 kg/m^3"', "materials.sand.bulk_density"),
    ("porosity = 0.3\n", "porosity = 1e-9\n", "materials.sand.porosity"),
    ("porosity = 0.3\n", "porosity = 1.0\n", "materials.sand.porosity"),
    ('transverse_dispersivity = "0.2 m"',
     'transverse_dispersivity = "0.2 m"\nconductivity_strike = "1e300 deg"',
     "materials.sand.conductivity_strike"),
    ('transverse_dispersivity = "0.2 m"',
     'transverse_dispersivity = "0.2 m"\ndiffusion_coefficient = "1 m^2/s"',
     "materials.sand.diffusion_coefficient"),
    ('end = "2 yr"', 'end = "1e300 yr"', "time.end"),
    ('bottom = "1 m"', 'bottom = "1 m"\nbottom_gradient = [nan, 0.0]',
     "layers[top_sand].bottom_gradient[0]"),
    ('bottom = "1 m"', 'bottom = "1 m"\nbottom_gradient = [1e300, 0.0]',
     "layers[top_sand].bottom_gradient[0]"),
    ("porosity = 0.3\n", "porosity = inf\n", "materials.sand.porosity"),
    ('[time]', '[solver]\ntolerance = nan\n\n[time]', "solver.tolerance"),
])
def test_values_beyond_a_bound_are_refused_in_one_line_naming_the_key(old, new, key):
    lines = _lines(_edit(old, new))
    assert len(lines) == 1, lines
    assert lines[0].startswith(f"{key} = "), lines


def test_usual_ranges_warn_without_refusing():
    """The demo case is inside every usual range; an unusual but possible value warns (one
    line with key, value, unit and range) and the case still loads."""
    assert plausibility_warnings(load_case(DEMO / "case.toml")) == []
    case = parse_case(_edit("porosity = 0.3\n", "porosity = 0.85\n"))
    warnings = plausibility_warnings(case)
    assert any(w.startswith("materials.sand.porosity = 0.85: outside the usual range 0.01–0.7")
               and "Freeze & Cherry 1979" in w for w in warnings), warnings
    swapped = parse_case(_edit('transverse_dispersivity = "0.2 m"',
                               'transverse_dispersivity = "3 m"'))
    assert any(w.startswith("materials.sand.transverse_dispersivity = 3 m: exceeds the "
                            "longitudinal one") for w in plausibility_warnings(swapped))


def test_load_case_logs_the_warnings(tmp_path, caplog):
    """fe3d check and fe3d run both read the case with load_case, which logs each warning."""
    path = tmp_path / "case.toml"
    path.write_text(_edit("[time]", '[[wells]]\nname = "w"\nx = "30 m"\ny = "10 m"\n'
                          'screens = [["4 m", "2 m"]]\nrate = "1e5 m^3/d"\n\n[time]'),
                    encoding="utf-8")
    with caplog.at_level("WARNING", logger="fe3d.case.load"):
        load_case(path)
    assert any(r.getMessage().startswith("wells[w].rate = 1e+05 m^3/d: outside the usual range")
               for r in caplog.records), caplog.text


def test_a_case_file_larger_than_its_bound_is_refused_before_reading(tmp_path):
    path = tmp_path / "case.toml"
    with path.open("wb") as fh:
        fh.truncate(MAX_CASE_FILE_BYTES + 1)  # sparse: nothing is written
    with pytest.raises(CaseErrors) as info:
        load_case(path)
    (err,) = info.value.errors
    assert err.line() == (f"case file = '{path}': holds {MAX_CASE_FILE_BYTES + 1:,} bytes; at "
                          "most 16 MiB is read")


def test_deep_nesting_is_one_line():
    text = TINY_TEXT + "\ndeep = " + "[" * 5000 + "]" * 5000 + "\n"
    (line,) = _lines(text)
    assert "nests arrays or tables too deeply" in line
    (line,) = _lines(TINY_TEXT.replace("[box]", "deep = " + "[" * 20 + "]" * 20 + "\n\n[box]"))
    assert line.startswith("deep") and "more than 12 deep" in line


def test_error_lines_are_capped_and_the_rest_counted():
    errors = CaseErrors([CaseError(f"materials.m{i}.porosity", 2.0, "must be in (0, 1]")
                         for i in range(200_000)])
    lines = errors.lines()
    assert len(lines) == MAX_ERROR_LINES + 1
    assert lines[-1] == f"… and {200_000 - MAX_ERROR_LINES:,} more errors"


def test_a_long_value_is_not_echoed_in_full():
    (line,) = _lines(_edit('title = "Tiny test box"', f'title = "{"x" * 2_000_000}"'))
    assert line.startswith("title = 'xxx") and len(line) < 500, line[:500]
    assert "(2,000,002 characters)" in line


def test_a_long_name_is_not_put_in_the_key_path():
    """Found by the fuzzer: a 200,000-character layer name was shown whole in
    ``layers[<name>]``; a name that is not a plain short word gives its index instead."""
    (line,) = _lines(_edit('name = "top_sand"', f'name = "{"x" * 100_000}"'))
    assert line.startswith("layers[0].name = 'xxx") and len(line) < 500, line[:500]


@pytest.mark.parametrize("folder", ["../elsewhere", "/tmp/run", "~/run", "a/../../b", ""])
def test_a_run_folder_named_in_the_case_stays_below_the_current_folder(folder):
    (line,) = _lines(_edit("[output]", f'[output]\nfolder = "{folder}"'))
    assert line.startswith("output.folder = ") and "--out" in line


def test_a_plain_relative_run_folder_is_accepted():
    assert parse_case(_edit("[output]", '[output]\nfolder = "runs/a"')).output.folder == "runs/a"


# --------------------------------------------------------------------------- data files


@pytest.fixture
def demo(tmp_path: Path) -> Path:
    folder = tmp_path / "case"
    shutil.copytree(DEMO, folder)
    return folder


def _file_line(folder: Path) -> str:
    with pytest.raises(CaseErrors) as info:
        load_case(folder / "case.toml")
    (err,) = info.value.errors
    return err.line()


def test_a_data_file_outside_the_case_folder_is_refused_unless_allowed(demo):
    shutil.move(demo / "boreholes.csv", demo.parent / "boreholes.csv")
    text = (demo / "case.toml").read_text(encoding="utf-8")
    (demo / "case.toml").write_text(text.replace('"boreholes.csv"', '"../boreholes.csv"'),
                                    encoding="utf-8")
    assert _file_line(demo).startswith("stratigraphy.borehole_file = '../boreholes.csv': lies "
                                       "outside the case folder")
    (demo / "case.toml").write_text(
        text.replace('"boreholes.csv"', '"../boreholes.csv"')
        + "\n[input]\nallow_outside_files = true\n", encoding="utf-8")
    assert load_case(demo / "case.toml").stratigraphy.boreholes


def test_a_data_file_reached_through_a_link_is_refused(demo):
    real = demo.parent / "real.csv"
    shutil.move(demo / "tank_release.csv", real)
    (demo / "tank_release.csv").symlink_to(real)
    assert _file_line(demo).startswith("sources[tank_leak].release_file = 'tank_release.csv': "
                                       "is reached through a symbolic link")


@pytest.mark.parametrize("kind", ["folder", "fifo", "device"])
def test_a_data_file_must_be_a_regular_file(demo, kind):
    target = demo / "tank_release.csv"
    target.unlink()
    if kind == "folder":
        target.mkdir()
    elif kind == "fifo":
        os.mkfifo(target)
    else:
        text = (demo / "case.toml").read_text(encoding="utf-8")
        (demo / "case.toml").write_text(
            text.replace('"tank_release.csv"', '"/dev/zero"')
            + "\n[input]\nallow_outside_files = true\n", encoding="utf-8")
    line = _file_line(demo)
    assert "must be a regular file, not a" in line, line


def test_a_data_file_larger_than_the_bound_is_refused_before_reading(demo):
    with (demo / "boreholes.csv").open("r+b") as fh:
        fh.truncate(MAX_DATA_FILE_BYTES + 1)  # sparse: nothing is written
    assert "at most 64 MiB is read" in _file_line(demo)


def test_binary_content_names_the_line_but_not_the_content(demo):
    good = (demo / "tank_release.csv").read_bytes().splitlines(keepends=True)
    (demo / "tank_release.csv").write_bytes(b"".join(good[:3]) + b"\xff\xfesecret\n")
    line = _file_line(demo)
    assert line.startswith("sources[tank_leak].release_file = 'tank_release.csv': is not UTF-8 "
                           "text (line 4)"), line
    assert "secret" not in line


def test_content_of_a_data_file_is_not_quoted(demo):
    """The issue saw a line of a system file in an error message."""
    (demo / "boreholes.csv").write_text("root:x:0:0:root:/root:/bin/bash\nbin:x:1:1\n",
                                        encoding="utf-8")
    line = _file_line(demo)
    assert line.startswith("stratigraphy.borehole_file = 'boreholes.csv': must start with")
    assert "root" not in line and "/bin" not in line, line


@pytest.mark.parametrize(("name", "content", "what"), [
    ("k.vtu", b"\x00\x01garbage", "is not a VTK XML file"),
    ("k.vtk", b"<VTKFile>", "is not a legacy VTK file"),
])
def test_a_cell_field_file_that_is_not_its_format_is_one_line(tmp_path, name, content, what):
    """meshio exits the process (SystemExit 1) on some files it cannot read; the load refuses
    them first by their first bytes."""
    (tmp_path / name).write_bytes(content)
    text = _edit('transverse_dispersivity = "0.2 m"',
                 f'transverse_dispersivity = "0.2 m"\nconductivity_file = "{name}"')
    (line,) = _lines(text, base_dir=tmp_path)
    assert line.startswith(f"materials.sand.conductivity_file = '{name}': {what}"), line
