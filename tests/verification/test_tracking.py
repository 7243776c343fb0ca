"""Particle tracking against closed-form travel times.

- Uniform flow: travel time = distance × θ / q (definition of seepage velocity, e.g.
  Freeze & Cherry 1979, ch. 2); the tracker is exact for a constant field: tolerance 1e-6.
- Radial flow to a well in a confined aquifer of thickness b: v(r) = Q/(2π r b θ), so the
  time from r0 to r1 is π b θ (r0² − r1²)/Q (e.g. Bear 1972, *Hydraulics of Groundwater*,
  radial flow); the discrete P1 velocity is piecewise constant, so the check is 5 %.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from test_flow_sources import _case

from fe3d.case.builder import ObservationPoint
from fe3d.case.parts import FlowInputs
from fe3d.flow.solve import solve_flow
from fe3d.flow.tracking import Tracker
from fe3d.mesh.build import build_mesh

pytestmark = pytest.mark.verification
DAY = 86400.0


def test_uniform_flow_travel_time_is_exact():
    case = _case(L=200, W=40, K=20.0, b=10.0, h=8.0, hf=8.0,
                 heads={"west": 10.0, "east": 9.0})
    site = build_mesh(case)
    flow = solve_flow(site, FlowInputs.of(case))
    theta = 0.3
    tracker = Tracker(site.points, site.cells, flow.darcy_flux / theta)
    path = tracker.track(np.array([10.0, 17.3, -4.1]))
    assert path.end == "boundary"
    assert path.points[0, -1] == pytest.approx(200.0, abs=1e-6)
    q = 20.0 / DAY * 1.0 / 200.0
    expected = (200.0 - 10.0) * theta / q
    assert path.times[-1] == pytest.approx(expected, rel=1e-6)
    back = tracker.track(np.array([150.0, 20.0, -5.0]), backward=True)
    assert back.points[0, -1] == pytest.approx(0.0, abs=1e-6)
    assert back.times[-1] == pytest.approx(150.0 * theta / q, rel=1e-6)


def test_radial_travel_time_to_a_well():
    q_well, b, theta = 500.0, 10.0, 0.3
    well = {"name": "PW", "x": "100 m", "y": "100 m", "screens": [["0 m", "-10 m"]],
            "rate": f"{q_well} m^3/d"}
    case = _case(h=6.0, hf=1.0, rf=15.0, b=b, wells=[well],
                 heads=dict.fromkeys(("west", "east", "south", "north"), 20.0),
                 observation_points=[ObservationPoint("PW_loc", 100.0, 100.0, z=-5.0)])
    site = build_mesh(case)
    flow = solve_flow(site, FlowInputs.of(case))
    tracker = Tracker(site.points, site.cells, flow.darcy_flux / theta)
    Q = q_well / DAY
    r0, r1 = 60.0, 10.0
    for angle in (0.3, 1.9, 4.0):
        x0 = np.array([100 + r0 * math.cos(angle), 100 + r0 * math.sin(angle), -5.0])
        path = tracker.track(x0)
        r = np.hypot(path.points[0] - 100.0, path.points[1] - 100.0)
        i = int(np.argmax(r <= r1))
        assert r[i] <= r1, path.end
        frac = (r[i - 1] - r1) / (r[i - 1] - r[i])
        t_at_r1 = path.times[i - 1] + frac * (path.times[i] - path.times[i - 1])
        expected = math.pi * b * theta * (r0**2 - r1**2) / Q
        assert t_at_r1 == pytest.approx(expected, rel=0.05)
