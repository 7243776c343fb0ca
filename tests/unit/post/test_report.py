"""Quality warnings, summary.json, the report and breakthrough statistics (post-processing,
no physics). Behaviour tests unless a docstring names a reference."""

from __future__ import annotations

import json

import numpy as np
import pytest

from fe3d.mesh.corridor import ReceptorSpread
from fe3d.post.limit_checks import BoundaryContact, species_extremes
from fe3d.post.probes import breakthrough
from fe3d.post.report import (
    RunSummary,
    quality_warnings,
    rounded,
    write_summary_json,
)


def _summary(**over: object) -> RunSummary:
    base = dict(  # noqa: C408 (keyword form reads like the record)
        title="t", site="s", n_nodes=1, n_cells=1, end_time=1.0, n_steps=1,
                observations=[], mass_balance_error={"x": 0.0}, flow_inflow=1.0,
                flow_discrepancy=0.0, max_grid_peclet={"x": 1.0}, max_courant={"x": 0.5},
                min_concentration={"x": 0.0}, min_concentration_at={"x": None},
                source_max={"x": 1.0}, plume={}, travel_times=[], well_heads={}, wall_time=1.0,
                time_unit="d",
                concentration_unit="mg/L")
    base.update(over)
    return RunSummary(**base)  # type: ignore[arg-type]


def test_no_warning_for_a_resolved_run():
    assert quality_warnings(_summary()) == []


@pytest.mark.parametrize(("field", "value", "word"), [
    ("max_plume_courant", {"x": 3.0}, "Courant"),
    ("max_grid_peclet", {"x": 8.0}, "Péclet"),
    ("extremes", {"x": species_extremes("x", 1.0, lowest=(-0.05, None),
                                        highest=(1.0, None), bound=1.0)}, "negative"),
    ("extremes", {"x": species_extremes("x", 1.0, lowest=(0.0, None),
                                        highest=(1.05, None), bound=1.0)}, "overshoot"),
])
def test_each_threshold_warns(field, value, word):
    """Thresholds: Courant 1 in the plume, grid Péclet 2, undershoot and overshoot 1 % of the limit
    (common practice, no source)."""
    w = quality_warnings(_summary(**{field: value}))
    assert len(w) == 1
    assert word in w[0]


def test_the_courant_warning_says_where():
    """The plume's Courant warning names the node where the number was largest, in metres
    to the nearest metre (so a user sees, e.g., that it sits at a pumped screen)."""
    w = quality_warnings(_summary(max_plume_courant={"x": 65.0},
                                  max_plume_courant_at={"x": (352.06, 98.4, -2.38)}))
    assert "65 > 1 (at (352, 98, -2) m)" in w[0]
    assert "(at" not in quality_warnings(_summary(max_plume_courant={"x": 65.0}))[0]


def test_a_receptor_in_a_plume_narrower_than_a_cell_warns():
    """The mesher's thin-plume record (theory.md M4) becomes one warning naming the
    receptor, its σ_T and the corridor's cell, in metres, and summary.json keeps the record."""
    spread = ReceptorSpread(name="MW-1", along=62.0, sigma_t=8.42, sigma_v=2.5, cell_size=10.0)
    w = quality_warnings(_summary(thin_plumes=[spread]))
    assert len(w) == 1
    assert w[0].startswith("MW-1: the plume there is narrower than a corridor cell (σ_T 8.42 m")
    assert "cells 10 m" in w[0]


@pytest.mark.parametrize(("peclet", "warns"), [(2.0, False), (2.04, False), (2.06, True)])
def test_grid_peclet_is_compared_as_shown(peclet, warns):
    """The advice 'grid Péclet at most 2' (common practice, no source) is compared with the
    value as the report shows it, two digits: the corridor's own target of 2 measures
    2.02-2.04 on gmsh's cells and no longer warns "2 > 2"; 2.06 shows as 2.1 and warns,
    printed to three digits."""
    w = quality_warnings(_summary(max_grid_peclet={"x": peclet}))
    assert bool(w) == warns
    if warns:
        assert "grid Péclet number in the plume 2.06 > 2" in w[0]


def test_negative_values_advice_follows_the_scheme():
    """The advice names the monotone option, or, when it was on, backward Euler (T16)."""
    low = {"x": species_extremes("x", 1.0, lowest=(-0.05, None), highest=(1.0, None))}
    plain = quality_warnings(_summary(extremes=low))[0]
    assert "set solver.monotone = true" in plain
    mono = quality_warnings(_summary(extremes=low, monotone=True))[0]
    assert "backward Euler only" in mono and "set solver.monotone" not in mono


def test_daughter_below_zero_warns_against_its_limit():
    """Issue 11: a daughter (no source, source_max 0) at −189 µg/L against a 70 µg/L limit
    must warn, with the multiple of the limit (2.7), where and between which output times
    (2 and 4 d). Units: 1 µg/L = 1e-6 kg/m³."""
    x = species_extremes("x", 70e-6, lowest=(-189e-6, (10.0, 20.0, -3.0)),
                         highest=(50e-6, None), lowest_between=(172800.0, 345600.0))
    w = quality_warnings(_summary(source_max={"x": 0.0}, extremes={"x": x},
                                  concentration_unit="ug/L"))
    assert len(w) == 1
    assert w[0].startswith("x: most negative concentration -189 ug/L (2.7 × the limit of 70")
    assert "x=10.0 m, y=20.0 m, z=-3.0 m between 2 and 4 d" in w[0]


def test_small_negatives_and_a_daughter_maximum_stay_silent():
    """−0.5 % of the limit is below the 1 % rule; a daughter has no bound, so its largest
    value (here 10 limits) is reported but never called an overshoot."""
    x = species_extremes("x", 1.0, lowest=(-0.005, None), highest=(10.0, None))
    assert quality_warnings(_summary(extremes={"x": x})) == []


def test_plume_on_a_face_where_no_water_leaves_warns():
    s = _summary(boundary_contacts=[BoundaryContact("x", "north", 3 * 86400.0)])
    (w,) = quality_warnings(s)
    assert w.startswith("x: the part above the limit reaches the north face where no water "
                        "leaves the model, first at 3 d")


def test_summary_json_has_no_float_noise(tmp_path):
    """Values round to 10 significant digits and read back equal to the rounded value;
    rounding moves a value by at most half a unit in the 10th digit (5e-10 relative)."""
    assert json.dumps(rounded({"a": [4.999999999999999e-06, 1, True, None]})) == \
        '{"a": [5e-06, 1, true, null]}'
    values = np.random.default_rng(0).lognormal(0.0, 10.0, 50)
    back = np.array(json.loads(json.dumps(rounded(values.tolist()))))
    np.testing.assert_allclose(back, values, rtol=5e-10, atol=0)
    s = _summary(source_max={"x": 0.019999999999999997}, end_time=946728000.0000001)
    d = json.loads(write_summary_json(tmp_path / "summary.json", s).read_text())
    assert d["source_max"] == {"x": 0.02}
    assert d["end_time"] == 946728000.0
    assert d["min_concentration_at"] == {"x": None}



def test_breakthrough_interpolates_crossing_times():
    """Crossings on the parabola in log c through the three positive samples around them
    (fe3d.post.probes): ln c = ln 3 (1 − (t − 2)²) through (1, 1), (2, 3), (3, 1) is 2 at
    t = 2 ∓ √(1 − ln 2/ln 3), by hand. The top 1, 3, 1 is a kink between straight flanks
    (0, 1 and 1, 0), not a smooth peak: the stored value stays."""
    t = np.array([0.0, 1.0, 2.0, 3.0, 4.0])
    c = np.array([0.0, 1.0, 3.0, 1.0, 0.0])
    b = breakthrough(t, c, 2.0)
    assert b.peak == 3.0
    assert b.peak_time == 2.0
    half = np.sqrt(1.0 - np.log(2.0) / np.log(3.0))
    assert b.first_above_limit == pytest.approx(2.0 - half, abs=1e-12)
    assert b.last_above_limit == pytest.approx(2.0 + half, abs=1e-12)
    assert breakthrough(t, c, 5.0).first_above_limit is None


def test_plume_measures_and_isosurface_of_a_linear_field(tmp_path):
    """c = 1 − x/4 on a 4 × 1 × 1 m bar, limit 0.4: P1 holds c exactly, so the region above
    it is x < 2.4 m: volume 2.4 m³, dissolved mass θ∫c = 0.25 (2.4 − 2.4²/8) = 0.42 kg with
    θ = 0.25, extent hypot(2.4, 1) m from (0, 0) (exact integrals; round-off 1e3 ε); the
    contour surface of a linear field is the plane c = level (exact for P1)."""
    from skfem import MeshTet

    from fe3d.p1 import volumes
    from fe3d.post.plume import MeasuringFrame, SorbedPhase, measure_plume, write_isosurface

    m = MeshTet.init_tensor(np.linspace(0, 4, 5), np.linspace(0, 1, 2), np.linspace(0, 1, 2))
    pts, cells = m.p, m.t
    conc = 1.0 - pts[0] / 4.0  # 1 at x = 0, 0 at x = 4
    n = cells.shape[1]
    no_sorption = SorbedPhase(np.zeros(1), np.zeros(n, dtype=int), (("linear", {"kd": 0.0}),))
    frame = MeasuringFrame((0.0, 0.0), (1.0, 0.0))
    ext = measure_plume(pts, cells, volumes(pts, cells), np.full(n, 0.25), no_sorption, conc,
                        0.4, frame)
    tol = 1e3 * np.finfo(float).eps
    assert ext.volume == pytest.approx(2.4, rel=tol)
    assert ext.dissolved_mass == pytest.approx(0.42, rel=tol)
    assert ext.extent == pytest.approx(np.hypot(2.4, 1.0), rel=tol)
    assert measure_plume(pts, cells, volumes(pts, cells), np.full(n, 0.25), no_sorption,
                         conc, 2.0, frame).volume == 0.0
    import pyvista as pv

    path = write_isosurface(tmp_path / "iso.vtp", pts, cells, conc, 0.5, name="c [mg/L]")
    surf = pv.read(path)
    np.testing.assert_allclose(surf.points[:, 0], 2.0, atol=1e-12)
    assert surf.area == pytest.approx(1.0, rel=1e-12)


def test_every_summary_key_is_described_in_the_readme(tmp_path):
    """Each key of summary.json, and each key of its per-species and per-row records,
    appears in backticks in README.md's "The keys of summary.json"."""
    from pathlib import Path

    from fe3d.post.report import ObservationResult

    readme = (Path(__file__).parents[3] / "README.md").read_text(encoding="utf-8")
    section = readme.split("### The keys of summary.json", 1)[1].split("\n## ", 1)[0]
    x = species_extremes("x", 1.0, lowest=(-0.5, None), highest=(1.0, None), bound=1.0)
    s = _summary(extremes={"x": x}, boundary_contacts=[BoundaryContact("x", "north", 1.0)],
                 observations=[ObservationResult("p", "point", "x", 1.0, 1.0, None, 1.0)],
                 plume={"x": {"largest_extent": 1.0, "time_of_largest_extent": 1.0,
                              "largest_volume": 1.0, "final_extent": 1.0}},
                 travel_times=[{"source": "s", "receptor": "r", "time": None, "closest": 1.0,
                                "arrival_radius": 1.0}])
    d = json.loads(write_summary_json(tmp_path / "summary.json", s).read_text())
    keys = set(d) | set(d["extremes"]["x"]) | set(d["boundary_contacts"][0]) \
        | set(d["observations"][0]) | set(d["plume"]["x"]) | set(d["travel_times"][0])
    missing = sorted(k for k in keys if f"`{k}`" not in section)
    assert missing == []


def test_summary_json_writes_an_infinite_number_as_null(tmp_path):
    """A unit with no dispersion and no diffusion has an infinite grid Péclet number; the
    summary is still written (JSON has no infinity: null), and the report warns."""
    s = _summary(max_grid_peclet={"x": float("inf")})
    path = write_summary_json(tmp_path / "summary.json", s)
    assert json.loads(path.read_text(encoding="utf-8"))["max_grid_peclet"] == {"x": None}
    assert any("Péclet" in w for w in quality_warnings(s))


def test_histories_appended_step_by_step_equal_one_write(tmp_path):
    """histories.csv begun at the first output time and appended later (a run that stops
    keeps what it had) is the file one write of every step gives, byte for byte
    (behaviour requirement of issue 15, no outside reference)."""
    from fe3d.post.tables import append_histories, write_histories

    rng = np.random.default_rng(3)
    times = np.linspace(0.0, 9.0 * 86400.0, 10)
    history = {"a": rng.random((10, 2)) * 1e-3, "b": rng.random((10, 2)) * 1e-3}
    names, units = ["P", "Q"], {"time_unit": "d", "conc_unit": "mg/L"}
    whole, parts = tmp_path / "whole.csv", tmp_path / "parts.csv"
    write_histories(whole, times, history, names, **units)
    write_histories(parts, times[:4], {k: v[:4] for k, v in history.items()}, names, **units)
    append_histories(parts, times[:7], {k: v[:7] for k, v in history.items()}, 2, start=4,
                     **units)
    append_histories(parts, times, history, 2, start=7, **units)
    assert parts.read_bytes() == whole.read_bytes()
