"""The long-term plume's steady solve (fe3d/transport/steady.py, theory.md T17): which
sources count, the steady balance, nonlinear sorption and reactions, decay chains and the
refusals. Physics checks against published solutions are in
tests/verification/test_steady_plume.py."""

from __future__ import annotations

import numpy as np
import pytest

from fe3d.case import builder
from fe3d.case.builder import Layer, Material, Solver, Source, Species, Time, box_case
from fe3d.case.parts import TransportInputs
from fe3d.errors import CaseError
from fe3d.pipeline import mesh_and_flow
from fe3d.transport.steady import continuous_sources, solve_steady_transport

# A column 20 m × 1 m × 1 m (invented): K 10 m/d, head drop 0.5 m, θ 0.25, so v = 1 m/d;
# a fixed concentration of 1 mg/L on the west face, half-life 10 d.
INLET = Source("inlet", species="tracer", shape="face_patch", face="west", concentration=1.0)

# Direct solves on a few hundred unknowns: a balance sums about n terms of size ≤ the input,
# each rounded, so it closes to n·ε relative; 1e-10 leaves a factor 100 over n ≈ 10⁴·ε
# (common practice, no source).
ROUND_OFF = 1e-10


TRACER = Species("tracer", kd=0.1, half_life=10.0, limit=0.01)


def _column(*, species=(TRACER,), sources=(INLET,), **changes):
    case = box_case(
        length=20.0, width=1.0, cell=1.0, dz=0.5, heads={"west": 0.5, "east": 0.0},
        layers=[Layer("sand", -1.0, Material(10.0, 10.0, porosity=0.25,
                                             longitudinal_dispersivity=1.0))],
        species=list(species), sources=list(sources), time=Time(100.0, 1.0),
        solver=Solver(linear_solver="direct"))
    return builder.with_changes(case, mesh={"corridor": False}, **changes)


def _solve(case):
    site, flow = mesh_and_flow(case)
    return site, solve_steady_transport(site, flow, TransportInputs.of(case))


def test_continuous_sources_leave_out_those_that_end():
    """A source that stops or depletes, and an initial plume, have no long-term effect."""
    case = _column(sources=[
        INLET, Source("spill", species="tracer", x=(5, 6), y=(0, 1), z=(-1, 0),
                      concentration=2.0, stop=30.0),
        Source("fading", species="tracer", x=(8, 9), y=(0, 1), z=(-1, 0),
               concentration=2.0, depletion_half_life=50.0),
        Source("old_plume", species="tracer", kind="initial_plume", x=(10, 12), y=(0, 1),
               z=(-1, 0), concentration=3.0)])
    kept, left = continuous_sources(tuple(case.sources))
    assert [s.name for s in kept] == ["inlet"]
    assert [s.name for s in left] == ["spill", "fading", "old_plume"]


def test_steady_column_balance_closes_and_follows_the_scheme():
    """Input = outflow + decay to round-off (T9 at steady state), for each operator; the
    bounded ones (low order: an M-matrix, Varga 1962, from memory; flux corrected: local
    bounds, T17) stay within [0, c0]."""
    for solver, operator in (({}, "flux_corrected"), ({"flux_limiting": False}, "low_order"),
                             ({"monotone": False}, "supg")):
        _, result = _solve(_column(solver={"linear_solver": "direct", **solver}))
        (tracer,) = result.species
        assert tracer.operator == operator
        b = tracer.balance
        assert b.source_input > 0
        assert b.relative_error <= ROUND_OFF, (operator, b)
        assert tracer.counted_sources == ("inlet",)
        if operator != "supg":
            c = tracer.concentration
            assert c.min() >= 0.0
            assert c.max() <= 1e-3 * (1 + ROUND_OFF)  # 1 mg/L = 1e-3 kg/m³


def test_a_source_that_stops_leaves_no_steady_plume():
    case = _column(sources=[Source("inlet", species="tracer", shape="face_patch", face="west",
                                   concentration=1.0, stop=30.0)])
    _, result = _solve(case)
    (tracer,) = result.species
    assert not tracer.concentration.any()
    assert tracer.left_out_sources == ("inlet",)
    assert tracer.balance.source_input == 0.0


def test_nonlinear_sorption_has_no_effect_without_sorbed_decay():
    """At steady state storage vanishes, so an isotherm changes nothing unless the sorbed
    phase decays: Freundlich with decay in the dissolved phase only gives the linear-K_d
    field to the Newton and linear-solver tolerance (relative residual 1e-10, on a system
    whose condition number is below 1e4 here: 1e-6 of the peak; common practice, no
    source). Both on the low-order operator, which holds no storage coefficient (a
    nonlinear species is not flux corrected)."""
    dissolved_only = {"decay_in_sorbed_phase": False}
    low_order = {"linear_solver": "direct", "flux_limiting": False}
    linear = _solve(_column(species=[Species("tracer", kd=0.1, half_life=10.0,
                                             options=dissolved_only)], solver=low_order))[1]
    curved = _solve(_column(species=[Species("tracer", half_life=10.0, options={
        **dissolved_only, "sorption": "freundlich", "freundlich_kf": "0.1 L/kg",
        "freundlich_n": 0.7})], solver=low_order))[1]
    c_lin, c_nl = linear.species[0].concentration, curved.species[0].concentration
    np.testing.assert_allclose(c_nl, c_lin, rtol=0, atol=1e-6 * c_lin.max())
    assert curved.species[0].balance.relative_error <= 1e-8


def test_sorbed_decay_and_second_order_loss_lower_the_plume_and_balance():
    """Decay of a Freundlich-sorbed phase and a second-order reaction are solved by Newton;
    each lowers the field below the one without it, and the balance books the loss
    (closing to the Newton tolerance, 1e-8 relative: solver.tolerance 1e-10 times the
    ratio of the residual scale to the input, common practice, no source)."""
    base = _solve(_column(species=[Species("tracer", half_life=10.0, options={
        "decay_in_sorbed_phase": False, "sorption": "freundlich", "freundlich_kf": "0.1 L/kg",
        "freundlich_n": 0.7})]))[1].species[0]
    for options in ({"decay_in_sorbed_phase": True, "sorption": "freundlich",
                     "freundlich_kf": "0.1 L/kg", "freundlich_n": 0.7},
                    {"decay_in_sorbed_phase": False, "second_order_rate": "0.1 L/mg/d"}):
        got = _solve(_column(species=[Species("tracer", half_life=10.0, options=options)]))[1]
        s = got.species[0]
        assert s.iterations >= 1
        assert s.operator == "low_order"  # not corrected, as in the transient run
        assert s.balance.relative_error <= 1e-8, (options, s.balance)
        assert np.all(s.concentration <= base.concentration * (1 + 1e-8)), options
        assert s.concentration.sum() < 0.99 * base.concentration.sum(), options


def test_daughter_is_fed_by_its_parents_steady_decay():
    """A chain (T12): the daughter's input equals the yield times what the parent decays."""
    case = _column(species=[Species("parent", half_life=10.0),
                            Species("daughter", half_life=20.0, parent="parent",
                                    options={"yield_from_parent": 0.5})],
                   sources=[Source("inlet", species="parent", shape="face_patch",
                                   face="west", concentration=1.0)])
    _, result = _solve(case)
    parent, daughter = result.species
    assert (parent.name, daughter.name) == ("parent", "daughter")
    assert daughter.balance.source_input == pytest.approx(
        0.5 * parent.balance.decayed, rel=ROUND_OFF)
    assert daughter.balance.relative_error <= ROUND_OFF
    assert daughter.concentration.max() > 0


def test_user_reaction_laws_are_refused_with_one_line():
    case = _column()
    inputs = TransportInputs.of(case)
    from dataclasses import replace

    from fe3d.case.schema import UserReactions

    inputs = replace(inputs, user_reactions=UserReactions(function="m:f", species=["tracer"]))
    site, flow = mesh_and_flow(case)
    with pytest.raises(CaseError, match=r"user_reactions.species = 'tracer': no user"):
        solve_steady_transport(site, flow, inputs)
