"""Source kinds: mass loading, initial plume, depleting fixed concentration.

Checks are exact by construction or budget identities (design target ≤ 1e-8 for linear
problems, issue criterion): injected mass = rate × duration; a depleting source follows
c0 · 2^(−(t − start)/half-life) (the definition of a half-life).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from fe3d.case.load import parse_case
from fe3d.errors import CaseErrors
from fe3d.pipeline import mesh_and_flow
from fe3d.transport.run import run_transport

pytestmark = pytest.mark.verification
TINY = (Path(__file__).parents[2] / "cases" / "tiny" / "case.toml").read_text()
DAY = 86400.0
SPILL = '''[[sources]]
name = "drum_spill"
species = "tracer"
shape = "box"
concentration = "5 mg/L"
x = ["8 m", "12 m"]
y = ["8 m", "12 m"]
z = ["2 m", "4 m"]
stop = "200 d"
'''


def _run(source: str):
    assert SPILL in TINY
    case = parse_case(TINY.replace(SPILL, source))
    site, flow = mesh_and_flow(case)
    return site, list(run_transport(site, flow, case))


def test_mass_loading_injects_rate_times_duration():
    src = SPILL.replace('concentration = "5 mg/L"', 'kind = "mass_loading"\nmass_rate = "2 g/d"')
    _, snaps = _run(src)
    final = snaps[-1].budgets["tracer"]
    assert final.source_input == pytest.approx(2e-3 * 200.0, rel=1e-12)  # kg
    for snap in snaps:
        assert snap.budgets["tracer"].relative_error <= 1e-8


def test_initial_plume_is_there_at_the_start_and_conserved():
    src = SPILL.replace('concentration = "5 mg/L"', 'kind = "initial_plume"\n'
                        'concentration = "5 mg/L"').replace('stop = "200 d"\n', '')
    site, snaps = _run(src)
    first = snaps[0]
    inside = (np.abs(site.points[0] - 10) <= 2) & (np.abs(site.points[1] - 10) <= 2) & \
        (site.points[2] >= 2) & (site.points[2] <= 4)
    np.testing.assert_allclose(first.concentration["tracer"][inside], 5e-3, rtol=1e-12)
    assert first.budgets["tracer"].initial > 0
    for snap in snaps:
        b = snap.budgets["tracer"]
        assert b.relative_error <= 1e-8
        assert b.source_input == 0.0


def test_depleting_source_follows_its_half_life():
    src = SPILL.replace('stop = "200 d"\n', 'depletion_half_life = "100 d"\n')
    site, snaps = _run(src)
    inside = (np.abs(site.points[0] - 10) <= 2 - 1e-9) & (np.abs(site.points[1] - 10) <= 2) & \
        (site.points[2] >= 2) & (site.points[2] <= 4)
    for snap in snaps[1:]:
        expected = 5e-3 * 2.0 ** (-(snap.time / DAY) / 100.0)
        np.testing.assert_allclose(snap.concentration["tracer"][inside], expected, rtol=1e-12)
        assert snap.budgets["tracer"].relative_error <= 1e-8


def test_source_kind_needs_its_fields():
    bad = SPILL.replace('concentration = "5 mg/L"', 'kind = "mass_loading"')
    with pytest.raises(CaseErrors, match=r"sources\[drum_spill\]\.mass_rate"):
        parse_case(TINY.replace(SPILL, bad))
