"""Receptors sampled at every time step (SeriesWriter with ``receptors_every_step``): the
rows, results and ``receptors.csv`` equal those of the same run written with an output at
every step, and the output times alone miss part of the peak.

Reference: the receptor values at output times, checked against the transport's own mass
budget in tests/verification/test_well_receptor.py; here the every-step path must reproduce
them at every step. The transport runs once with an output at every step; the coarse run is
those snapshots thinned to every fifth step, with the receptor columns (the writer's
``receptor_probe`` applied to each step's field) under the histories, as the transport
makes them when handed the probe.
"""

from __future__ import annotations

import csv
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest

from fe3d.case.builder import with_changes
from fe3d.case.load import load_case
from fe3d.case.parts import TransportInputs, TravelInputs
from fe3d.flow.paths import travel_paths
from fe3d.pipeline import mesh_and_flow
from fe3d.post.outputs import SeriesWriter
from fe3d.post.tables import write_receptor_table
from fe3d.transport.run import run_transport

TINY = Path(__file__).parents[3] / "cases" / "tiny" / "case.toml"
EPS = np.finfo(float).eps
EVERY = 5  # output times every fifth step in the coarse run


@pytest.fixture(scope="module")
def stepped():
    """The tiny case with a pump 10 m down-gradient of the spill; 10 d steps to 400 d, an
    output at every step."""
    pump = {"name": "fence_pump", "x": "30 m", "y": "10 m", "screens": [["4 m", "2 m"]],
            "rate": "3 m^3/d"}
    case = with_changes(load_case(TINY), wells=[pump],
                        time={"end": "400 d", "step": "10 d", "output_interval": "10 d"})
    site, flow = mesh_and_flow(case)
    snaps = list(run_transport(site, flow, TransportInputs.of(case)))
    return case, site, flow, snaps


def _write(folder: Path, case, site, flow, snaps, *, every_step: bool) -> SeriesWriter:
    folder.mkdir()
    writer = SeriesWriter(folder, case, site, flow.porosity, flow=flow, figures=False,
                          receptors_every_step=every_step)
    for s in snaps:
        writer.add(s)
    return writer


def _coarse(writer: SeriesWriter, snaps):
    """Every fifth snapshot, its histories carrying the receptor columns of every step."""
    probe = writer.receptor_probe
    columns = {sp: np.array([probe @ s.concentration[sp] for s in snaps])
               for sp in snaps[0].concentration}
    out = []
    for k in range(0, len(snaps), EVERY):
        s = snaps[k]
        history = {sp: np.hstack([s.history[sp], columns[sp][:k + 1]]) for sp in s.history}
        out.append(replace(s, history=history))
    return out


def test_every_step_receptors_equal_an_output_at_every_step(stepped, tmp_path):
    """Rows at every step; concentrations equal to 1e3 ε of the peak (the same weighted sum
    in another order, ~10 terms); the mass out is the budget's at output times and blank
    between; peak, crossings and time above the limit equal the fine run's (to 1e-9 of the
    run's length: the crossings are interpolated from the same values)."""
    case, site, flow, snaps = stepped
    assert len(snaps) == 41
    fine = _write(tmp_path / "fine", case, site, flow, snaps, every_step=False)
    probe_writer = SeriesWriter(tmp_path / "probe", case, site, flow.porosity, flow=flow,
                                figures=False)
    coarse = _write(tmp_path / "coarse", case, site, flow, _coarse(probe_writer, snaps),
                    every_step=True)
    key = {(r.receptor, r.species, r.time): r for r in fine.receptor_rows}
    assert len(coarse.receptor_rows) == len(fine.receptor_rows) == 41 * len(fine.receptors)
    peak = max(r.concentration for r in fine.receptor_rows)
    assert peak > case.species["tracer"].limit  # the plume reaches the pump
    outputs = {s.time for s in snaps[::EVERY]}
    for r in coarse.receptor_rows:
        ref = key[r.receptor, r.species, r.time]
        assert r.concentration == pytest.approx(ref.concentration, abs=1e3 * EPS * peak)
        assert r.mass_flux == pytest.approx(ref.mass_flux, abs=1e3 * EPS * peak * r.water_rate)
        if r.time in outputs:
            assert r.mass_out == ref.mass_out
        else:
            assert np.isnan(r.mass_out)
    length = snaps[-1].time
    fine_results = {(x.name, x.species): x for x in fine._receptor_results()}
    for x in coarse._receptor_results():
        ref = fine_results[x.name, x.species]
        assert x.peak == pytest.approx(ref.peak, abs=1e3 * EPS * peak)
        assert x.peak_time == pytest.approx(ref.peak_time, abs=1e-9 * length)
        assert x.mass_out == ref.mass_out
        for a, b in ((x.first_above_limit, ref.first_above_limit),
                     (x.last_above_limit, ref.last_above_limit)):
            assert (a is None) == (b is None)
            if a is not None:
                assert a == pytest.approx(b, abs=1e-9 * length)
        assert x.time_above_limit == pytest.approx(ref.time_above_limit, abs=1e-9 * length)


def test_output_times_alone_shift_the_crossings(stepped, tmp_path):
    """The same thinned run without the receptor columns: its first time above the limit at
    the pump (interpolated between output times 50 d apart) is off by more than half a 10 d
    step here, so is the time above the limit (behaviour: measured 9.9 d for both when
    written, with linear crossings)."""
    case, site, flow, snaps = stepped
    probe_writer = SeriesWriter(tmp_path / "probe", case, site, flow.porosity, flow=flow,
                                figures=False)
    with_columns = _coarse(probe_writer, snaps)
    every = _write(tmp_path / "every", case, site, flow, with_columns, every_step=True)
    thinned = [replace(s, history={sp: h[:, :len(case.observation_points)]
                                   for sp, h in s.history.items()}) for s in with_columns]
    sparse = _write(tmp_path / "sparse", case, site, flow, thinned, every_step=False)
    a = {x.name: x for x in every._receptor_results()}["fence_pump"]
    b = {x.name: x for x in sparse._receptor_results()}["fence_pump"]
    step = snaps[1].time - snaps[0].time
    assert a.first_above_limit is not None and b.first_above_limit is not None
    assert abs(a.first_above_limit - b.first_above_limit) > 0.5 * step, (a, b)
    assert abs(a.time_above_limit - b.time_above_limit) > 0.5 * step, (a, b)


def test_receptor_table_appended_as_the_run_goes_equals_one_write(stepped, tmp_path):
    """receptors.csv begun at the first output time and appended after equals one write of
    all the rows, byte for byte; rows between output times leave the mass out blank."""
    case, site, flow, snaps = stepped
    probe_writer = SeriesWriter(tmp_path / "probe", case, site, flow.porosity, flow=flow,
                                figures=False)
    writer = _write(tmp_path / "run", case, site, flow, _coarse(probe_writer, snaps),
                    every_step=True)
    whole = write_receptor_table(tmp_path / "whole.csv", writer.receptor_rows, time_unit="d",
                                 conc_unit="mg/L")
    written = tmp_path / "run" / "receptors.csv"
    assert written.read_bytes() == whole.read_bytes()
    with written.open(newline="") as f:
        rows = list(csv.reader(f))[1:]
    blank = [r for r in rows if r[-1] == ""]
    assert len(blank) == len(rows) - len(writer.receptors) * len(snaps[::EVERY])


def test_every_step_needs_the_flow(stepped, tmp_path):
    case, site, flow, _ = stepped
    with pytest.raises(ValueError, match="needs the flow"):
        SeriesWriter(tmp_path, case, site, flow.porosity, receptors_every_step=True)


def test_finish_reports_every_step_results(stepped, tmp_path):
    """The summary's receptor results are the every-step ones (behaviour)."""
    case, site, flow, snaps = stepped
    probe_writer = SeriesWriter(tmp_path / "probe", case, site, flow.porosity, flow=flow,
                                figures=False)
    writer = _write(tmp_path / "run", case, site, flow, _coarse(probe_writer, snaps),
                    every_step=True)
    summary = writer.finish(flow, travel_paths(site, flow, TravelInputs.of(case)), [], 0.0)
    assert {(r.name, r.peak) for r in summary.receptors} == {
        (r.name, r.peak) for r in writer._receptor_results()}


def test_without_the_receptor_columns_the_output_times_are_used(stepped, tmp_path, caplog):
    """A transport not handed the probe: the writer says so once per output time in the log
    and keeps the output-time rows, as a writer without ``receptors_every_step`` does."""
    case, site, flow, snaps = stepped
    thinned = snaps[::EVERY]
    plain = _write(tmp_path / "plain", case, site, flow, thinned, every_step=False)
    with caplog.at_level("WARNING", logger="fe3d.post.outputs"):
        asked = _write(tmp_path / "asked", case, site, flow, thinned, every_step=True)
    assert "receptors at output times only" in caplog.text
    assert asked.receptor_rows == plain.receptor_rows
