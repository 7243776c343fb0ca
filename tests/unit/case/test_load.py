"""Case-file validation: bad inputs give one line per problem; good inputs become SI numbers.

Each bad input starts from ``cases/tiny/case.toml`` and changes one thing by string edit, so the
expected line (key path, value shown, what is allowed) is known exactly.

Unit facts used below (SI definitions, not fe3d results):
- 1 d = 86 400 s and 1 L = 1e-3 m³ exactly — BIPM (2019), *The International System of Units
  (SI)*, 9th ed., Table 8 "Non-SI units accepted for use with the SI" (table number from memory).
- 1 yr = 365.25 d (the Julian year) — the definition pint uses; checked against pint itself in
  :func:`test_pint_year_is_the_julian_year` rather than taken from memory.
"""

from __future__ import annotations

import math
from pathlib import Path

import pint
import pytest

from fe3d.case.load import load_case, parse_case
from fe3d.errors import CaseErrors

ROOT = Path(__file__).resolve().parents[3]
TINY_TEXT = (ROOT / "cases" / "tiny" / "case.toml").read_text(encoding="utf-8")
DEMO_PATH = ROOT / "cases" / "demo" / "case.toml"

DAY = 86_400.0
YEAR = 365.25 * DAY
LITRE = 1e-3          # m³
MILLIGRAM = 1e-6      # kg
MICROGRAM = 1e-9      # kg

# pydantic internals that must never reach a user-facing key path
_LEAKS = ("function-", "dict[", "list[", "tuple[", "constrained", "[key]", "<lambda>")


def edit(old: str, new: str, text: str = TINY_TEXT) -> str:
    """Replace the one occurrence of ``old`` (fails loudly if the base case changed)."""
    assert text.count(old) == 1, f"base case no longer has exactly one {old!r}"
    return text.replace(old, new)


def error_lines(text: str) -> list[str]:
    with pytest.raises(CaseErrors) as info:
        parse_case(text)
    lines = [e.line() for e in info.value.errors]
    assert lines, "CaseErrors raised without any problem listed"
    for line in lines:
        assert "\n" not in line, f"not one line: {line!r}"
        assert not any(tag in line for tag in _LEAKS), f"pydantic internals in: {line!r}"
    assert str(info.value) == "\n".join(lines)
    return lines


def assert_line(lines: list[str], key: str, value: str, allowed: str) -> None:
    """Some line reads ``key = value: …allowed…``."""
    head = f"{key} = {value}: "
    hits = [ln for ln in lines if ln.startswith(head)]
    assert hits, f"no line starts with {head!r}; got {lines}"
    assert any(allowed in ln[len(head):] for ln in hits), f"{allowed!r} not in {hits}"


# (id, old text, new text, key path, value as shown, fragment of what is allowed)
BAD_INPUTS = [
    ("porosity_above_one", "porosity = 0.3\n", "porosity = 1.4\n",
     "materials.sand.porosity", "1.4", "must be in (0, 1]"),
    ("porosity_zero", "porosity = 0.35", "porosity = 0",
     "materials.silt.porosity", "0", "must be in (0, 1]"),
    ("porosity_nan", "porosity = 0.3\n", "porosity = nan\n",
     "materials.sand.porosity", "nan", "must be a finite number"),
    ("negative_conductivity", 'horizontal_conductivity = "10 m/d"',
     'horizontal_conductivity = "-10 m/d"',
     "materials.sand.horizontal_conductivity", "'-10 m/d'", "must be greater than zero"),
    ("negative_vertical_conductivity", 'vertical_conductivity = "2 m/d"',
     'vertical_conductivity = "-2 m/d"',
     "materials.sand.vertical_conductivity", "'-2 m/d'", "must be greater than zero"),
    ("conductivity_wrong_dimension", 'horizontal_conductivity = "10 m/d"',
     'horizontal_conductivity = "12 m"',
     "materials.sand.horizontal_conductivity", "'12 m'", "must be a velocity with a unit"),
    ("quantity_unreadable", 'horizontal_conductivity = "10 m/d"',
     'horizontal_conductivity = "twelve m/d"',
     "materials.sand.horizontal_conductivity", "'twelve m/d'",
     "must be a number followed by a unit"),
    ("conductivity_bare_number", 'horizontal_conductivity = "10 m/d"',
     "horizontal_conductivity = 10",
     "materials.sand.horizontal_conductivity", "10", "written with its unit, e.g. '12 m/d'"),
    ("conductivity_number_text_without_unit", 'horizontal_conductivity = "10 m/d"',
     'horizontal_conductivity = "10"',
     "materials.sand.horizontal_conductivity", "'10'", "must be a number followed by a unit"),
    ("layer_bottom_bare_number", 'bottom = "1 m"', "bottom = 1",
     "layers[top_sand].bottom", "1", "must be a length written with its unit"),
    ("unknown_key_typo", "porosity = 0.3\n", "porosity = 0.3\nporosty = 0.3\n",
     "materials.sand.porosty", "0.3", "is not a known key here"),
    ("unknown_top_level_key", 'site = "Pellet', 'colour = "red"\nsite = "Pellet',
     "colour", "'red'", "is not a known key here"),
    ("missing_required_key", 'bulk_density = "1600 kg/m^3"\n', "",
     "materials.sand.bulk_density", "(missing)", "is required"),
    ("missing_section", '[mesh]\ncell_size = "8 m"\nfine_cell_size = "4 m"\n'
     'fine_zone_radius = "5 m"\nlayer_cell_thickness = "1 m"\n', "",
     "mesh", "(missing)", "is required"),
    ("missing_range_end", 'x = ["0 m", "60 m"]', 'x = ["0 m"]',
     "box.x[1]", "(missing)", "is required"),
    ("layer_unknown_material", 'material = "silt"', 'material = "slit"',
     "layers[silt_base].material", "'slit'", "must be one of the materials: ['sand', 'silt']"),
    ("layer_bottoms_not_descending", 'bottom = "-1 m"', 'bottom = "2 m"',
     "layers[silt_base].bottom", "'2 m'", "must lie below layers[top_sand].bottom"),
    ("layer_bottom_above_box_top", 'bottom = "1 m"', 'bottom = "6 m"',
     "layers[top_sand].bottom", "'6 m'", "must lie below box.top"),
    ("layer_name_not_plain", 'name = "top_sand"', 'name = "top sand"',
     "layers[top sand].name", "'top sand'", "must be a plain name"),
    ("material_name_not_plain", "[materials.silt]", '[materials."9silt"]',
     "materials.9silt", "'9silt'", "must be a plain name"),
    ("source_unknown_species", 'species = "tracer"', 'species = "benzene"',
     "sources[drum_spill].species", "'benzene'", "must be one of the species: ['tracer']"),
    ("source_box_outside_model_box", 'x = ["8 m", "12 m"]', 'x = ["8 m", "70 m"]',
     "sources[drum_spill].x", "'[8, 70] m'", "must be an increasing range inside [0, 60] m"),
    ("source_unknown_shape", 'shape = "box"', 'shape = "sphere"',
     "sources[drum_spill].shape", "'sphere'",
     "must be one of: 'box', 'face_patch', 'point' or 'line'"),
    ("source_concentration_wrong_dimension", 'concentration = "5 mg/L"',
     'concentration = "5 m"',
     "sources[drum_spill].concentration", "'5 m'", "must be a concentration with a unit"),
    ("source_stop_before_start", 'stop = "200 d"', 'start = "300 d"\nstop = "200 d"',
     "sources[drum_spill].stop", "'200 d'", "must be later than start (300 d)"),
    ("observation_outside_box", 'x = "30 m"', 'x = "90 m"',
     "observation_points[BH-A].x", "'90 m'", "must lie in the box, [0, 60] m"),
    ("observation_screen_upside_down", 'screen = ["4.5 m", "1.5 m"]',
     'screen = ["1.5 m", "4.5 m"]',
     "observation_points[fence_well].screen", "'[1.5, 4.5] m'", "must be [top, bottom]"),
    # 3 yr = 1095.75 d, 2 yr = 730.5 d with the Julian year (times shown in output.time_unit)
    ("step_longer_than_end", 'step = "20 d"', 'step = "3 yr"',
     "time.step", "'1095.75 d'", "must not exceed time.end (730.5 d)"),
    ("output_time_after_end", 'output_interval = "0.5 yr"',
     'output_times = ["1 yr", "3 yr"]',
     "time.output_times", "'1095.75 d'", "every output time must be ≤ time.end (730.5 d)"),
    ("negative_half_life", 'half_life = "5 yr"', 'half_life = "-5 yr"',
     "species.tracer.half_life", "'-5 yr'", "must be greater than zero"),
    ("step_zero", 'step = "20 d"', 'step = "0 d"',
     "time.step", "'0 d'", "must be greater than zero"),
    ("negative_second_order_rate", 'half_life = "5 yr"',
     'half_life = "5 yr"\nsecond_order_rate = "-0.1 L/mg/d"',
     "species.tracer.second_order_rate", "'-0.1 L/mg/d'", "must be greater than zero"),
    ("negative_monod_rate", 'half_life = "5 yr"',
     'half_life = "5 yr"\nmonod_max_rate = "-1 mg/L/d"\nmonod_half_saturation = "1 mg/L"',
     "species.tracer.monod_max_rate", "'-1 mg/L/d'", "must be greater than zero"),
    ("negative_yield", 'half_life = "5 yr"',
     'half_life = "5 yr"\nparent = "tracer"\nyield_from_parent = -0.5',
     "species.tracer.yield_from_parent", "-0.5", "greater than 0"),
    ("negative_kd", 'kd = "0.1 L/kg"', 'kd = "-0.1 L/kg"',
     "species.tracer.kd", "'-0.1 L/kg'", "must be zero or greater"),
    ("kd_bare_number", 'kd = "0.1 L/kg"', "kd = 0.1",
     "species.tracer.kd", "0.1", "must be a specific volume written with its unit"),
    ("negative_kd_in_table", 'kd = "0.1 L/kg"', 'kd = { sand = "-0.1 L/kg" }',
     "species.tracer.kd.sand", "'-0.1 L/kg'", "must be zero or greater"),
    ("kd_table_unknown_material", 'kd = "0.1 L/kg"', 'kd = { sandy = "0.1 L/kg" }',
     "species.tracer.kd.sandy", "'sandy'", "must name a material: ['sand', 'silt']"),
    ("fixed_head_unknown_face", 'face = "west"', 'face = "western"',
     "fixed_heads[0].face", "'western'", "must be one of: 'west', 'east', 'south', 'north'"),
    ("fixed_heads_same_face", 'face = "east"', 'face = "west"',
     "fixed_heads.face", "'west'", "each face may carry one fixed head"),
    ("output_unit_not_concentration", 'concentration_unit = "mg/L"',
     'concentration_unit = "m/d"',
     "output.concentration_unit", "'m/d'", "must be a mass-per-volume unit"),
    ("output_unit_not_time", 'time_unit = "d"', 'time_unit = "kg"',
     "output.time_unit", "'kg'", "must be a time unit"),
    ("solver_tolerance_too_loose", "[output]", "[solver]\ntolerance = 0.5\n\n[output]",
     "solver.tolerance", "0.5", "must be less than 0.01"),
    ("monotone_with_shock_capturing", "[output]",
     "[solver]\nmonotone = true\nshock_capturing = true\n\n[output]",
     "solver.shock_capturing", "'true'", "is not used with solver.monotone = true"),
    ("flux_limiting_without_monotone", "[output]",
     "[solver]\nmonotone = false\nflux_limiting = true\n\n[output]",
     "solver.flux_limiting", "'true'", "needs solver.monotone = true"),
    ("bdf2_with_the_bounded_scheme", 'output_interval = "0.5 yr"\n',
     'output_interval = "0.5 yr"\nscheme = "bdf2"\n',
     "time.scheme", "'bdf2'", "cannot be bounded"),
    ("fine_cells_coarser_than_cells", 'fine_cell_size = "4 m"', 'fine_cell_size = "10 m"',
     "mesh.fine_cell_size", "'10 m'", "must not exceed mesh.cell_size (8 m)"),
]


@pytest.mark.parametrize(("old", "new", "key", "value", "allowed"),
                         [case[1:] for case in BAD_INPUTS], ids=[case[0] for case in BAD_INPUTS])
def test_bad_input_gives_one_line_naming_key_value_and_rule(
    old: str, new: str, key: str, value: str, allowed: str,
) -> None:
    assert_line(error_lines(edit(old, new)), key, value, allowed)


def test_invalid_toml_names_the_source_and_the_line() -> None:
    text = edit("porosity = 0.3\n", "porosity = = 0.3\n")
    line_no = text.splitlines().index("porosity = = 0.3") + 1
    with pytest.raises(CaseErrors) as info:
        parse_case(text, source="site.toml")
    (err,) = info.value.errors
    assert err.line().startswith("site.toml = (TOML text): is not valid TOML")
    assert f"line {line_no}," in err.line()


@pytest.mark.parametrize(("new", "expected"), [
    ('kd = { sand = "-0.1 L/kg" }',
     "species.tracer.kd.sand = '-0.1 L/kg': must be zero or greater"),
    ('kd = "-0.1 L/kg"', "species.tracer.kd = '-0.1 L/kg': must be zero or greater"),
], ids=["table", "single_value"])
def test_kd_error_speaks_only_about_the_form_written(new: str, expected: str) -> None:
    """``kd`` is one value or a table per material; a problem gives one line, not one per form."""
    assert error_lines(edit('kd = "0.1 L/kg"', new)) == [expected]


def test_several_problems_give_one_line_each() -> None:
    text = edit("porosity = 0.35", "porosity = 1.5")
    text = edit('horizontal_conductivity = "10 m/d"', 'horizontal_conductivity = "10 m"', text)
    lines = error_lines(text)
    assert len(lines) == 2
    assert_line(lines, "materials.silt.porosity", "1.5", "must be in (0, 1]")
    assert_line(lines, "materials.sand.horizontal_conductivity", "'10 m'", "velocity")


def test_empty_file_lists_every_missing_section() -> None:
    lines = error_lines("")
    # box is optional since a boundary polygon may replace it (cross-checked below)
    required = ["title", "materials", "layers", "species", "time", "mesh"]
    assert sorted(lines) == sorted(f"{k} = (missing): is required" for k in required)


def test_neither_box_nor_boundary() -> None:
    start, end = TINY_TEXT.index("[box]"), TINY_TEXT.index("[materials.sand]")
    lines = error_lines(TINY_TEXT[:start] + TINY_TEXT[end:])
    assert lines == ["box = (missing): is required (or give a boundary polygon)"]


def test_unreadable_file(tmp_path: Path) -> None:
    missing = tmp_path / "nowhere.toml"
    with pytest.raises(CaseErrors) as info:
        load_case(missing)
    assert info.value.errors[0].line() == f"case file = '{missing}': cannot be read " \
                                          "(No such file or directory)"


def test_file_that_is_not_utf8(tmp_path: Path) -> None:
    path = tmp_path / "latin1.toml"
    path.write_bytes(TINY_TEXT.replace("Pellet Lane", "P\xe9llet Lane").encode("latin-1"))
    with pytest.raises(CaseErrors) as info:
        load_case(path)
    assert info.value.errors[0].line().startswith(f"case file = '{path}': is not UTF-8 text")


@pytest.mark.parametrize("bad", ["m/d", "10 m/d 5", "10 m/d + 3 m/d"])
def test_unit_without_single_number_is_refused(bad: str) -> None:
    text = edit('horizontal_conductivity = "10 m/d"', f'horizontal_conductivity = "{bad}"')
    lines = error_lines(text)
    assert any("materials.sand.horizontal_conductivity" in ln and "number followed by a unit"
               in ln for ln in lines), lines


# ---------------------------------------------------------------- valid cases and SI units


def test_pint_year_is_the_julian_year() -> None:
    """The ``yr`` in the case files is pint's year: 365.25 d (pint is the reference here)."""
    ureg = pint.UnitRegistry()
    assert ureg.Quantity(1, "yr").to("s").magnitude == pytest.approx(YEAR, rel=1e-15)
    assert ureg.Quantity(1, "year").to("day").magnitude == pytest.approx(365.25, rel=1e-15)


def test_tiny_case_loads_in_si_units() -> None:
    case = parse_case(TINY_TEXT)
    sand, silt = case.materials["sand"], case.materials["silt"]
    approx = lambda v: pytest.approx(v, rel=1e-12)  # noqa: E731
    assert sand.horizontal_conductivity == approx(10 / DAY)        # 10 m/d
    assert sand.k_vertical == approx(2 / DAY)                      # 2 m/d
    assert silt.k_vertical == approx(0.5 / DAY)                    # defaults to horizontal
    assert sand.bulk_density == approx(1600.0)                     # kg/m³ already SI
    assert sand.alpha_vertical == approx(0.2)                      # defaults to transverse
    assert sand.tortuosity == 1.0
    assert sand.diffusion_coefficient == 0.0
    tracer = case.species["tracer"]
    assert tracer.kd_of("sand") == approx(0.1 * LITRE)             # 0.1 L/kg = 1e-4 m³/kg
    assert tracer.limit == approx(10 * MICROGRAM / LITRE)          # 10 ug/L = 1e-5 kg/m³
    assert tracer.half_life == approx(5 * YEAR)
    assert tracer.decay_rate == approx(math.log(2) / (5 * YEAR))
    (src,) = case.sources
    assert src.concentration == approx(5 * MILLIGRAM / LITRE)      # 5 mg/L = 5e-3 kg/m³
    assert src.stop == approx(200 * DAY)
    assert src.start == 0.0
    assert case.box.x == (0.0, 60.0)
    assert case.z_bottom_min == approx(-1.0)
    assert [ly.name for ly in case.layers] == ["top_sand", "silt_base"]
    bh, fence = case.observation_points
    assert (bh.name, bh.z, bh.screen, bh.kind) == ("BH-A", 3.0, None, "monitoring")
    assert (fence.kind, fence.screen) == ("receptor", (4.5, 1.5))
    assert case.time.end == approx(2 * YEAR)
    assert case.time.step == approx(20 * DAY)
    assert case.output_schedule() == pytest.approx([k * 0.5 * YEAR for k in range(1, 5)])


def test_demo_case_loads_in_si_units() -> None:
    case = load_case(DEMO_PATH)
    approx = lambda v: pytest.approx(v, rel=1e-12)  # noqa: E731
    sand = case.materials["fen_sand"]
    assert sand.horizontal_conductivity == approx(12 / DAY)
    assert sand.k_vertical == approx(1.5 / DAY)
    assert sand.diffusion_coefficient == approx(1e-9)
    assert sand.alpha_vertical == approx(0.05)
    assert sand.tortuosity == approx(0.6)
    solvent, chloride = case.species["solvent"], case.species["chloride"]
    assert solvent.kd_of("fen_sand") == approx(0.12 * LITRE)
    assert solvent.kd_of("silty_clay") == approx(1.5 * LITRE)
    assert solvent.kd_of("basal_gravel") == approx(0.05 * LITRE)
    assert solvent.limit == approx(5 * MICROGRAM / LITRE)
    assert solvent.half_life == approx(12 * YEAR)
    assert chloride.limit == approx(250 * MILLIGRAM / LITRE)        # 250 mg/L = 0.25 kg/m³
    assert chloride.kd_of("fen_sand") == 0.0
    assert chloride.decay_rate == 0.0
    assert case.sources[0].stop == approx(8 * YEAR)
    # unit bases from cases/demo/boreholes.csv (metres); the clay band is absent at two
    strat = case.stratigraphy
    assert strat is not None and len(strat.boreholes) == 10
    mf04 = next(b for b in strat.boreholes if b.name == "MF-04")
    assert mf04.bases["clay_band"] is None
    assert mf04.bases["gravel"] == approx(-6.0)
    assert case.z_bottom_min == approx(-6.4)
    assert case.face_names() == ["south", "stream", "north", "west", "top", "bottom"]
    assert case.time.end == approx(30 * YEAR)
    assert len(case.output_schedule()) == 15                      # every 2 yr to 30 yr
    assert case.output.folder == "runs/demo"
