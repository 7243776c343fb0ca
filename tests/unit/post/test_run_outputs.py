"""The files a run writes for its receptors, plume measures and the fields over the run,
read back (meshio, csv, json) and compared with what they are computed from."""

from __future__ import annotations

import csv
import json
from pathlib import Path

import meshio
import numpy as np
import pytest
from _readings import peak_bracket

from fe3d.case.builder import with_changes
from fe3d.case.load import load_case
from fe3d.case.parts import Ground, TransportInputs
from fe3d.mesh.materials import cell_values, unit_materials, unit_values
from fe3d.pipeline import mesh_and_flow, run_case
from fe3d.post.plume import SorbedPhase, measure_plume, measuring_frames
from fe3d.transport.run import run_transport

TINY = Path(__file__).parents[3] / "cases" / "tiny" / "case.toml"
PUMP = {"name": "fence_pump", "x": "40 m", "y": "10 m", "screens": [["4 m", "2 m"]],
        "rate": "3 m^3/d"}


@pytest.fixture(scope="module")
def run_folder(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The tiny case with a pumping well, run once into a fresh folder."""
    out = tmp_path_factory.mktemp("tiny_run")
    run_case(with_changes(load_case(TINY), wells=[PUMP], output={"vtu_series": True}), out,
             base_dir=TINY.parent)
    return out


def _rows(path: Path) -> list[dict[str, str]]:
    with path.open(encoding="utf-8") as f:
        return list(csv.DictReader(f))


@pytest.mark.slow
def test_fields_over_the_run_are_the_largest_of_the_series(run_folder):
    """over_the_run.vtu holds, per node, the largest value over every time step: at least
    the largest of the concentration series (the output times are steps too), and equal to
    it (the same numbers, the same scaling) where the time it was reached is an output time;
    a first time above the limit wherever a series field is above it, no later than the
    first output time above it."""
    series = sorted(run_folder.glob("concentration_*.vtu"))
    fields = np.array([meshio.read(p).point_data["tracer [mg/L]"] for p in series])
    over = meshio.read(run_folder / "over_the_run.vtu").point_data
    assert set(over) >= {"tracer largest [mg/L]", "tracer time of largest [d]",
                         "tracer first above limit [d]"}
    out_times = np.array([float(r["time [d]"]) for r in _rows(run_folder / "plume.csv")])
    largest, when = over["tracer largest [mg/L]"], over["tracer time of largest [d]"]
    assert np.all(largest >= fields.max(axis=0))
    tol = 1e-6 * out_times[-1]  # written to 8 significant digits
    at_output = np.min(np.abs(when[:, None] - out_times[None, :]), axis=1) <= tol
    assert at_output.any() and not at_output.all()  # peaks between output times are kept
    np.testing.assert_array_equal(largest[at_output], fields.max(axis=0)[at_output])
    above = fields > 0.01  # the limit, 10 ug/L
    first = over["tracer first above limit [d]"]
    ever = above.any(axis=0)
    assert np.all(np.isfinite(first[ever]))
    assert np.all(np.isfinite(first) == (largest > 0.01))
    k = np.argmax(above, axis=0)[ever]
    assert np.all(first[ever] <= out_times[k] + tol)


@pytest.mark.slow
def test_receptor_table_and_summary_agree_with_the_csv(run_folder):
    """Each receptor's peak in summary.json lies between the largest of its rows in
    receptors.csv (one per time step) and the vertex of the parabola through that row and its
    neighbours (8 significant digits there, so rel 1e-7);
    its mass out is the last row's; the well pumps its rate (3 m³/d)."""
    rows = _rows(run_folder / "receptors.csv")
    summary = json.loads((run_folder / "summary.json").read_text(encoding="utf-8"))
    report = (run_folder / "report.md").read_text(encoding="utf-8")
    names = {r["receptor"] for r in rows}
    assert names == {"fence_pump", "east"}
    assert {r["name"] for r in summary["receptors"]} == names
    for rec in summary["receptors"]:
        mine = [r for r in rows if r["receptor"] == rec["name"]]
        (low, high), _ = peak_bracket(
            [float(r["time [d]"]) for r in mine],
            [float(r["flux-averaged concentration [mg/L]"]) for r in mine])
        assert low * (1.0 - 1e-7) <= rec["peak"] * 1e3 <= high * (1.0 + 1e-7)
        assert rec["mass_out"] == pytest.approx(float(mine[-1]["mass out since start [kg]"]),
                                                rel=1e-7)
        assert f"| {rec['name']} | {rec['kind']} | tracer |" in report
    (pump,) = [r for r in summary["receptors"] if r["name"] == "fence_pump"]
    assert pump["water_rate"] * 86400 == pytest.approx(3.0, rel=1e-9)
    assert "## What leaves the model" in report


def test_measures_below_every_value_are_the_budgets_masses():
    """With the level below every value the region is the whole model, and the exact
    integrals ∫θc and ∫ρ_b K_d c of the P1 field equal the transport's budget, which sums
    the same integrals node by node (∫θφ_j, ∫ρ_b K_d φ_j; theory.md T9): round-off of sums
    over ~10⁴ cells, 1e-12 relative."""
    case = load_case(TINY)
    site, flow = mesh_and_flow(case)
    snap = list(run_transport(site, flow, TransportInputs.of(case)))[1]  # the first output
    mats, names = unit_materials(Ground.of(case), site)
    sorbed = SorbedPhase(unit_values(mats, "bulk_density"), site.cell_layer,
                         tuple(case.species["tracer"].isotherm_of(m) for m in names))
    frames = measuring_frames(case, site, flow)
    assert frames["tracer"].origin == (10.0, 10.0)  # the source box's plan centre
    c = snap.concentration["tracer"]
    m = measure_plume(site.points, site.cells, site.cell_volumes(),
                      cell_values(mats, site, "porosity"), sorbed, c, c.min() - 1.0,
                      frames["tracer"])
    b = snap.budgets["tracer"]
    assert m.dissolved_mass == pytest.approx(b.dissolved, rel=1e-12)
    assert m.sorbed_mass == pytest.approx(b.sorbed, rel=1e-12)
    assert m.volume == pytest.approx(float(np.abs(site.cell_volumes()).sum()), rel=1e-12)


def test_writer_measures_the_same_with_the_flow_given_first_or_at_the_end(tmp_path):
    """SeriesWriter measures each snapshot as it arrives when it has the flow, or keeps the
    snapshots for finish() when not: plume.csv and receptors.csv are the same text."""
    import time

    from fe3d.case.parts import TravelInputs
    from fe3d.flow.paths import travel_paths
    from fe3d.post.outputs import SeriesWriter

    case = with_changes(load_case(TINY), wells=[PUMP])
    site, flow = mesh_and_flow(case)
    paths = travel_paths(site, flow, TravelInputs.of(case))
    porosity = cell_values(unit_materials(Ground.of(case), site)[0], site, "porosity")
    snaps = list(run_transport(site, flow, TransportInputs.of(case)))
    texts = []
    for name, given in (("first", flow), ("end", None)):
        out = tmp_path / name
        out.mkdir()
        writer = SeriesWriter(out, case, site, porosity, flow=given)
        for snap in snaps:
            writer.add(snap)
        writer.finish(flow, paths, [], time.perf_counter())
        texts.append([(out / f).read_text(encoding="utf-8")
                      for f in ("plume.csv", "receptors.csv")])
    assert texts[0] == texts[1]
