"""The Python case builder gives the case its TOML text gives, and the same errors.

Unit facts used below (SI definitions, not fe3d results): 1 d = 86 400 s, 1 L = 1e-3 m³,
1 mg = 1e-6 kg — BIPM (2019), *The International System of Units (SI)*, 9th ed., Table 8
(table number from memory).
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np
import pytest

from fe3d.case.builder import (
    Layer,
    Material,
    ObservationPoint,
    Source,
    Species,
    Time,
    box_case,
    with_changes,
)
from fe3d.case.load import load_case, parse_case
from fe3d.case.schema import Case
from fe3d.errors import CaseErrors

DAY = 86_400.0
LITRE = 1e-3
MILLIGRAM = 1e-6

ROOT = Path(__file__).resolve().parents[3]
TINY = ROOT / "cases" / "tiny" / "case.toml"
TINY_TEXT = TINY.read_text(encoding="utf-8")

SPILL = Source("drum_spill", concentration=5.0, x=(8.0, 12.0), y=(8.0, 12.0), z=(2.0, 4.0),
               stop=200.0)


def _built(**changes: object) -> Case:
    """``cases/tiny/case.toml`` written with the builder."""
    kwargs: dict[str, object] = {
        "title": "Tiny test box", "length": 60.0, "width": 20.0, "top": 5.0,
        "layers": [Layer("top_sand", 1.0, Material(10.0, 2.0, porosity=0.3,
                                                  longitudinal_dispersivity=2.0,
                                                  transverse_dispersivity=0.2, name="sand")),
                   Layer("silt_base", -1.0, Material(0.5, porosity=0.35, bulk_density=1500.0,
                                                     name="silt"))],
        "heads": {"west": 4.6, "east": "4.0 m"},
        "species": [Species(limit="10 ug/L", kd=0.1, half_life="5 yr")],
        "sources": [SPILL],
        "observation_points": [ObservationPoint("BH-A", 30.0, 10.0, z=3.0),
                               ObservationPoint("fence_well", 50.0, 10.0, screen=(4.5, 1.5),
                                                kind="receptor")],
        "time": Time("2 yr", 20.0, output_interval="0.5 yr"),
        "cell": 8.0, "dz": 1.0, "fine_cell": 4.0, "fine_radius": 5.0,
        "sections": {"site": "Pellet Lane test box (invented)",
                     "output": {"concentration_unit": "mg/L", "time_unit": "d"}},
    }
    kwargs.update(changes)
    return box_case(**kwargs)  # type: ignore[arg-type]


def test_builder_case_equals_the_case_parsed_from_its_text():
    assert _built() == load_case(TINY)


def test_builder_converts_units_to_si():
    """Numbers take the unit each field names (m/d, d, L/kg, mg/L); strings keep theirs."""
    case = _built(species=[Species(limit=0.01, kd="1e-4 m^3/kg", half_life=30.0)])
    assert case.materials["sand"].horizontal_conductivity == pytest.approx(10.0 / DAY,
                                                                            rel=1e-15)
    tracer = case.species["tracer"]
    assert tracer.kd == pytest.approx(0.1 * LITRE, rel=1e-15)
    assert tracer.half_life == pytest.approx(30.0 * DAY, rel=1e-15)
    assert tracer.limit == pytest.approx(0.01 * MILLIGRAM / LITRE, rel=1e-15)
    assert case.sources[0].concentration == pytest.approx(5.0 * MILLIGRAM / LITRE, rel=1e-15)
    assert case.sources[0].stop == pytest.approx(200.0 * DAY, rel=1e-15)
    assert case.time.step == pytest.approx(20.0 * DAY, rel=1e-15)


def test_builder_bad_value_gives_the_case_file_error():
    """The same one line as the case file with the same bad value."""
    with pytest.raises(CaseErrors) as from_text:
        parse_case(TINY_TEXT.replace("porosity = 0.35", "porosity = 1.5"))
    with pytest.raises(CaseErrors) as built:
        _built(layers=[Layer("top_sand", 1.0, Material(name="sand")),
                       Layer("silt_base", -1.0, Material(porosity=1.5, name="silt"))])
    assert str(built.value) == str(from_text.value) == "materials.silt.porosity = 1.5: must be " \
        "in (0, 1]"


def test_builder_cross_section_error_matches_the_case_file():
    with pytest.raises(CaseErrors) as from_text:
        parse_case(TINY_TEXT.replace('stop = "200 d"', 'stop = "0.0 d"'))
    with pytest.raises(CaseErrors) as built:
        _built(sources=[dataclasses.replace(SPILL, stop=0.0)])
    assert str(built.value) == str(from_text.value)


def test_with_changes_equals_the_case_built_with_the_change():
    changed = with_changes(_built(), time={"scheme": "backward_euler", "step": "10 d"},
                           materials={"silt": {"porosity": 0.4}},
                           sources=[dataclasses.replace(SPILL, concentration=9.0)])
    expected = _built(time=Time("2 yr", 10.0, scheme="backward_euler",
                                output_interval="0.5 yr"),
                      sources=[dataclasses.replace(SPILL, concentration=9.0)])
    assert changed.materials["silt"].porosity == 0.4
    assert changed.model_copy(update={"materials": expected.materials}) == expected


def test_with_changes_refuses_what_the_case_file_refuses():
    with pytest.raises(CaseErrors) as bad_field:
        with_changes(_built(), time={"step": "-1 d"})
    assert str(bad_field.value) == "time.step = '-1 d': must be greater than zero"
    with pytest.raises(CaseErrors) as bad_relation:
        with_changes(_built(), time={"step": "1000 d"})
    assert str(bad_relation.value) == "time.step = '1000 d': must not exceed time.end (730.5 d)"
    with pytest.raises(CaseErrors) as bad_entry:
        with_changes(_built(), sources=[dataclasses.replace(SPILL, species="ghost")])
    assert str(bad_entry.value) == "sources[drum_spill].species = 'ghost': must be one of the " \
        "species: ['tracer']"


def test_with_changes_adds_a_species_as_the_case_file_would():
    marker = dataclasses.replace(SPILL, name="marker_spill", species="marker")
    added = with_changes(_built(), species={"marker": Species("marker", kd=0.2)},
                         sources=[SPILL, marker])
    expected = _built(species=[Species(limit="10 ug/L", kd=0.1, half_life="5 yr"),
                               Species("marker", kd=0.2)], sources=[SPILL, marker])
    assert added == expected
    with pytest.raises(CaseErrors) as bad:
        with_changes(_built(), species={"marker": {"limit": "-1 mg/L"}})
    assert str(bad.value) == "species.marker.limit = '-1 mg/L': must be greater than zero"


def test_builder_takes_numpy_numbers():
    """A numpy scalar is written as the plain number it holds (numpy 2 prints its type)."""
    case = _built(species=[Species(limit=np.float64(0.01), kd=np.float32(0.5),
                                   half_life=np.int64(30))])
    tracer = case.species["tracer"]
    assert tracer.limit == pytest.approx(0.01 * MILLIGRAM / LITRE, rel=1e-15)
    assert tracer.kd == pytest.approx(0.5 * LITRE, rel=1e-15)  # 0.5 is exact in float32
    assert tracer.half_life == 30 * DAY
