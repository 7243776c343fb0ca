"""The long-term plume's outputs (fe3d/post/steady_outputs.py, fe3d/studies/long_term.py):
the files read back with the arrays and columns expected, in the case's units, and the
record agrees with them."""

from __future__ import annotations

import csv

import meshio
import numpy as np
import pytest

from fe3d.case import builder
from fe3d.case.builder import Layer, Material, Solver, Source, Species, Time, box_case
from fe3d.studies.long_term import long_term_plume

# Numbers are written with 8 significant digits: read back to 1e-7 relative.
WRITTEN = 1e-7


def _case():
    """A column 20 m × 1 m × 1 m (invented): v = 1 m/d, inlet 1 mg/L held on the west face
    for ever, a spill that stops (left out), half-life 10 d, limit 0.3 mg/L."""
    case = box_case(
        length=20.0, width=1.0, cell=1.0, dz=0.5, heads={"west": 0.5, "east": 0.0},
        layers=[Layer("sand", -1.0, Material(10.0, 10.0, porosity=0.25,
                                             longitudinal_dispersivity=1.0))],
        species=[Species("tracer", kd=0.1, half_life=10.0, limit=0.3)],
        sources=[Source("inlet", species="tracer", shape="face_patch", face="west",
                        concentration=1.0),
                 Source("spill", species="tracer", x=(5, 6), y=(0, 1), z=(-1, 0),
                        concentration=2.0, stop=30.0)],
        time=Time(100.0, 1.0), solver=Solver(linear_solver="direct"))
    return builder.with_changes(case, mesh={"corridor": False}, solver={"monotone": False})


def test_long_term_plume_writes_what_it_reports(tmp_path):
    result = long_term_plume(_case(), tmp_path)
    (tracer,) = result.species
    assert tracer.operator == "supg"
    assert tracer.counted_sources == ("inlet",)
    assert tracer.above_limit
    assert 0.0 < tracer.downstream < 20.0
    mesh = meshio.read(tmp_path / "steady_plume.vtu")
    field = mesh.point_data["tracer [mg/L]"]
    assert field.max() == pytest.approx(tracer.peak * 1e3, rel=WRITTEN)  # kg/m³ → mg/L
    with (tmp_path / "steady_plume.csv").open() as f:
        (row,) = list(csv.DictReader(f))
    assert row["limit [mg/L]"] == "0.3"
    assert float(row["downstream of source [m]"]) == pytest.approx(tracer.downstream,
                                                                     rel=WRITTEN)
    assert float(row["volume above limit [m3]"]) == pytest.approx(tracer.volume, rel=WRITTEN)
    assert row["sources counted"] == "inlet"
    assert row["sources left out"] == "spill"
    assert row["operator"] == "supg"
    balance = float(row["input [kg/d]"]) - float(row["outflow [kg/d]"]) - float(
        row["decayed [kg/d]"])
    assert abs(balance) <= 1e-6 * float(row["input [kg/d]"])  # 3 numbers at 8 digits
    # the node values above the limit lie in the measured region: none beyond it downstream
    above = mesh.points[field > 0.3, 0]
    assert np.all(above <= tracer.downstream + 1e-9)
