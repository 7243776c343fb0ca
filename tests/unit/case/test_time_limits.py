"""Output times a run can write (issue 15: ``end = "1e300 yr"`` made ``fe3d check`` itself run
out of memory listing output times). Behaviour requirement, no outside reference."""

from __future__ import annotations

from pathlib import Path

import pytest

from fe3d.case.builder import with_changes
from fe3d.case.load import load_case
from fe3d.case.schema import MAX_OUTPUT_TIMES
from fe3d.errors import CaseErrors

TINY = Path(__file__).parents[3] / "cases" / "tiny" / "case.toml"


def test_an_output_interval_giving_too_many_output_times_is_one_line():
    case = load_case(TINY)  # 2 yr end, output every 0.5 yr
    with pytest.raises(CaseErrors) as info:
        with_changes(case, time={"end": "1e9 yr"})
    assert [e.key_path for e in info.value.errors] == ["time.output_interval"]
    assert f"at most {MAX_OUTPUT_TIMES:,}" in info.value.errors[0].allowed
    # the largest number allowed still loads, and lists its times without delay
    ok = with_changes(case, time={"end": f"{0.5 * MAX_OUTPUT_TIMES} yr"})
    assert len(ok.output_schedule()) == MAX_OUTPUT_TIMES


def test_an_end_beyond_any_time_bound_names_time_end():
    """1e300 yr is refused by the time bound itself (fe3d.case.plausible.BOUNDS: longer than
    the age of the universe), before any output time is listed."""
    case = load_case(TINY)
    with pytest.raises(CaseErrors) as info:
        with_changes(case, time={"end": "1e300 yr"})
    assert [e.key_path for e in info.value.errors] == ["time.end"]
