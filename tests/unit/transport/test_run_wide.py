"""The fields over the run (theory.md O4) are folded in at every time step, and extra rows
given to the transport are sampled at every step.

The reference is the run itself with an output at every step (a property of the code, not
a published value): the same steps, so the fold over the snapshots of that run must equal
the fields over the run of a run with three output times, exactly.
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp

from fe3d.case.builder import (
    Layer,
    Material,
    ObservationPoint,
    Solver,
    Source,
    Species,
    Time,
    box_case,
)
from fe3d.case.parts import TransportInputs
from fe3d.pipeline import mesh_and_flow
from fe3d.transport.run import run_transport
from fe3d.transport.run_wide import RunWideField


def _column(time: Time) -> object:
    """A 30 m sand column fed at its west face for 3 d (a pulse: every node's peak passes
    between output times), observed at one point."""
    return box_case(
        length=30.0, width=1.0, cell=1.0, dz=1.0, heads={"west": 1.5, "east": 0.0},
        layers=[Layer("sand", -2.0, Material(10.0, 10.0, porosity=0.3,
                                              longitudinal_dispersivity=0.5,
                                              transverse_dispersivity=0.05))],
        species=[Species("tracer", options={"limit": "1 mg/L"})],
        sources=[Source("inlet", species="tracer", shape="face_patch", face="west",
                        concentration="100 mg/L", stop=3.0)],
        observation_points=[ObservationPoint("p10", 10.0, 0.5, z=-1.0)],
        time=time, solver=Solver(linear_solver="direct"))


def test_fields_over_the_run_fold_every_step_and_extra_rows_are_sampled():
    """Steps of 0.25 d to 8 d. Outputs at 1, 2.5 and 5 d only: the last snapshot's largest
    value, its time and the first time above the limit equal, bit for bit, the fold of every
    snapshot of the same run with an output at every step; the largest is above the largest
    of the three output fields somewhere (a peak between them is kept). An extra row (the
    mean over the nodes) is sampled at every step as the column after the observation
    point, equal to that mean of each step's field."""
    coarse = _column(Time(8.0, 0.25, output_times=(1.0, 2.5, 5.0)))
    site, flow = mesh_and_flow(coarse)
    mean = sp.csr_matrix(np.full((1, site.n_nodes), 1.0 / site.n_nodes))
    sparse_run = list(run_transport(site, flow, TransportInputs.of(coarse), extra_probe=mean))
    every = _column(Time(8.0, 0.25, output_interval=0.25))
    dense_run = list(run_transport(site, flow, TransportInputs.of(every)))
    assert len(dense_run) == 33  # t = 0 and every step
    limit = coarse.species["tracer"].limit
    fold = RunWideField.start(site.n_nodes)
    previous = None
    for snap in dense_run:
        c = snap.concentration["tracer"]
        fold = fold.add(c, snap.time, limit, previous)
        previous = (c, snap.time)
    got = sparse_run[-1].over_run["tracer"]
    for part in ("largest", "time_of_largest", "first_above"):
        np.testing.assert_array_equal(getattr(got, part), getattr(fold, part), strict=True)
    at_outputs = np.max([s.concentration["tracer"] for s in sparse_run], axis=0)
    assert np.any(got.largest > at_outputs)
    last = sparse_run[-1]
    assert last.history["tracer"].shape == (len(last.history_times), 2)
    np.testing.assert_array_equal(last.history["tracer"][:, 0],
                                  dense_run[-1].history["tracer"][:, 0], strict=True)
    means = np.array([s.concentration["tracer"].mean() for s in dense_run])
    np.testing.assert_allclose(last.history["tracer"][:, 1], means, rtol=1e-12, atol=0.0)

