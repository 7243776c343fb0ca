"""The figures and the compact series of a run, from the records of the stages, on the tiny
case with a pumping well added (an invented variant).

Reference for the series: VTK's own reader (``vtkHDFReader``, VTKHDF specification version 2,
Kitware) gives back the head and every output time; the arrays are float32 (relative
tolerance 2**-24, the storage type's unit roundoff). The figures are behaviour checks (each
written as a readable PNG, the capture zone present only where a well pumps); the pictures
were looked at on the demo.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from fe3d.case.load import parse_case
from fe3d.case.parts import FlowInputs, TravelInputs
from fe3d.flow.drawdown import well_drawdown
from fe3d.flow.paths import travel_paths
from fe3d.flow.solve import solve_flow
from fe3d.mesh.build import build_mesh
from fe3d.post.run_figures import PlumeFigures, head_map_elevation, write_head_figure
from fe3d.post.series import SeriesFile

TINY = Path(__file__).parents[3] / "cases" / "tiny" / "case.toml"
WELL = """
[[wells]]
name = "PW-1"
x = "45 m"
y = "10 m"
screens = [["3 m", "0 m"]]
rate = "20 m^3/d"
"""
F32_ROUNDOFF = 2.0**-24


@pytest.fixture(scope="module")
def pumped():
    text = TINY.read_text().replace("[time]", WELL + "\n[time]")
    case = parse_case(text, base_dir=TINY.parent)
    site = build_mesh(case)
    flow = solve_flow(site, FlowInputs.of(case))
    return case, site, flow, travel_paths(site, flow, TravelInputs.of(case))


def _png(path: Path) -> None:
    with Image.open(path) as image:
        assert image.format == "PNG" and min(image.size) > 300


def test_run_figures_of_a_pumped_case(pumped, tmp_path):
    case, site, flow, paths = pumped
    assert head_map_elevation(case, site) == pytest.approx(1.5)  # mid-screen
    drawdown = well_drawdown(site, FlowInputs.of(case), flow)
    assert drawdown.max() > 0.0  # the pump lowers the head
    (tmp_path / "rise").mkdir()
    _png(tmp_path / "rise" / write_head_figure(tmp_path / "rise", case, site, flow, paths,
                                               drawdown=-drawdown)[0])  # an injection's rise
    files = write_head_figure(tmp_path, case, site, flow, paths, head_unit="ft",
                              drawdown=drawdown)
    figures = PlumeFigures(tmp_path, case, site, flow)
    limit = case.species["tracer"].limit
    for k, t in enumerate((0.5, 1.0)):
        c = 1e3 * limit * t * np.exp(-((site.points[0] - 10.0 - 20.0 * t) / 8.0) ** 2
                                     - ((site.points[1] - 10.0) / 4.0) ** 2)
        files += figures.add(k, t * 3.15576e7, {"tracer": c},
                             {"tracer": (100.0 * t, 1e-3 * t)})
    files += figures.finish()
    expected = {"head_map.png", "plan_tracer_0000.png", "plan_tracer_0001.png",
                "plan_tracer_run.png", "section_tracer_run.png", "plume_size.png"}
    assert expected <= set(files)
    for name in files:
        _png(tmp_path / name)


def test_series_of_a_run_holds_the_flow_once_and_every_time(pumped, tmp_path):
    """The series as a run writes it (flow arrays stored once, concentrations per output
    time), read back by VTK's reader."""
    from vtkmodules.vtkIOHDF import vtkHDFReader

    _, site, flow, _ = pumped
    per_day = 86400.0
    fields = [{"tracer [mg/L]": site.points[0] * t} for t in (0.0, 0.5, 1.0)]
    path = tmp_path / "results.vtkhdf"
    with SeriesFile(path, site.points, site.cells,
                    static_point_data={"head [m]": flow.head},
                    static_cell_data={"unit_id": site.cell_layer.astype(np.int32),
                                      "darcy_flux [m/d]": (flow.darcy_flux * per_day).T},
                    time_unit="yr") as series:
        for t, f in zip((0.0, 0.5, 1.0), fields, strict=True):
            series.add(t, f)
    reader = vtkHDFReader()
    reader.SetFileName(str(path))
    reader.UpdateInformation()
    assert reader.GetNumberOfSteps() == 3
    import pyvista as pv

    for k, f in enumerate(fields):
        reader.SetStep(k)
        reader.Update()
        grid = pv.wrap(reader.GetOutput())
        np.testing.assert_allclose(grid.point_data["head [m]"], flow.head, rtol=F32_ROUNDOFF)
        np.testing.assert_allclose(grid.cell_data["darcy_flux [m per d]"],
                                   (flow.darcy_flux * per_day).T, rtol=F32_ROUNDOFF,
                                   atol=F32_ROUNDOFF * np.abs(flow.darcy_flux).max() * per_day)
        np.testing.assert_allclose(grid.point_data["tracer [mg per L]"], f["tracer [mg/L]"],
                                   rtol=F32_ROUNDOFF)
        np.testing.assert_array_equal(grid.cell_data["unit_id"], site.cell_layer)


def test_site_features_of_the_pumped_case(pumped):
    """What a plan map marks, read from the case: the outline, the fixed-head edges, the
    source's box and every well and observation point (behaviour test)."""
    from fe3d.post.maps import site_features

    case = pumped[0]
    f = site_features(case)
    assert f.site == "Pellet Lane test box (invented)"
    np.testing.assert_allclose(np.sort(f.outline.xy[0]), [0.0, 0.0, 60.0, 60.0])
    assert sorted(e.name for e in f.fixed_head_edges) == ["east", "west"]
    (area,) = f.source_areas
    assert area.name == "drum_spill" and area.closed
    np.testing.assert_allclose(area.xy, [[8, 12, 12, 8], [8, 8, 12, 12]])
    assert {(m.name, m.kind) for m in f.marks} == {
        ("PW-1", "extraction"), ("BH-A", "monitoring"), ("fence_well", "receptor")}


def test_cells_under_the_top_face_are_those_numpy_finds(pumped) -> None:
    """The flow arrows of ``heads_plan.png`` sit on the cells with three corners on the top
    face; counted a corner at a time they are exactly the cells numpy's ``isin`` finds
    (the reference library; equality, no tolerance)."""
    from fe3d.post.outputs import _cells_on_face

    site = pumped[1]
    top = site.faces["top"]
    want = np.isin(site.cells, np.unique(top)).sum(axis=0) >= 3
    got = _cells_on_face(site, top)
    assert want.any()
    np.testing.assert_array_equal(got, want)
