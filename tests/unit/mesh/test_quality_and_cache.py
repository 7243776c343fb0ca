"""Quality metrics on a regular tetrahedron, and mesh reuse by the hash of the mesh inputs."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

from fe3d.case.load import load_case, parse_case
from fe3d.mesh.build import obtain_mesh
from fe3d.mesh.io import mesh_inputs_hash
from fe3d.mesh.quality import aspect_ratios, dihedral_angles

TINY = Path(__file__).parents[3] / "cases" / "tiny" / "case.toml"


def test_regular_tetrahedron_metrics():
    """Regular tetrahedron: every dihedral angle is arccos(1/3) ≈ 70.5288° (classical solid
    geometry, e.g. CRC Standard Mathematical Tables) and the normalised aspect ratio is 1."""
    p = np.array([[1, 1, 1], [1, -1, -1], [-1, 1, -1], [-1, -1, 1]], dtype=float).T
    c = np.array([[0], [1], [2], [3]])
    np.testing.assert_allclose(dihedral_angles(p, c), math.degrees(math.acos(1 / 3)),
                               rtol=1e-12)
    assert aspect_ratios(p, c)[0] == pytest.approx(1.0, rel=1e-12)


def test_right_corner_tetrahedron_angles():
    """Corner tetrahedron (0, e1, e2, e3): three right dihedral angles at the axes and three of
    arccos(1/√3) ≈ 54.7356° at the slanted face (exact by construction)."""
    p = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1]], dtype=float).T
    d = np.sort(dihedral_angles(p, np.array([[0], [1], [2], [3]]))[:, 0])
    np.testing.assert_allclose(d[:3], math.degrees(math.acos(1 / math.sqrt(3))), rtol=1e-12)
    np.testing.assert_allclose(d[3:], 90.0, rtol=1e-12)


def test_mesh_is_reused_only_while_mesh_inputs_are_unchanged(tmp_path):
    case = load_case(TINY)
    site, reused = obtain_mesh(case, [tmp_path], save_to=tmp_path)
    assert not reused
    again, reused = obtain_mesh(case, [tmp_path], save_to=tmp_path)
    assert reused
    np.testing.assert_array_equal(again.cells, site.cells)
    np.testing.assert_array_equal(again.points, site.points)
    assert {k: v.shape for k, v in again.faces.items()} == \
        {k: v.shape for k, v in site.faces.items()}
    text = TINY.read_text(encoding="utf-8")
    # a physics-only change keeps the mesh; a mesh-input change rebuilds it
    physics = parse_case(text.replace('porosity = 0.3\n', 'porosity = 0.25\n'))
    assert mesh_inputs_hash(physics) == mesh_inputs_hash(case)
    finer = parse_case(text.replace('cell_size = "8 m"', 'cell_size = "6 m"'))
    assert mesh_inputs_hash(finer) != mesh_inputs_hash(case)
    _, reused = obtain_mesh(finer, [tmp_path], save_to=tmp_path)
    assert not reused


def test_source_strength_and_well_rate_do_not_change_the_mesh_hash():
    """Only where sources and wells are shapes the mesh (their corners and screens are mesh
    nodes and levels); strengths, rates and kinds do not."""
    text = TINY.read_text(encoding="utf-8")
    well = ('\n[[wells]]\nname = "w"\nx = "30 m"\ny = "10 m"\nscreens = [["4 m", "2 m"]]\n'
            'rate = "{rate} m^3/d"\n')
    base = parse_case(text + well.format(rate=3))
    stronger = parse_case(text.replace('concentration = "5 mg/L"', 'concentration = "9 mg/L"')
                          + well.format(rate=7))
    moved = parse_case(text.replace('x = ["8 m", "12 m"]', 'x = ["8 m", "13 m"]')
                       + well.format(rate=3))
    assert mesh_inputs_hash(stronger) == mesh_inputs_hash(base)
    assert mesh_inputs_hash(moved) != mesh_inputs_hash(base)
