"""Refinement-study arithmetic (Roache 1994; Celik et al. 2008) and the three-grid driver."""

from __future__ import annotations

import math
from pathlib import Path

import pytest

from fe3d.case.load import load_case
from fe3d.studies.refinement import converge, refine_case, refinement_study

TINY = Path(__file__).parents[3] / "cases" / "tiny" / "case.toml"


@pytest.mark.parametrize("p", [1.0, 2.0, 1.5])
def test_exact_power_law_is_recovered(p):
    """f(h) = f0 + C h^p on h = 1, r, r² gives back p and f0 exactly (the construction of
    Richardson extrapolation); GCI = 1.25 |e21/f1|/(r^p − 1) (Roache 1994). Tolerance
    1e-12: a few roundings."""
    r, f0, C = 1.5, 2.0, 0.3
    f1, f2, f3 = (f0 + C * h**p for h in (1.0, r, r * r))
    c = converge(f1, f2, f3, r)
    assert c.order == pytest.approx(p, rel=1e-12)
    assert c.extrapolated == pytest.approx(f0, rel=1e-12)
    assert c.gci == pytest.approx(1.25 * abs((f1 - f2) / f1) / (r**p - 1), rel=1e-12)


def test_oscillatory_sequence_has_no_order():
    c = converge(1.0, 1.1, 0.95, 1.5)
    assert c.order is None
    assert c.extrapolated is None


def test_refine_case_divides_sizes_and_step():
    case = load_case(TINY)
    fine = refine_case(case, 2.0)
    assert fine.mesh.cell_size == case.mesh.cell_size / 2
    assert fine.mesh.layer_cell_thickness == case.mesh.layer_cell_thickness / 2
    assert fine.time.step == case.time.step / 2
    assert math.isclose(fine.mesh.fine_cell_size, case.mesh.fine_cell_size / 2)


@pytest.mark.slow
def test_three_grid_study_on_the_tiny_case(tmp_path):
    case = load_case(TINY)
    result = refinement_study(case, tmp_path, ratio=1.3, base_dir=TINY.parent)
    assert (tmp_path / "refinement.csv").is_file()
    assert "GCI" in (tmp_path / "refinement.md").read_text()
    for k in range(3):
        assert (tmp_path / f"grid_{k}" / "summary.json").is_file()
    peak = result["BH-A/tracer/peak [kg/m3]"]
    assert peak.fine > 0
    assert peak.coarse > 0
