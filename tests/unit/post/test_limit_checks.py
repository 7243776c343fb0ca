"""Checks against the limit (fe3d.post.limit_checks) on small constructed arrays.

Behaviour tests: no published reference is involved. The expected values are worked out by
hand in each test from the arrays it builds; comparisons of floats computed by one
division use ``rel=1e-12`` (a few ulps of round-off, far below any printed digit).
"""

from __future__ import annotations

import numpy as np
import pytest

from fe3d.post.limit_checks import (
    BoundaryContact,
    boundary_contacts,
    first_times_above,
    is_significant,
    outflow_nodes,
    species_extremes,
    upper_bound,
    widen_window,
)

UG_PER_L = 1e-6  # kg/m³


def test_first_times_above_keeps_the_first_output_time():
    first = np.full(4, np.nan)
    first = first_times_above(first, np.array([0.0, 2.0, 0.5, 0.0]), 1.0, 10.0)
    again = first_times_above(first, np.array([3.0, 3.0, 0.5, 0.0]), 1.0, 20.0)
    np.testing.assert_array_equal(again, [20.0, 10.0, np.nan, np.nan])
    np.testing.assert_array_equal(first, [np.nan, 10.0, np.nan, np.nan])  # input untouched


def test_outflow_nodes_from_fixed_head_faces_and_budget_items():
    """A node lets water out where a fixed-head face carries outward flux or a budget item
    (a well, a stream) takes water out; recharge (positive exchange) does not."""
    face_outflow = {"west": np.array([0.0, 0.0, 0.0, 0.0, 0.0, 0.0]),
                    "east": np.array([0.0, 0.0, 0.0, 0.0, 2e-4, 1e-4])}
    exchange = {"rain": np.array([1e-6, 1e-6, 1e-6, 1e-6, 0.0, 0.0]),
                "well": np.array([0.0, 0.0, -3e-4, 0.0, 0.0, 0.0])}
    leaves = outflow_nodes(6, face_outflow, exchange)
    np.testing.assert_array_equal(leaves, [False, False, True, False, True, True])


def test_boundary_contacts_only_where_no_water_leaves():
    """Nodes 0–1 form an inflow face, 2–3 a no-flow base, 4–5 an outflow face. The part
    above the limit reaches node 1 at 5 s, node 3 at 7 s and nodes 4–5 at 2 s: the inflow
    and base faces are touched (first at 5 s and 7 s), the outflow face is not reported."""
    faces = {"west": np.array([[0], [1], [1]]), "bottom": np.array([[2, 3], [3, 2], [2, 3]]),
             "east": np.array([[4], [5], [4]])}
    leaves = np.array([False, False, False, False, True, True])
    first = np.array([np.nan, 5.0, np.nan, 7.0, 2.0, 2.0])
    assert boundary_contacts("solvent", first, faces, leaves) == [
        BoundaryContact("solvent", "west", 5.0), BoundaryContact("solvent", "bottom", 7.0)]
    assert boundary_contacts("solvent", np.full(6, np.nan), faces, leaves) == []


def test_daughter_far_below_zero_is_measured_against_its_limit():
    """Issue 11: a daughter at −189 µg/L against a 70 µg/L limit is 2.7 limits below
    zero; with no source of its own there is no upper bound, so no overshoot either."""
    x = species_extremes("daughter", 70 * UG_PER_L, lowest=(-189 * UG_PER_L, (1.0, 2.0, 3.0)),
                         highest=(40 * UG_PER_L, (4.0, 5.0, 6.0)),
                         bound=upper_bound([0.0], has_parent=True, has_mass_loading=False))
    assert x.below_zero_in_limits == pytest.approx(2.7, rel=1e-12)
    assert x.negative_is_significant
    assert x.upper_bound is None and x.overshoot is None and x.overshoot_in_limits is None
    assert not x.overshoot_is_significant


def test_overshoot_above_the_largest_source_value():
    """Largest value 904 against a source of 900 and a limit of 250 (mg/L = 1e-3 kg/m³):
    the overshoot is 4/250 = 0.016 limits, above the 1 % rule; a run that never stepped
    (highest = −inf) counts its largest value as 0."""
    bound = upper_bound([0.9, 0.0, 0.5], has_parent=False, has_mass_loading=False)
    assert bound == 0.9
    x = species_extremes("chloride", 0.25, lowest=(0.0, None), highest=(0.904, None),
                         bound=bound)
    # 0.904 − 0.9 cancels about 2.4 of the 16 digits: 1e-12 keeps a wide margin
    assert x.overshoot_in_limits == pytest.approx(0.016, rel=1e-12)
    assert x.overshoot_is_significant and not x.negative_is_significant
    idle = species_extremes("chloride", 0.25, lowest=(0.0, None), highest=(-np.inf, None),
                            bound=bound)
    assert idle.highest == 0.0 and idle.overshoot == 0.0


def test_upper_bound_is_none_for_daughters_and_mass_loadings():
    assert upper_bound([1.0], has_parent=True, has_mass_loading=False) is None
    assert upper_bound([1.0], has_parent=False, has_mass_loading=True) is None
    assert upper_bound([], has_parent=False, has_mass_loading=False) == 0.0


@pytest.mark.parametrize(("excess", "expected"), [(0.009, False), (0.0101, True)])
def test_one_percent_of_the_limit_rule(excess, expected):
    """Warnings start beyond 1 % of the limit (common practice, no source)."""
    assert is_significant(excess, 1.0) is expected


def test_widen_window_follows_the_running_extreme():
    w = widen_window(None, 0.0, -1.0, 0.0, 2.0, lower=True)
    assert w == (0.0, 2.0)
    assert widen_window(w, -1.0, -1.0, 2.0, 4.0, lower=True) == (0.0, 2.0)
    assert widen_window(w, -1.0, -3.0, 4.0, 6.0, lower=True) == (4.0, 6.0)
    assert widen_window(None, 1.0, 2.0, 0.0, 2.0, lower=False) == (0.0, 2.0)


def test_a_patch_on_the_inflow_face_is_not_the_plume_reaching_it(tmp_path):
    """A fixed-concentration patch on the west (inflow) face: the part above the limit
    touches the west face at and beside the patch, which is where the source is meant to
    be, not the model cutting the plume; the south and north faces, 1 m from the patch's
    sides, are reached and still flagged (behaviour test, no published reference)."""
    from fe3d.case.builder import Layer, Material, Source, Species, Time, box_case
    from fe3d.pipeline import run_case

    sand = Material(10.0, 10.0, porosity=0.3, longitudinal_dispersivity=1.0,
                    transverse_dispersivity=0.5)
    case = box_case(length=30.0, width=6.0, cell=1.0, dz=1.0, heads={"west": 0.3, "east": 0.0},
                    layers=[Layer("sand", -3.0, sand)],
                    species=[Species("solvent", limit="1 ug/L")],
                    sources=[Source("patch", species="solvent", shape="face_patch",
                                    face="west", concentration="10 mg/L", y=(1.0, 5.0),
                                    z=(-3.0, 0.0))],
                    time=Time("20 d", "1 d", output_interval="10 d"))
    summary = run_case(case, tmp_path / "run")
    faces = {b.face for b in summary.boundary_contacts}
    assert "west" not in faces
    assert {"south", "north"} <= faces
