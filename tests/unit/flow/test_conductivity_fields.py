"""Conductivity fields from files: points (CSV) and a VTK cell array on the same mesh."""

from __future__ import annotations

import meshio
import numpy as np
import pytest

from fe3d.case.load import parse_case
from fe3d.errors import CaseError
from fe3d.flow.conductivity import bedding_normal, conductivity_tensors
from fe3d.flow.solve import unit_materials
from fe3d.mesh.build import build_mesh

CASE = """
title = "field"
[box]
x = ["0 m", "40 m"]
y = ["0 m", "20 m"]
top = "0 m"
[materials.sand]
horizontal_conductivity = "10 m/d"
vertical_conductivity = "1 m/d"
porosity = 0.3
bulk_density = "1700 kg/m^3"
longitudinal_dispersivity = "1 m"
transverse_dispersivity = "0.1 m"
conductivity_file = "{file}"
[[layers]]
name = "sand"
material = "sand"
bottom = "-4 m"
[[fixed_heads]]
face = "west"
head = "1 m"
[species.t]
limit = "1 mg/L"
[time]
end = "1 d"
step = "1 d"
[mesh]
cell_size = "5 m"
layer_cell_thickness = "2 m"
"""
DAY = 86400.0


def _tensors(case, site, base_dir):
    mats, names = unit_materials(case, site)
    return conductivity_tensors(site.points, site.cells, site.cell_layer, mats,
                                unit_keys=[f"materials.{n}" for n in names], base_dir=base_dir)


def test_vtk_cell_array_on_the_same_mesh_is_taken_exactly(tmp_path):
    case = parse_case(CASE.format(file="k.vtu"))
    site = build_mesh(case)
    k = np.linspace(1.0, 50.0, site.n_cells)  # [m/d]
    meshio.write(tmp_path / "k.vtu", meshio.Mesh(site.points.T, [("tetra", site.cells.T)],
                                                 cell_data={"conductivity [m/d]": [k]}))
    _, principal = _tensors(case, site, tmp_path)
    np.testing.assert_allclose(principal[0], k / DAY, rtol=1e-12)
    np.testing.assert_allclose(principal[2], 0.1 * k / DAY, rtol=1e-12)  # K_v/K_h kept


def test_point_field_is_interpolated_in_log_k(tmp_path):
    """A field log-linear in x is reproduced exactly by linear interpolation of ln K."""
    rows = ["x [m],y [m],z [m],conductivity [m/d]"]
    for x in (0.0, 20.0, 40.0):
        for y in (0.0, 20.0):
            for z in (0.0, -4.0):
                rows.append(f"{x},{y},{z},{np.exp(0.05 * x):.17g}")
    (tmp_path / "k.csv").write_text("\n".join(rows) + "\n")
    case = parse_case(CASE.format(file="k.csv"))
    site = build_mesh(case)
    _, principal = _tensors(case, site, tmp_path)
    xc = site.points[0, site.cells].mean(axis=0)
    np.testing.assert_allclose(principal[0], np.exp(0.05 * xc) / DAY, rtol=1e-9)


def test_bad_field_file_names_the_key(tmp_path):
    (tmp_path / "k.csv").write_text("x,y,z,k\n0,0,0,1\n")
    case = parse_case(CASE.format(file="k.csv"))
    site = build_mesh(case)
    with pytest.raises(CaseError, match=r"materials\.sand\.conductivity_file"):
        _tensors(case, site, tmp_path)


def test_bedding_normal_horizontal_and_east_dip():
    np.testing.assert_allclose(bedding_normal(0.0, 0.0), [0.0, 0.0, 1.0], atol=1e-15)
    n = bedding_normal(0.0, np.pi / 6)  # strike north, dips east by 30°
    np.testing.assert_allclose(n, [0.5, 0.0, np.sqrt(3) / 2], atol=1e-15)
