"""The compact series file (VTKHDF) read back by VTK's own reader (``vtkHDFReader``, the
reader ParaView and pyvista use), and the per-file .vtu route read back by meshio and pyvista.

Reference: the VTKHDF file format specification, version 2 (Kitware, VTK documentation,
"VTKHDF File Format"), as implemented by VTK's reader: what that reader returns is the check,
not a reader of our own. Coordinates, cells and integer arrays are compared exactly; the
floating-point arrays (stored as float32) to float32 rounding (relative 2**-24 ≈ 6e-8, the
storage type's unit roundoff)."""

from __future__ import annotations

import h5py
import meshio
import numpy as np
import pytest
import pyvista as pv

from fe3d.post.series import SeriesFile, array_name, read_series, read_static

F32_ROUNDOFF = 2.0**-24  # unit roundoff of float32 (IEEE 754 binary32)


def _box_mesh(n: int) -> tuple[np.ndarray, np.ndarray]:
    """An n × n × n grid of unit cubes, each split into 6 tetrahedra (Kuhn's split)."""
    g = np.arange(n + 1, dtype=float)
    x, y, z = np.meshgrid(g, g, g, indexing="ij")
    points = np.vstack([x.ravel(), y.ravel(), z.ravel()])

    def node(i, j, k):
        return (i * (n + 1) + j) * (n + 1) + k

    kuhn = [(0, 1, 3, 7), (0, 1, 5, 7), (0, 2, 3, 7), (0, 2, 6, 7), (0, 4, 5, 7), (0, 4, 6, 7)]
    i, j, k = (a.ravel() for a in np.meshgrid(*(np.arange(n),) * 3, indexing="ij"))
    corner = [node(i + (c >> 2 & 1), j + (c >> 1 & 1), k + (c & 1)) for c in range(8)]
    cells = np.hstack([np.vstack([corner[a] for a in t]) for t in kuhn])
    return points, cells


def _read_steps(path):
    """Every step of a VTKHDF file through VTK's reader: (time values, grids)."""
    from vtkmodules.vtkIOHDF import vtkHDFReader

    reader = vtkHDFReader()
    reader.SetFileName(str(path))
    reader.UpdateInformation()
    grids, times = [], []
    for k in range(reader.GetNumberOfSteps()):
        reader.SetStep(k)
        reader.Update()
        grid = pv.wrap(reader.GetOutput()).copy()
        grids.append(grid)
        times.append(float(grid.field_data["Time"][0]))
    return times, grids


@pytest.fixture(scope="module")
def mesh():
    return _box_mesh(4)


def test_series_vtkhdf_gives_back_mesh_static_and_per_time_arrays(mesh, tmp_path):
    points, cells = mesh
    head = 10.0 - 0.01 * points[0]
    unit = (points[2, cells].mean(axis=0) > 2).astype(np.int32)
    flux = np.tile([1e-5, 0.0, -2e-7], (cells.shape[1], 1))
    times = [0.0, 2.0, 4.5]
    fields = [{"solvent [mg/L]": (1 + t) * np.exp(-points[0]) * 1e-3,
               "chloride [mg/L]": t * points[1] - 0.5} for t in times]
    path = tmp_path / "results.vtkhdf"
    with SeriesFile(path, points, cells, static_point_data={"head [m]": head},
                    static_cell_data={"unit_id": unit, "darcy_flux [m/d]": flux},
                    time_unit="yr") as series:
        for t, f in zip(times, fields, strict=True):
            series.add(t, f)
        largest = np.max([f["solvent [mg/L]"] for f in fields], axis=0)
        series.add_static(point_data={"solvent largest [mg/L]": largest})
    back_times, grids = _read_steps(path)
    assert back_times == times
    for grid, f in zip(grids, fields, strict=True):
        np.testing.assert_array_equal(grid.points, points.T)
        np.testing.assert_array_equal(grid.cells_dict[pv.CellType.TETRA], cells.T)
        np.testing.assert_allclose(grid.point_data["head [m]"], head, rtol=F32_ROUNDOFF)
        np.testing.assert_array_equal(grid.cell_data["unit_id"], unit)
        np.testing.assert_allclose(grid.point_data["solvent largest [mg per L]"], largest,
                                   rtol=F32_ROUNDOFF)
        np.testing.assert_allclose(grid.cell_data["darcy_flux [m per d]"], flux, rtol=F32_ROUNDOFF)
        for name, values in f.items():
            got = grid.point_data[array_name(name)]
            assert got.dtype == np.float32
            np.testing.assert_allclose(got, values, rtol=F32_ROUNDOFF, atol=0.0)
    with h5py.File(path) as h5:
        assert h5["fe3d"].attrs["time_unit"] == b"yr"
        assert h5["VTKHDF/Points"].shape == (points.shape[1], 3)  # the mesh once
    # fe3d's own readers: a static array once, equal to what VTK's reader shows at each time
    static = read_static(path, ["solvent largest [mg/L]"])["solvent largest [mg/L]"]
    assert static.shape == (points.shape[1],)
    np.testing.assert_array_equal(static, grids[0].point_data["solvent largest [mg per L]"])
    _, per_time = read_series(path, ["solvent [mg/L]"])
    for k, f in enumerate(fields):
        np.testing.assert_allclose(per_time["solvent [mg/L]"][k], f["solvent [mg/L]"],
                                   rtol=F32_ROUNDOFF, atol=0.0)


def test_series_vtkhdf_grows_by_the_per_time_arrays_only(tmp_path):
    """Issue 13's size target: each output time adds at most 2× one float32 array per
    species, the mesh being stored once (HDF5 chunk bookkeeping is the rest)."""
    points, cells = _box_mesh(24)  # 15 625 nodes
    n = points.shape[1]
    sizes = []
    for n_steps in (1, 5):
        path = tmp_path / f"s{n_steps}.vtkhdf"
        with SeriesFile(path, points, cells, time_unit="d") as series:
            for k in range(n_steps):
                series.add(float(k), {"a [mg/L]": points[0] * k, "b [mg/L]": points[1] + k})
        sizes.append(path.stat().st_size)
    per_step_and_species = (sizes[1] - sizes[0]) / 4 / 2
    assert per_step_and_species <= 2 * 4 * n
    assert per_step_and_species >= 4 * n  # the values themselves are there


def test_series_vtkhdf_without_times_is_a_static_grid(mesh, tmp_path):
    points, cells = mesh
    path = tmp_path / "flow.vtkhdf"
    SeriesFile(path, points, cells, static_point_data={"head [m]": points[0]},
               time_unit="d").close()
    grid = pv.read(path)
    np.testing.assert_array_equal(grid.point_data["head [m]"], points[0])
    assert grid.n_cells == cells.shape[1]


def test_series_vtkhdf_failed_run_leaves_no_file(mesh, tmp_path):
    points, cells = mesh
    path = tmp_path / "results.vtkhdf"
    with pytest.raises(ValueError, match="every output time must give"), \
            SeriesFile(path, points, cells, time_unit="d") as series:
        series.add(0.0, {"a [mg/L]": points[0]})
        series.add(1.0, {"b [mg/L]": points[0]})
    assert not path.exists()
    assert list(tmp_path.iterdir()) == []


def test_series_vtu_option_read_back_by_meshio_and_pyvista(mesh, tmp_path):
    """The per-file route kept as an option: each .vtu holds the mesh and the arrays."""
    from fe3d.mesh.site_mesh import SiteMesh
    from fe3d.post.vtk import write_field, write_pvd

    points, cells = mesh
    site = SiteMesh(points=points, cells=cells, cell_layer=np.zeros(cells.shape[1], int),
                    layer_names=("sand",), faces={})
    entries = []
    for k, t in enumerate((0.0, 3.0)):
        name = f"concentration_{k:04d}.vtu"
        write_field(site, tmp_path / name, point_data={"solvent [mg/L]": points[0] * t})
        entries.append((t, name))
    write_pvd(tmp_path / "concentration.pvd", entries, time_unit="yr")
    for t, name in entries:
        m = meshio.read(tmp_path / name)
        np.testing.assert_array_equal(m.point_data["solvent [mg/L]"], points[0] * t)
        g = pv.read(tmp_path / name)
        np.testing.assert_array_equal(g.point_data["solvent [mg/L]"], points[0] * t)
    reader = pv.get_reader(tmp_path / "concentration.pvd")
    assert reader.time_values == [0.0, 3.0]


def test_mesh_files_only_on_request_and_binary_msh_reads_back(mesh, tmp_path):
    """``write_mesh`` writes the formats asked for; the binary gmsh 2.2 file gives back the
    nodes, tetrahedra and units through meshio (the reader of the import route)."""
    from fe3d.mesh.site_mesh import SiteMesh
    from fe3d.post.vtk import write_mesh

    points, cells = mesh
    layer = (points[2, cells].mean(axis=0) > 2).astype(np.int64)
    site = SiteMesh(points=points, cells=cells, cell_layer=layer,
                    layer_names=("sand", "gravel"), faces={})
    assert write_mesh(site, tmp_path, formats=()) == []
    assert list(tmp_path.iterdir()) == []
    (path,) = write_mesh(site, tmp_path, formats=("msh",), msh_binary=True)
    m = meshio.read(path)
    np.testing.assert_array_equal(m.points.T, points)
    np.testing.assert_array_equal(m.get_cells_type("tetra").T, cells)
    np.testing.assert_array_equal(m.get_cell_data("gmsh:physical", "tetra") - 1, layer)


def test_pathlines_read_back_by_pyvista_with_times_in_the_display_unit(tmp_path):
    """Each polyline comes back with its vertices, its travel times in the display unit and
    its particle number; a line of one vertex is left out."""
    from fe3d.post.vtk import write_pathlines

    year = 3.15576e7
    lines = [(np.array([[0.0, 1.0, 2.0], [0.0, 0.5, 1.0], [5.0, 5.0, 4.0]]),
              np.array([0.0, 1.0, 2.5]) * year),
             (np.zeros((3, 1)), np.zeros(1)),
             (np.array([[9.0, 8.0], [1.0, 1.0], [2.0, 2.0]]), np.array([0.0, 3.0]) * year)]
    path = write_pathlines(tmp_path / "pathlines.vtp", lines, time_unit_seconds=year,
                           time_unit="yr")
    poly = pv.read(path)
    np.testing.assert_array_equal(poly.points, np.hstack([lines[0][0], lines[2][0]]).T)
    np.testing.assert_allclose(poly.point_data["travel_time [yr]"], [0.0, 1.0, 2.5, 0.0, 3.0],
                               rtol=1e-15)
    np.testing.assert_array_equal(poly.cell_data["particle"], [0, 2])
    assert poly.n_lines == 2
