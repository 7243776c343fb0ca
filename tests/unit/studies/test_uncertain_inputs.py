"""The ``[uncertain]`` case section: key paths, distribution parameters, units, correlations.

Every problem is one CaseError whose key path names the entry (``uncertain.values[<key
path>].<parameter>``), the value found and what is allowed.
"""

from __future__ import annotations

import copy
from typing import Any

import pytest

from fe3d.case.builder import (
    Layer,
    Material,
    ObservationPoint,
    Source,
    Species,
    Time,
    box_case,
    box_case_text,
)
from fe3d.case.load import parse_case
from fe3d.case.schema import Case
from fe3d.case.uncertain import ValueTarget, parse_target, with_field
from fe3d.errors import CaseError, CaseErrors

K = "materials.sand.horizontal_conductivity"
GOOD: dict[str, Any] = {
    "values": [
        {"name": K, "distribution": "lognormal", "median": 10.0, "ln_std_dev": 0.5,
         "unit": "m/d"},
        {"name": "materials.sand.porosity", "distribution": "uniform", "low": 0.2,
         "high": 0.3},
        {"name": "sources[inlet].stop", "distribution": "normal", "mean": 20.0,
         "std_dev": 2.0, "unit": "d", "low": 5.0},
    ],
    "correlations": [{"between": [K, "materials.sand.porosity"], "rank_correlation": 0.5}],
}


def _case(uncertain: dict[str, Any] | None = None) -> Case:
    sections = {} if uncertain is None else {"uncertain": uncertain}
    return box_case(
        length=40.0, width=2.0, cell=2.0, dz=2.0, heads={"west": 1.0, "east": 0.0},
        layers=[Layer("sand", -2.0, Material(10.0, porosity=0.25))],
        species=[Species(limit=0.1)],
        sources=[Source("inlet", shape="face_patch", face="west", concentration=1.0,
                        stop=30.0)],
        observation_points=[ObservationPoint("P", 20.0, 1.0, -1.0)],
        time=Time(60.0, 1.0), sections=sections)


def _changed(path: tuple[Any, ...], value: Any) -> dict[str, Any]:
    data = copy.deepcopy(GOOD)
    node = data
    for p in path[:-1]:
        node = node[p]
    node[path[-1]] = value
    return data


def test_good_section_is_accepted():
    case = _case(GOOD)
    assert case.uncertain is not None
    assert case.uncertain.values[0].name == K


@pytest.mark.parametrize(("path", "value", "key", "words"), [
    (("values", 0, "name"), "materials.clay.horizontal_conductivity",
     "uncertain.values[materials.clay.horizontal_conductivity].name", "no entry 'clay'"),
    (("values", 0, "name"), "materials.sand.colour",
     "uncertain.values[materials.sand.colour].name", "no key 'colour'"),
    (("values", 2, "name"), "sources[drum].stop", "uncertain.values[sources[drum].stop].name",
     "no entry named 'drum'"),
    (("values", 0, "name"), "box.x", "uncertain.values[box.x].name", "not a single number"),
    (("values", 2, "std_dev"), -1.0, "uncertain.values[sources[inlet].stop].std_dev",
     "zero or greater"),
    (("values", 1, "low"), 0.4, "uncertain.values[materials.sand.porosity].low",
     "below high"),
    (("correlations", 0, "rank_correlation"), 1.5, "uncertain.correlations[0].rank_correlation",
     "between -1 and 1"),
    (("values", 0, "unit"), "kg", f"uncertain.values[{K}].unit", "velocity"),
    (("values", 1, "high"), 1.5, "uncertain.values[materials.sand.porosity].high", "(0, 1]"),
    (("values", 0, "mean"), 3.0, f"uncertain.values[{K}].mean", "not a parameter"),
    (("values", 0, "distribution"), "gamma", f"uncertain.values[{K}].distribution",
     "must be one of"),
], ids=["unknown-material", "unknown-field", "unknown-source", "not-a-number",
        "negative-std", "low-above-high", "correlation-range", "wrong-unit",
        "bound-refused", "foreign-parameter", "unknown-distribution"])
def test_bad_entry_is_one_error_naming_the_key(path, value, key, words):
    with pytest.raises(CaseErrors) as info:
        _case(_changed(path, value))
    errors = info.value.errors
    assert len(errors) == 1, [e.line() for e in errors]
    assert errors[0].key_path == key, errors[0].line()
    assert words in errors[0].line()
    assert "\n" not in errors[0].line()


def test_contradicting_correlations_are_refused():
    """ρ12 = ρ13 = 0.9 and ρ23 = −0.9 cannot hold together (not positive definite)."""
    names = [v["name"] for v in GOOD["values"]]
    data = copy.deepcopy(GOOD)
    data["correlations"] = [{"between": [names[i], names[j]], "rank_correlation": r}
                            for i, j, r in ((0, 1, 0.9), (0, 2, 0.9), (1, 2, -0.9))]
    with pytest.raises(CaseErrors) as info:
        _case(data)
    assert [e.key_path for e in info.value.errors] == ["uncertain.correlations"]
    assert "positive-definite" in info.value.errors[0].allowed


CASE_TEXT = box_case_text(
    title="column", length=40.0, width=2.0, cell=2.0, dz=2.0, heads={"west": 1.0, "east": 0.0},
    layers=[Layer("sand", -2.0, Material(10.0))], species=[Species(limit="0.1 mg/L")],
    time=Time(10.0, None)) + """
[uncertain]
seed = 5

[[uncertain.values]]
name = "materials.sand.porosity"
distribution = "triangular"
low = 0.2
mode = 0.25
high = 0.3
"""


def test_section_read_from_case_file_text():
    """The loader itself: the section as a case file writes it (an array of tables)."""
    case = parse_case(CASE_TEXT)
    assert case.uncertain is not None and case.uncertain.seed == 5
    assert case.uncertain.values[0].mode == 0.25
    assert case.materials["sand"].porosity == 0.25  # the case's own value is untouched


def test_parse_target_shapes():
    assert parse_target(K) == ValueTarget("materials", "sand", "horizontal_conductivity")
    assert parse_target("sources[spill].mass_rate") == ValueTarget("sources", "spill",
                                                                   "mass_rate")
    assert parse_target("fixed_heads[0].head") == ValueTarget("fixed_heads", 0, "head")
    assert parse_target("time.end") == ValueTarget("time", None, "end")
    for bad in ("materials", "a.b.c.d", "sources[x", "1abc.x"):
        assert parse_target(bad) is None


def test_with_field_converts_through_the_fields_own_rules():
    """The drawn value in its unit becomes the SI value the case file would give."""
    case = _case()
    target = parse_target(K)
    assert target is not None
    changed = with_field(case, target, 8.64, "m/d", key="k")
    assert changed.materials["sand"].horizontal_conductivity == pytest.approx(1e-4,
                                                                              rel=1e-15)
    assert case.materials["sand"].horizontal_conductivity == pytest.approx(10 / 86400)
    stop = with_field(case, ValueTarget("sources", "inlet", "stop"), 2.0, "d", key="k")
    assert stop.sources[0].stop == 2 * 86400.0
    with pytest.raises(CaseError, match="must be greater than zero"):
        with_field(case, target, -1.0, "m/d", key="k")
