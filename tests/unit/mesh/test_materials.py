"""Material values per cell and their nodal lumping on the tiny case (two units, values by
construction: the pore volume of a unit is porosity × its volume, 60 m × 20 m × thickness)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from fe3d.case.load import load_case
from fe3d.case.parts import Ground
from fe3d.errors import CaseError
from fe3d.mesh.build import build_mesh
from fe3d.mesh.materials import cell_values, unit_materials

TINY = Path(__file__).parents[3] / "cases" / "tiny" / "case.toml"


@pytest.fixture(scope="module")
def tiny():
    case = load_case(TINY)
    return case, build_mesh(case)


def test_porosity_per_cell_and_pore_volume(tiny):
    """Σ_nodes lumped(θ) = 0.3 · 4800 m³ + 0.35 · 2400 m³ = 2280 m³ (exact by construction;
    tolerance: n_cells · eps, the round-off bound of the sums, Higham 2002, Accuracy and
    Stability of Numerical Algorithms, §4.2)."""
    case, site = tiny
    mats, names = unit_materials(Ground.of(case), site)
    assert names == ["sand", "silt"]
    theta = cell_values(mats, site, "porosity")
    assert set(np.unique(theta)) == {0.3, 0.35}
    np.testing.assert_array_equal(theta == 0.3, site.cell_layer == 0)
    rtol = site.n_cells * np.finfo(float).eps
    assert site.lumped(theta).sum() == pytest.approx(2280.0, rel=rtol)
    k_v = cell_values(mats, site, "k_vertical")  # a property: silt defaults to K_h
    assert k_v[site.cell_layer == 1][0] == mats[1].horizontal_conductivity


def test_a_unit_without_material_names_the_key(tiny):
    case, site = tiny
    bad = case.model_copy(update={"layers": case.layers[:1]})
    with pytest.raises(CaseError, match=r"layers\[silt_base\]\.material = None"):
        unit_materials(Ground.of(bad), site)
