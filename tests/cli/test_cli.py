"""The ``fe3d`` command run as a separate process: help, check, bad input, and a full tiny run.

Bad input must give exit code 2, one ``error: `` line per problem naming the key path, and no
traceback; nothing already in the run folder may be lost.
"""

from __future__ import annotations

import csv
import json
import os
import re
import subprocess
import sys
import xml.etree.ElementTree as ET
from pathlib import Path

import pytest

from fe3d.post.report import CAUTION

ROOT = Path(__file__).resolve().parents[2]
TINY = ROOT / "cases" / "tiny" / "case.toml"
TINY_TEXT = TINY.read_text(encoding="utf-8")
DAY = 86_400.0


def fe3d(*args: str | Path, cwd: Path) -> subprocess.CompletedProcess[str]:
    env = {**os.environ, "PYTHONUTF8": "1", "NO_COLOR": "1", "COLUMNS": "100"}
    return subprocess.run(
        [sys.executable, "-m", "fe3d.cli", *map(str, args)], cwd=cwd, env=env,
        capture_output=True, text=True, encoding="utf-8", timeout=300, check=False,
    )


def flat(text: str) -> str:
    """Collapse whitespace (rich wraps long lines to the console width)."""
    return " ".join(text.split())


def edit(old: str, new: str) -> str:
    assert TINY_TEXT.count(old) == 1, f"tiny case no longer has exactly one {old!r}"
    return TINY_TEXT.replace(old, new)


# ------------------------------------------------------------------------------------- help


@pytest.mark.parametrize(("args", "expected"), [
    (["--help"], ["usage: fe3d", "check", "run"]),
    (["check", "--help"], ["usage: fe3d check", "case file (TOML)"]),
    (["run", "--help"], ["usage: fe3d run", "--out", "--quiet"]),
], ids=["top", "check", "run"])
def test_help(args: list[str], expected: list[str], tmp_path: Path) -> None:
    res = fe3d(*args, cwd=tmp_path)
    assert res.returncode == 0, res.stderr
    for word in expected:
        assert word in res.stdout
    assert res.stderr == ""


def test_no_command_is_a_usage_error(tmp_path: Path) -> None:
    res = fe3d(cwd=tmp_path)
    assert res.returncode == 2
    assert "usage: fe3d" in res.stderr
    assert "Traceback" not in res.stderr


# ------------------------------------------------------------------------------------ check


def test_check_tiny_case(tmp_path: Path) -> None:
    res = fe3d("check", TINY, cwd=tmp_path)
    assert res.returncode == 0, res.stderr
    out = flat(res.stdout)
    assert "case is valid" in out
    assert flat(CAUTION) in out
    # 10 ug/L shown in the case's output unit mg/L; 5 yr = 1826.25 d (Julian year, see pint)
    assert "species tracer: limit 0.01 mg/L, half-life 1826 d" in out
    assert "Traceback" not in res.stderr
    assert list(tmp_path.iterdir()) == [], "check must write nothing"


def test_check_a_case_without_a_time_step(tmp_path: Path) -> None:
    """Without time.step the steps follow the plume (theory.md T14b): check says so."""
    case = tmp_path / "case.toml"
    case.write_text(edit('step = "20 d"\n', ""), encoding="utf-8")
    res = fe3d("check", case, cwd=tmp_path)
    assert res.returncode == 0, res.stderr
    assert "steps following the plume (Courant ≤ 1 in its cells)" in flat(res.stdout)


# --------------------------------------------------------------------------------- bad input

# (id, case text, key path expected at the start of an error line)
BAD_FILES = [
    ("porosity_above_one", edit("porosity = 0.3\n", "porosity = 1.4\n"),
     "materials.sand.porosity = 1.4: must be in (0, 1]"),
    ("porosity_zero", edit("porosity = 0.35", "porosity = 0"), "materials.silt.porosity = 0:"),
    ("negative_conductivity",
     edit('horizontal_conductivity = "10 m/d"', 'horizontal_conductivity = "-10 m/d"'),
     "materials.sand.horizontal_conductivity = '-10 m/d':"),
    ("conductivity_wrong_dimension",
     edit('horizontal_conductivity = "10 m/d"', 'horizontal_conductivity = "12 m"'),
     "materials.sand.horizontal_conductivity = '12 m':"),
    ("quantity_unreadable",
     edit('horizontal_conductivity = "10 m/d"', 'horizontal_conductivity = "twelve m/d"'),
     "materials.sand.horizontal_conductivity = 'twelve m/d':"),
    ("unknown_key", edit("porosity = 0.3\n", "porosity = 0.3\nporosty = 0.3\n"),
     "materials.sand.porosty = 0.3:"),
    ("missing_key", edit('bulk_density = "1600 kg/m^3"\n', ""),
     "materials.sand.bulk_density = (missing): is required"),
    ("layer_unknown_material", edit('material = "silt"', 'material = "slit"'),
     "layers[silt_base].material = 'slit':"),
    ("layer_above_top", edit('bottom = "1 m"', 'bottom = "6 m"'),
     "layers[top_sand].bottom = '6 m':"),
    ("source_unknown_species", edit('species = "tracer"', 'species = "benzene"'),
     "sources[drum_spill].species = 'benzene':"),
    ("source_outside_box", edit('x = ["8 m", "12 m"]', 'x = ["8 m", "70 m"]'),
     "sources[drum_spill].x = '[8, 70] m':"),
    ("observation_outside_box", edit('x = "30 m"', 'x = "90 m"'),
     "observation_points[BH-A].x = '90 m':"),
    ("step_longer_than_end", edit('step = "20 d"', 'step = "3 yr"'), "time.step = '1095.75 d':"),
    ("negative_half_life", edit('half_life = "5 yr"', 'half_life = "-5 yr"'),
     "species.tracer.half_life = '-5 yr':"),
    ("negative_kd", edit('kd = "0.1 L/kg"', 'kd = "-0.1 L/kg"'),
     "species.tracer.kd = '-0.1 L/kg':"),
    ("unknown_face", edit('face = "west"', 'face = "western"'),
     "fixed_heads[0].face = 'western':"),
    ("output_unit", edit('concentration_unit = "mg/L"', 'concentration_unit = "m/d"'),
     "output.concentration_unit = 'm/d':"),
    ("empty_file", "", "title = (missing): is required"),
]


def _check_error_output(res: subprocess.CompletedProcess[str], expected: str) -> None:
    assert res.returncode == 2, (res.returncode, res.stdout, res.stderr)
    assert "Traceback" not in res.stderr + res.stdout
    lines = res.stderr.splitlines()
    assert lines, "no error message"
    for line in lines:
        assert line.startswith("error: "), line
    assert any(line.startswith(f"error: {expected}") for line in lines), (expected, lines)
    assert "CAUTION" not in res.stdout, "a bad case must not get as far as a summary"


@pytest.mark.parametrize(("text", "expected"), [b[1:] for b in BAD_FILES],
                         ids=[b[0] for b in BAD_FILES])
def test_check_bad_case_exits_2_with_one_line_per_problem(
    text: str, expected: str, tmp_path: Path,
) -> None:
    path = tmp_path / "bad.toml"
    path.write_text(text, encoding="utf-8")
    _check_error_output(fe3d("check", path, cwd=tmp_path), expected)


def test_check_invalid_toml(tmp_path: Path) -> None:
    path = tmp_path / "bad.toml"
    text = edit("porosity = 0.3\n", "porosity = = 0.3\n")
    path.write_text(text, encoding="utf-8")
    line_no = text.splitlines().index("porosity = = 0.3") + 1
    res = fe3d("check", path, cwd=tmp_path)
    _check_error_output(res, f"{path} = (TOML text): is not valid TOML")
    assert f"line {line_no}," in res.stderr


def test_check_missing_file(tmp_path: Path) -> None:
    path = tmp_path / "nowhere.toml"
    _check_error_output(fe3d("check", path, cwd=tmp_path), f"case file = '{path}': cannot be read")


def test_check_file_not_utf8(tmp_path: Path) -> None:
    path = tmp_path / "latin1.toml"
    path.write_bytes(TINY_TEXT.replace("Pellet Lane", "P\xe9llet Lane").encode("latin-1"))
    _check_error_output(fe3d("check", path, cwd=tmp_path), f"case file = '{path}': is not UTF-8")


def test_run_bad_case_keeps_what_is_already_in_the_folder(tmp_path: Path) -> None:
    bad = tmp_path / "bad.toml"
    bad.write_text(edit("porosity = 0.3\n", "porosity = 1.4\n"), encoding="utf-8")
    out = tmp_path / "earlier_run"
    out.mkdir()
    kept = out / "summary.json"
    content = b'{"from": "an earlier run"}\n\x00\xff'
    kept.write_bytes(content)
    res = fe3d("run", bad, "--out", out, "--quiet", cwd=tmp_path)
    _check_error_output(res, "materials.sand.porosity = 1.4:")
    assert kept.read_bytes() == content
    assert sorted(p.name for p in out.iterdir()) == ["summary.json"]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["bad.toml", "earlier_run"]


# ------------------------------------------------------------------------------ a full run


@pytest.fixture(scope="module")
def tiny_run(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, str]:
    base = tmp_path_factory.mktemp("cli_run")
    out = base / "run"
    res = fe3d("run", TINY, "--out", out, "--quiet", cwd=base)
    assert res.returncode == 0, res.stderr
    assert "Traceback" not in res.stderr
    return out, res.stdout


EXPECTED_FILES = ["results.vtkhdf", "histories.csv", "mass_budget.csv", "summary.json",
                  "report.md", "report.html", "inputs.json", "breakthrough.png",
                  "head_map.png", "solver.log", "run.json"]
PER_FILE_SERIES = ["mesh.msh", "mesh.vtu", "flow.vtu", "concentration.pvd", "over_the_run.vtu"]
"""Written only with ``output.vtu_series = true``."""


@pytest.mark.slow
def test_run_writes_every_output(tiny_run: tuple[Path, str]) -> None:
    out, stdout = tiny_run
    for name in EXPECTED_FILES:
        assert (out / name).is_file(), name
        assert (out / name).stat().st_size > 0, name
    for name in PER_FILE_SERIES:
        assert not (out / name).exists(), name
    assert not list(out.glob("concentration_*.vtu"))
    assert (out / "breakthrough.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert flat(CAUTION) in flat(stdout)
    log = (out / "solver.log").read_text(encoding="utf-8")
    # where the time went (issue 16): printed and logged, every stage named
    for text in (flat(stdout), log):
        assert re.search(r"time per stage: mesh [\d.]+ s, flow [\d.]+ s, travel paths "
                         r"[\d.]+ s, flow outputs [\d.]+ s, transport [\d.]+ s, outputs "
                         r"[\d.]+ s", text), text[-300:]
    # the flow's figures are drawn on a thread beside the transport: the log and the
    # printed line give their own time (the stage itself is only the moment to start them)
    for text in (flat(stdout), log):
        assert re.search(r"; flow figures written beside the transport in [\d.]+ s", text)
    # every step is logged with the most negative concentration and where it is
    assert "step 1: t = " in log
    assert "tracer min " in log and " at (" in log
    # the report names the method the numbers came from
    assert "- transport method: Crank–Nicolson, fixed steps; bounded: a low-order backward " \
        "Euler step" in \
        (out / "report.md").read_text(encoding="utf-8")


@pytest.mark.slow
def test_a_run_that_fails_in_transport_keeps_its_earlier_outputs(tmp_path: Path) -> None:
    """A step that still fails after the allowed cuts: exit 2, one line naming the failure;
    the outputs of earlier output times are complete and hold no NaN (issue 5, item 6)."""
    text = edit('half_life = "5 yr"\n',
                'half_life = "5 yr"\nsecond_order_rate = "1e6 m^3/kg/d"\n')
    text = text.replace('step = "20 d"', 'step = "0.5 yr"').replace(
        "[mesh]", "[solver]\nnewton_max_iterations = 1\nmax_step_cuts = 0\n\n[mesh]")
    text = text.replace('stop = "200 d"', 'start = "0.6 yr"\nstop = "1 yr"')
    case = tmp_path / "stiff.toml"
    case.write_text(text, encoding="utf-8")
    out = tmp_path / "run"
    res = fe3d("run", case, "--out", out, "--quiet", cwd=tmp_path)
    assert res.returncode == 2, res.stderr
    lines = [ln for ln in res.stderr.strip().splitlines() if ln.strip()]
    assert len(lines) == 1 and "failed after 0 step cuts" in lines[0], res.stderr
    assert "Traceback" not in res.stderr
    import numpy as np
    from vtkmodules.util.numpy_support import vtk_to_numpy
    from vtkmodules.vtkIOHDF import vtkHDFReader

    reader = vtkHDFReader()
    reader.SetFileName(str(out / "results.vtkhdf"))
    reader.UpdateInformation()
    assert reader.GetNumberOfSteps() >= 1, "the outputs before the failure must be kept"
    for k in range(reader.GetNumberOfSteps()):
        reader.SetStep(k)
        reader.Update()
        values = vtk_to_numpy(reader.GetOutput().GetPointData().GetArray("tracer [mg per L]"))
        assert np.all(np.isfinite(values)), k
    assert "step 1: t = " in (out / "solver.log").read_text(encoding="utf-8")
    # the histories up to the last output time before the failure were written as it ran
    rows = (out / "histories.csv").read_text(encoding="utf-8").strip().splitlines()
    assert len(rows) >= 2 and rows[0].startswith("time [")


# columns that hold names, not quantities
_LABEL_COLUMNS = {"species", "boundary"}


@pytest.mark.slow
@pytest.mark.parametrize("name", ["histories.csv", "mass_budget.csv"])
def test_run_csv_headers_carry_units(tiny_run: tuple[Path, str], name: str) -> None:
    out, _ = tiny_run
    with (out / name).open(newline="", encoding="utf-8") as f:
        rows = list(csv.reader(f))
    header = rows[0]
    assert len(rows) > 2
    quantities = [h for h in header if h not in _LABEL_COLUMNS]
    assert quantities
    for h in quantities:
        assert re.fullmatch(r".+ \[[^\[\]]+\]", h), f"{name}: column {h!r} has no [unit]"
    if name == "histories.csv":
        assert header[0] == "time [d]"                       # output.time_unit = "d"
        assert "BH-A tracer [mg/L]" in header                 # output.concentration_unit
        assert "fence_well tracer [mg/L]" in header


@pytest.mark.slow
def test_run_summary_mass_balance(tiny_run: tuple[Path, str]) -> None:
    out, _ = tiny_run
    summary = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    errors = summary["mass_balance_error"]
    assert set(errors) == {"tracer"}
    # Design target: the transport budget closes to round-off for a linear problem
    # (common practice, no source).
    for species, err in errors.items():
        assert abs(err) < 1e-8, (species, err)
    assert {o["name"] for o in summary["observations"]} == {"BH-A", "fence_well"}


# tiny case: initial state, then every 0.5 yr to 2 yr, shown in days (1 yr = 365.25 d)
TINY_OUTPUT_DAYS = [0.0, 182.625, 365.25, 547.875, 730.5]


@pytest.mark.slow
def test_run_series_file_holds_every_output_time(tiny_run: tuple[Path, str]) -> None:
    """``results.vtkhdf`` read by VTK's own reader (what ParaView and pyvista use): the
    output times, the mesh, the flow arrays once and the concentration at every time."""
    from vtkmodules.vtkIOHDF import vtkHDFReader

    out, _ = tiny_run
    reader = vtkHDFReader()
    reader.SetFileName(str(out / "results.vtkhdf"))
    reader.UpdateInformation()
    assert reader.GetNumberOfSteps() == len(TINY_OUTPUT_DAYS)
    times = []
    for k in range(reader.GetNumberOfSteps()):
        reader.SetStep(k)
        reader.Update()
        grid = reader.GetOutput()
        times.append(float(grid.GetFieldData().GetArray("Time").GetValue(0)))
        assert grid.GetPointData().GetArray("tracer [mg per L]") is not None
        assert grid.GetPointData().GetArray("head [m]") is not None
        assert grid.GetCellData().GetArray("darcy_flux [m per d]") is not None
    assert times == pytest.approx(TINY_OUTPUT_DAYS, rel=1e-6)  # stored as float32 at most


@pytest.mark.slow
def test_run_vtu_series_on_request(tmp_path: Path) -> None:
    """``output.vtu_series = true``: the mesh files, flow.vtu and one .vtu per output time
    with a .pvd index listing the times written."""
    case = tmp_path / "case.toml"
    text = TINY.read_text(encoding="utf-8")
    assert text.count("[output]\n") == 1
    case.write_text(text.replace("[output]\n", "[output]\nvtu_series = true\n"),
                    encoding="utf-8")
    out = tmp_path / "run"
    res = fe3d("run", case, "--out", out, "--quiet", cwd=tmp_path)
    assert res.returncode == 0, res.stderr
    for name in PER_FILE_SERIES:
        assert (out / name).is_file(), name
    datasets = ET.parse(out / "concentration.pvd").getroot().findall("./Collection/DataSet")
    times = [float(d.get("timestep", "nan")) for d in datasets]
    assert times == pytest.approx(TINY_OUTPUT_DAYS, rel=1e-9)
    files = [d.get("file", "") for d in datasets]
    assert len(set(files)) == len(files)
    for name in files:
        assert (out / name).is_file(), name
    assert sorted(files) == sorted(p.name for p in out.glob("concentration_*.vtu"))


# ------------------------------------------------------------------------------------ refine


def test_refine_bad_options_exit_2_one_line_each(tmp_path: Path) -> None:
    res = fe3d("refine", TINY, "--ratio", "0.5", "--levels", "9", "--threshold", "0",
               cwd=tmp_path)
    assert res.returncode == 2
    lines = res.stderr.strip().splitlines()
    assert [ln.split(" = ")[0] for ln in lines] == [
        "error: --ratio", "error: --levels", "error: --threshold"]
    assert "Traceback" not in res.stderr


@pytest.mark.slow
def test_refine_tiny_case_gives_a_verdict_per_quantity(tmp_path: Path) -> None:
    """Three levels of the tiny case on the default (process-pool) executor: one line per
    quantity with its values in display units and a verdict word, the Courant note, the
    caution; the study folder holds the tables, the figure and every level's run."""
    res = fe3d("refine", TINY, "--ratio", "1.25", "--out", tmp_path / "study", cwd=tmp_path)
    assert res.returncode == 0, res.stderr
    out = flat(res.stdout)
    assert "so the Courant number stays fixed" in out
    verdict = r"(converged|converging|oscillatory|diverging|unchanged|missing)"
    assert re.search(r"BH-A tracer peak: [\d.e+-]+ → [\d.e+-]+ → [\d.e+-]+ mg/L → " + verdict,
                     out), out
    assert re.search(r"fence_well tracer first above limit: .* d → " + verdict, out), out
    assert re.search(r"plume tracer largest extent: .* m → " + verdict, out), out
    assert flat(CAUTION) in out
    study = tmp_path / "study"
    for name in ("refinement.csv", "refinement.md", "refinement_breakthrough.png"):
        assert (study / name).stat().st_size > 0
    for k in range(3):
        assert (study / f"level_{k}" / "summary.json").is_file()
    with (study / "refinement.csv").open(newline="") as fh:
        rows = list(csv.DictReader(fh))
    units = {(r["quantity"], r["unit"]) for r in rows}
    assert ("peak", "mg/L") in units
    assert ("first above limit", "d") in units
    assert ("largest extent", "m") in units
