"""Mesh construction: conformity, volumes, tags, refinement and the .msh/.vtu round trip."""

from __future__ import annotations

from pathlib import Path

import meshio
import numpy as np
import pytest

from fe3d.case.builder import Layer, with_changes
from fe3d.case.load import load_case
from fe3d.mesh.build import build_mesh
from fe3d.post.vtk import write_mesh

TINY = Path(__file__).parents[3] / "cases" / "tiny" / "case.toml"


@pytest.fixture(scope="module")
def tiny_mesh():
    case = load_case(TINY)
    return case, build_mesh(case)


def test_mesh_is_conforming_and_positive(tiny_mesh):
    """Every interior triangle is shared by exactly two cells (no hanging faces); all
    volumes > 0; the volumes fill the box exactly (planar layers: exact to round-off)."""
    case, site = tiny_mesh
    cells = site.cells
    faces = np.sort(np.hstack([cells[[0, 1, 2]], cells[[0, 1, 3]], cells[[0, 2, 3]],
                               cells[[1, 2, 3]]]), axis=0)
    _, counts = np.unique(faces, axis=1, return_counts=True)
    assert counts.max() == 2
    n_boundary = int(np.sum(counts == 1))
    assert n_boundary == sum(t.shape[1] for t in site.faces.values())
    vol = site.cell_volumes()
    assert vol.min() > 0
    (x0, x1), (y0, y1) = case.box.x, case.box.y
    box_volume = (x1 - x0) * (y1 - y0) * (case.box.top - case.layers[-1].bottom)
    assert vol.sum() == pytest.approx(box_volume, rel=1e-12)


def test_unit_volumes_match_layer_thickness_with_sloping_bottom():
    """A planar sloping bottom: each unit's volume equals ∫ thickness dA, exact for planes."""
    case = with_changes(load_case(TINY), layers=[
        Layer("top_sand", 1.0, "sand", bottom_gradient=(0.01, -0.02)),
        Layer("silt_base", -1.0, "silt")])
    site = build_mesh(case)
    vol = site.cell_volumes()
    (x0, x1), (y0, y1) = case.box.x, case.box.y
    area = (x1 - x0) * (y1 - y0)
    xc, yc = 0.5 * (x1 - x0), 0.5 * (y1 - y0)  # mean of a plane over the box = value at centre
    mid_bottom = 1.0 + 0.01 * xc - 0.02 * yc
    expected = {"top_sand": area * (case.box.top - mid_bottom),
                "silt_base": area * (mid_bottom - (-1.0))}
    for i, name in enumerate(site.layer_names):
        assert vol[site.cell_layer == i].sum() == pytest.approx(expected[name], rel=1e-12)


def test_refinement_near_features(tiny_mesh):
    """Edges near the source are no longer than the fine size; far away the coarse size is
    approached (gmsh sizes are targets: allow 1.5× for the coarse bound)."""
    case, site = tiny_mesh
    src = case.sources[0]
    p = site.points
    edges = np.hstack([site.cells[[i, j]] for i in range(4) for j in range(i + 1, 4)])
    mid = p[:, edges].mean(axis=1)
    plan_len = np.linalg.norm(p[:2, edges[0]] - p[:2, edges[1]], axis=0)
    in_src = (mid[0] > src.x[0]) & (mid[0] < src.x[1]) & (mid[1] > src.y[0]) & (
        mid[1] < src.y[1])
    assert in_src.any()
    assert plan_len[in_src].max() <= case.mesh.fine_cell_size * 1.5
    far = mid[0] > 45.0
    assert plan_len[far].max() <= case.mesh.cell_size * 1.5
    assert plan_len[far].max() >= case.mesh.cell_size * 0.5


def test_msh_and_vtu_round_trip_keeps_tags_and_nodes(tiny_mesh, tmp_path):
    """meshio reads back the same nodes, cells, unit tags and face groups (atol 1e-12 m)."""
    _, site = tiny_mesh
    write_mesh(site, tmp_path)
    m = meshio.read(tmp_path / "mesh.msh")
    np.testing.assert_allclose(m.points.T, site.points, atol=1e-12)
    tets = m.get_cells_type("tetra")
    np.testing.assert_array_equal(tets.T, site.cells)
    phys = m.get_cell_data("gmsh:physical", "tetra")
    np.testing.assert_array_equal(phys - 1, site.cell_layer)
    for name in site.layer_names:
        assert m.field_data[name][1] == 3
    for name, tri in site.faces.items():
        tag, dim = m.field_data[name]
        assert dim == 2
        tris = m.get_cells_type("triangle")[m.get_cell_data("gmsh:physical", "triangle") == tag]
        np.testing.assert_array_equal(np.sort(tris, axis=1), np.sort(tri.T, axis=1))
    v = meshio.read(tmp_path / "mesh.vtu")
    np.testing.assert_allclose(v.points.T, site.points, atol=1e-12)
    np.testing.assert_array_equal(v.cell_data["unit_id"][0], site.cell_layer)


def test_skfem_mesh_carries_named_subdomains_and_boundaries(tiny_mesh):
    _, site = tiny_mesh
    mesh = site.skfem_mesh()
    assert set(mesh.subdomains) == set(site.layer_names)
    assert set(mesh.boundaries) == {"west", "east", "south", "north", "top", "bottom"}
    assert sum(len(v) for v in mesh.boundaries.values()) == mesh.boundary_facets().size
