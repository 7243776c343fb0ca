"""Conductivity fields from files: points (CSV) and a VTK cell array on the same mesh."""

from __future__ import annotations

import meshio
import numpy as np
import pytest

from fe3d.case.builder import Layer, Material, Species, Time, box_case
from fe3d.case.parts import Ground
from fe3d.errors import CaseError
from fe3d.flow.conductivity import bedding_normal, conductivity_tensors
from fe3d.mesh.build import build_mesh
from fe3d.mesh.materials import unit_materials

DAY = 86400.0


def _case(file: str):
    """A 40 m × 20 m × 4 m sand box (K_h 10, K_v 1 m/d) whose conductivity comes from ``file``."""
    return box_case(length=40.0, width=20.0, cell=5.0, dz=2.0, heads={"west": 1.0},
                    layers=[Layer("sand", -4.0, Material(10.0, 1.0, porosity=0.3,
                                                         bulk_density=1700.0,
                                                         conductivity_file=file))],
                    species=[Species("t")], time=Time(1.0, 1.0))


def _tensors(case, site, base_dir):
    mats, names = unit_materials(Ground.of(case), site)
    return conductivity_tensors(site.points, site.cells, site.cell_layer, mats,
                                unit_keys=[f"materials.{n}" for n in names], base_dir=base_dir)


def test_vtk_cell_array_on_the_same_mesh_is_taken_exactly(tmp_path):
    case = _case("k.vtu")
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
    case = _case("k.csv")
    site = build_mesh(case)
    _, principal = _tensors(case, site, tmp_path)
    xc = site.points[0, site.cells].mean(axis=0)
    np.testing.assert_allclose(principal[0], np.exp(0.05 * xc) / DAY, rtol=1e-9)


def test_bad_field_file_names_the_key(tmp_path):
    (tmp_path / "k.csv").write_text("x,y,z,k\n0,0,0,1\n")
    case = _case("k.csv")
    site = build_mesh(case)
    with pytest.raises(CaseError, match=r"materials\.sand\.conductivity_file"):
        _tensors(case, site, tmp_path)


def test_bedding_normal_horizontal_and_east_dip():
    np.testing.assert_allclose(bedding_normal(0.0, 0.0), [0.0, 0.0, 1.0], atol=1e-15)
    n = bedding_normal(0.0, np.pi / 6)  # strike north, dips east by 30°
    np.testing.assert_allclose(n, [0.5, 0.0, np.sqrt(3) / 2], atol=1e-15)


@pytest.mark.parametrize("content", [b"x [m],y [m]\n\xff\xfe\x00qzxq\n",
                                     b"x [m],y [m],z [m],conductivity [m/d]\n0,0,\x00,1\n"],
                         ids=["not-utf8", "nul-byte"])
def test_binary_field_file_is_one_error_naming_the_key(tmp_path, content):
    """A point-field file that is not UTF-8 text, or holds a NUL byte in a number, is one
    CaseError naming the key, not a traceback, and does not echo the bytes
    (issue 15's rule for data files; behaviour requirement, no outside reference)."""
    (tmp_path / "k.csv").write_bytes(content)
    case = _case("k.csv")
    site = build_mesh(case)
    with pytest.raises(CaseError, match=r"materials\.sand\.conductivity_file") as info:
        _tensors(case, site, tmp_path)
    assert "qzxq" not in str(info.value)
