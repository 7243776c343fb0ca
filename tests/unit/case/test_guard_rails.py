"""Case-file guard rails: the renamed head-dependent kind, physical ranges of conductivity and
porosity, and the sample spacing of the mesh section. Each bad value is one line naming the
key, the value and what is allowed."""

from __future__ import annotations

from pathlib import Path

import pytest

from fe3d.case.load import parse_case
from fe3d.errors import CaseErrors

TINY_TEXT = (Path(__file__).parents[3] / "cases" / "tiny" / "case.toml").read_text(
    encoding="utf-8")
BROOK = ('[[head_dependent]]\nname = "brook"\nkind = "{kind}"\nstage = "4.5 m"\n'
         'leakance = "1 d^-1"\n')


def _line(text: str) -> str:
    with pytest.raises(CaseErrors) as info:
        parse_case(text)
    (err,) = info.value.errors
    return err.line()


def test_stream_is_the_two_way_kind_and_the_old_word_names_the_new_one():
    assert parse_case(TINY_TEXT + BROOK.format(kind="stream")).head_dependent[0].kind == "stream"
    assert parse_case(TINY_TEXT + BROOK.format(kind="drain")).head_dependent[0].kind == "drain"
    assert _line(TINY_TEXT + BROOK.format(kind="river")) == (
        "head_dependent[brook].kind = 'river': must be 'stream' or 'drain' ('river' is now "
        "called 'stream')")


@pytest.mark.parametrize(("old", "new", "start"), [
    # Freeze & Cherry 1979, Groundwater, Table 2.2 (from memory): about 1e-9 m/d to 1e5 m/d
    ('"10 m/d"', '"10 m/s"', "materials.sand.horizontal_conductivity = '10 m/s': must be "
     "between 1e-12 and 100000 m/d (here 8.64e+05 m/d;"),
    ('"2 m/d"', '"1e-13 m/d"', "materials.sand.vertical_conductivity = '1e-13 m/d': must be "
     "between 1e-12 and 100000 m/d (here 1e-13 m/d;"),
    # common practice, no source
    ("porosity = 0.3\n", "porosity = 5e-5\n", "materials.sand.porosity = 5e-05: must be at "
     "least 0.0001 (common practice, no source"),
    ("porosity = 0.3\n", "porosity = 1.0\n", "materials.sand.porosity = 1.0: must be below 1: "
     "a porosity of 1 leaves no solids, yet the material has a bulk_density"),
])
def test_values_outside_the_physical_range_are_one_line(old, new, start):
    assert old in TINY_TEXT
    assert _line(TINY_TEXT.replace(old, new, 1)).startswith(start)


def test_the_bounds_themselves_are_accepted():
    for old, new in (('"10 m/d"', '"1e5 m/d"'), ('"2 m/d"', '"1e-12 m/d"'),
                     ("porosity = 0.3\n", "porosity = 1e-4\n")):
        parse_case(TINY_TEXT.replace(old, new, 1))


def test_sample_spacing_is_a_quarter_cell_layer_but_at_least_5_cm():
    case = parse_case(TINY_TEXT)
    assert case.mesh.sample_spacing == 0.25  # layer_cell_thickness = 1 m
    thin = parse_case(TINY_TEXT.replace('layer_cell_thickness = "1 m"',
                                        'layer_cell_thickness = "0.1 m"'))
    assert thin.mesh.sample_spacing == 0.05
