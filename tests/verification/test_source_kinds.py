"""Source kinds: mass loading, initial plume, depleting fixed concentration.

Checks are exact by construction or budget identities (design target ≤ 1e-8 for linear
problems, issue criterion): injected mass = rate × duration; a depleting source follows
c0 · 2^(−(t − start)/half-life) (the definition of a half-life).
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from test_release_and_injection import SPILL, TINY, nodes_wholly_inside

from fe3d.case.builder import with_changes
from fe3d.case.parts import TransportInputs
from fe3d.errors import CaseErrors
from fe3d.pipeline import mesh_and_flow
from fe3d.transport.run import run_transport

pytestmark = pytest.mark.verification
DAY = 86400.0


def _run(**spill: object):
    """The tiny case with its spill source changed by the ``spill`` fields."""
    case = with_changes(TINY, sources=[dataclasses.replace(SPILL, **spill)])
    site, flow = mesh_and_flow(case)
    return site, list(run_transport(site, flow, TransportInputs.of(case)))


def test_mass_loading_injects_rate_times_duration():
    _, snaps = _run(concentration=None, kind="mass_loading", mass_rate="2 g/d")
    final = snaps[-1].budgets["tracer"]
    assert final.source_input == pytest.approx(2e-3 * 200.0, rel=1e-12)  # kg
    for snap in snaps:
        assert snap.budgets["tracer"].relative_error <= 1e-8


def test_initial_plume_is_there_at_the_start_and_conserved():
    """The spill box x, y ∈ [8, 12] m, z ∈ [2, 4] m (32 m³) at c0 = 5 mg/L in the tiny
    case's sand (θ = 0.3, ρ_b = 1600 kg/m³, Kd = 0.1 L/kg, so R = 1 + ρ_b Kd/θ = 1.5333):
    the nodes whose cells all lie in it start at c0 exactly, none above; the initial mass,
    dissolved and sorbed, is θ R c0 |box| within 2 % (issue 11's criterion for sources the
    size they are; theory.md T3, ``initial_plume``); the budget then closes."""
    site, snaps = _run(kind="initial_plume", stop=None)
    first = snaps[0]
    c = first.concentration["tracer"]
    whole = nodes_wholly_inside(site, (8, 8, 2), (12, 12, 4))
    assert whole.any()
    np.testing.assert_allclose(c[whole], 5e-3, rtol=1e-12)
    assert c.max() <= 5e-3 * (1 + 1e-12)
    exact = 0.3 * (1 + 1600 * 1e-4 / 0.3) * 5e-3 * 32.0
    assert first.budgets["tracer"].initial == pytest.approx(exact, rel=0.02)
    for snap in snaps:
        b = snap.budgets["tracer"]
        assert b.relative_error <= 1e-8
        assert b.source_input == 0.0


def test_depleting_source_follows_its_half_life():
    site, snaps = _run(stop=None, depletion_half_life="100 d")
    inside = (np.abs(site.points[0] - 10) <= 2 - 1e-9) & (np.abs(site.points[1] - 10) <= 2) & \
        (site.points[2] >= 2) & (site.points[2] <= 4)
    for snap in snaps[1:]:
        expected = 5e-3 * 2.0 ** (-(snap.time / DAY) / 100.0)
        np.testing.assert_allclose(snap.concentration["tracer"][inside], expected, rtol=1e-12)
        assert snap.budgets["tracer"].relative_error <= 1e-8


def test_source_kind_needs_its_fields():
    with pytest.raises(CaseErrors, match=r"sources\[drum_spill\]\.mass_rate"):
        _run(concentration=None, kind="mass_loading")
