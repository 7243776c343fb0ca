"""The import route (``mesh.import_file``): a meshio-readable tetrahedral mesh with unit tags is
used instead of the built-in mesher.

Sources of the expected values:
- A mesh fe3d wrote itself (.msh with named physical groups, .vtu with unit numbers) must come
  back with the same nodes, tetrahedra, unit of every cell and named faces (exact by
  construction: a file round trip through meshio, a general-purpose reference library).
- A box of 6 × 2 × 3 cubes, each cut into the six Kuhn tetrahedra around its main diagonal
  (Kuhn 1960, "Some combinatorial lemmas in topology", IBM J. Res. Dev. 4(5)), made here
  with numpy and meshio only: unit volumes and face areas are those of the box
  (length × width × height; exact up to round-off).
"""

from __future__ import annotations

from pathlib import Path

import meshio
import numpy as np
import pytest

from fe3d.case.builder import with_changes
from fe3d.case.load import load_case
from fe3d.case.schema import Case
from fe3d.errors import MeshError
from fe3d.mesh.build import build_mesh
from fe3d.post.vtk import write_mesh

pytestmark = pytest.mark.verification

ROOT = Path(__file__).resolve().parents[2]
TINY = ROOT / "cases" / "tiny" / "case.toml"


def import_case(folder: Path, mesh_name: str) -> Case:
    """The tiny case (box 60 m × 20 m, ground 5 m, top_sand to 1 m, silt_base to -1 m) with
    ``mesh.import_file`` set to ``mesh_name`` in ``folder``."""
    return with_changes(load_case(TINY), mesh={"import_file": str(folder / mesh_name)})


def tri_set(tri: np.ndarray) -> set[tuple[int, ...]]:
    return {tuple(sorted(int(v) for v in t)) for t in tri.T}


def unit_of_cells(site) -> list[str]:
    return [site.layer_names[i] for i in site.cell_layer]


def triangle_area(points: np.ndarray, tri: np.ndarray) -> float:
    a, b, c = (points[:, tri[i]] for i in range(3))
    return float(0.5 * np.linalg.norm(np.cross(b - a, c - a, axis=0), axis=0).sum())


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    """The tiny case meshed by fe3d and written as mesh.msh and mesh.vtu."""
    folder = tmp_path_factory.mktemp("built")
    site = build_mesh(load_case(TINY))
    write_mesh(site, folder)
    return site, folder


@pytest.mark.parametrize("name", ["mesh.msh", "mesh.vtu"])
def test_fe3d_mesh_comes_back_through_the_import_route(built, tmp_path, name):
    """.msh (named physical groups, tagged faces) and .vtu (unit numbers, no faces: faces
    from the case outline) give back the nodes (1e-12 m), tetrahedra, units and faces."""
    site, folder = built
    (tmp_path / name).write_bytes((folder / name).read_bytes())
    back = build_mesh(import_case(tmp_path, name))
    assert back.report.origin == "imported" and back.report.origin_path.endswith(name)
    np.testing.assert_allclose(back.points, site.points, atol=1e-12)
    assert back.n_cells == site.n_cells
    np.testing.assert_array_equal(np.sort(back.cells, axis=0), np.sort(site.cells, axis=0))
    assert back.layer_names == site.layer_names
    assert unit_of_cells(back) == unit_of_cells(site)
    assert set(back.faces) == set(site.faces)
    for face, tri in site.faces.items():
        assert tri_set(back.faces[face]) == tri_set(tri), face
    assert back.cell_volumes().min() > 0
    assert back.report.quality.cells == site.n_cells


def kuhn_box(nx: int, ny: int, nz: int, x: float, y: float, z0: float, z1: float):
    """Points (n, 3) and tetrahedra (m, 4) of a box cut into nx·ny·nz cubes × 6 Kuhn
    tetrahedra (paths 0 → 7 along the three axes in every order)."""
    gx, gy, gz = np.linspace(0, x, nx + 1), np.linspace(0, y, ny + 1), np.linspace(z0, z1, nz + 1)
    pts = np.array([(a, b, c) for c in gz for b in gy for a in gx])

    def nid(i, j, k):
        return i + (nx + 1) * (j + (ny + 1) * k)

    tets = []
    orders = [(0, 1, 2), (0, 2, 1), (1, 0, 2), (1, 2, 0), (2, 0, 1), (2, 1, 0)]
    for k in range(nz):
        for j in range(ny):
            for i in range(nx):
                for order in orders:
                    p = [i, j, k]
                    path = [nid(*p)]
                    for axis in order:
                        p[axis] += 1
                        path.append(nid(*p))
                    tets.append(path)
    return pts, np.array(tets)


def test_hand_made_meshio_mesh_with_named_units(tmp_path):
    """A Kuhn box mesh made with meshio (named gmsh physical groups on the tetrahedra, no
    triangles): unit volumes and face areas equal the box's (1e-9 relative)."""
    pts, tets = kuhn_box(6, 2, 3, 60.0, 20.0, -1.0, 5.0)  # levels -1, 1, 3, 5
    zc = pts[tets, 2].mean(axis=1)
    phys = np.where(zc > 1.0, 7, 9).astype(np.int32)  # arbitrary tag numbers, named below
    mesh = meshio.Mesh(pts, [("tetra", tets)],
                       cell_data={"gmsh:physical": [phys], "gmsh:geometrical": [phys]},
                       field_data={"top_sand": np.array([7, 3]), "silt_base": np.array([9, 3])})
    meshio.write(tmp_path / "hand.msh", mesh, file_format="gmsh22", binary=False)
    site = build_mesh(import_case(tmp_path, "hand.msh"))
    assert site.n_cells == 6 * 2 * 3 * 6
    vol = site.cell_volumes()
    assert vol.min() > 0  # the reader orients every tetrahedron positively
    by_unit = {n: float(vol[site.cell_layer == i].sum()) for i, n in enumerate(site.layer_names)}
    assert by_unit["top_sand"] == pytest.approx(60 * 20 * 4.0, rel=1e-9)
    assert by_unit["silt_base"] == pytest.approx(60 * 20 * 2.0, rel=1e-9)
    areas = {f: triangle_area(site.points, t) for f, t in site.faces.items()}
    expected = {"west": 20 * 6.0, "east": 20 * 6.0, "south": 60 * 6.0, "north": 60 * 6.0,
                "top": 60 * 20.0, "bottom": 60 * 20.0}
    assert set(areas) == set(expected)
    for f, a in expected.items():
        assert areas[f] == pytest.approx(a, rel=1e-9), f
    assert np.allclose(site.points[2, np.unique(site.faces["top"])], 5.0)
    assert np.allclose(site.points[0, np.unique(site.faces["west"])], 0.0)


def bad_import(tmp_path: Path, mesh: meshio.Mesh | None, name: str = "bad.msh",
               fmt: str = "gmsh22") -> str:
    if mesh is not None:
        meshio.write(tmp_path / name, mesh, file_format=fmt, **(
            {"binary": False} if fmt == "gmsh22" else {}))
    with pytest.raises(MeshError) as info:
        build_mesh(import_case(tmp_path, name))
    line = str(info.value)
    assert "\n" not in line
    assert line.startswith(f"mesh.import_file = '{tmp_path / name}': ")
    return line


def test_bad_import_no_tetrahedra(tmp_path):
    pts = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0]], dtype=float)
    tri = meshio.Mesh(pts, [("triangle", np.array([[0, 1, 2]]))])
    line = bad_import(tmp_path, tri, "flat.vtu", "vtu")
    assert "holds no tetrahedra (found triangle" in line


def test_bad_import_unknown_unit_name(tmp_path):
    pts, tets = kuhn_box(2, 1, 1, 60.0, 20.0, -1.0, 5.0)
    phys = np.full(len(tets), 4, dtype=np.int32)
    mesh = meshio.Mesh(pts, [("tetra", tets)],
                       cell_data={"gmsh:physical": [phys], "gmsh:geometrical": [phys]},
                       field_data={"gravel": np.array([4, 3])})
    line = bad_import(tmp_path, mesh)
    assert "unit tag 'gravel' of the mesh names no layer or lens of the case" in line
    assert "'top_sand', 'silt_base'" in line


def test_bad_import_unknown_unit_number(tmp_path):
    pts, tets = kuhn_box(2, 1, 1, 60.0, 20.0, -1.0, 5.0)
    mesh = meshio.Mesh(pts, [("tetra", tets)],
                       cell_data={"unit_id": [np.full(len(tets), 5, dtype=np.int32)]})
    line = bad_import(tmp_path, mesh, "numbers.vtu", "vtu")
    assert "unit tag 5 (unit_id) has no name in the file and is not a unit number" in line


def test_bad_import_missing_tags(tmp_path):
    pts, tets = kuhn_box(2, 1, 1, 60.0, 20.0, -1.0, 5.0)
    line = bad_import(tmp_path, meshio.Mesh(pts, [("tetra", tets)]), "untagged.vtu", "vtu")
    assert "has no unit tags on its tetrahedra" in line


def test_bad_import_missing_file_and_missing_face(tmp_path):
    line = bad_import(tmp_path, None, "absent.msh")
    assert "cannot be read as a mesh" in line
    # tagged triangles that miss a face the case needs
    pts, tets = kuhn_box(2, 1, 1, 60.0, 20.0, -1.0, 5.0)
    top = np.array([[4, 5, 10], [5, 11, 10]])  # some triangle; only 'top' is tagged
    mesh = meshio.Mesh(pts, [("tetra", tets), ("triangle", top)],
                       cell_data={"gmsh:physical": [np.full(len(tets), 1, dtype=np.int32),
                                                    np.full(2, 200, dtype=np.int32)],
                                  "gmsh:geometrical": [np.full(len(tets), 1, dtype=np.int32),
                                                       np.full(2, 200, dtype=np.int32)]},
                       field_data={"top_sand": np.array([1, 3]), "top": np.array([200, 2])})
    line = bad_import(tmp_path, mesh, "partial.msh")
    assert "the mesh has no boundary face 'west'" in line


def test_mesh_not_following_the_outline(tmp_path):
    """A box mesh 10 m narrower than the case's box: its east side lies on no edge."""
    pts, tets = kuhn_box(2, 1, 1, 50.0, 20.0, -1.0, 5.0)
    mesh = meshio.Mesh(pts, [("tetra", tets)],
                       cell_data={"unit_id": [np.zeros(len(tets), dtype=np.int32)]})
    line = bad_import(tmp_path, mesh, "narrow.vtu", "vtu")
    assert "steep boundary triangles lie on no edge of the case's boundary" in line
