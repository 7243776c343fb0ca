"""Cell-by-cell tracking in radial flow to a well against the analytic travel time.

Reference: steady radial flow to a fully screened well of rate Q in a confined aquifer of
thickness b and porosity θ has the seepage velocity v(r) = Q / (2π r b θ), so the water
travels from r0 to r1 in t = π b θ (r0² − r1²) / Q (Bear 1972, *Dynamics of Fluids in Porous
Media*, radial flow to a well). The head is h(r) = Q/(2π K b) ln r + const (Thiem's
solution, same source).

The discrete field is the one the tracker is exact for: the P1 interpolant of the analytic
head on a tetrahedral mesh and its constant cell velocity −K ∇h_I / θ. The tracking itself
then adds only round-off; what remains is the interpolation error of the velocity.

Tolerance: for the logarithmic head |D²h| = |∇h| / r, so the gradient of the linear
interpolant differs from ∇h by O(d / r) per cell (d the cell diameter); that first-order
error changes sign from cell to cell across a path and averages out, leaving O((d / r1)²)
in the travel time. The test allows (d_max / r1)², the second-order estimate with its
constant taken as 1 (common practice, no source for the constant); the errors measured when
the test was written were 20× smaller (1.9e-4 at d_max / r1 = 0.062, 2-6e-5 at 0.034).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.spatial import Delaunay

from fe3d.flow.tracking import Tracker
from fe3d.p1 import gradients

DAY = 86400.0
Q, B, THETA, K = 500.0 / DAY, 10.0, 0.3, 1e-4  # m³/s, m, -, m/s
R0, R1 = 30.0, 15.0  # m, the well at the origin


def _sector_mesh(h: float, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Delaunay tetrahedra of a jittered grid (spacing h [m]) filling the box
    [12, 32] × [−1, 6] × [0, 1] m, which holds the radial paths from r = 30 m to 15 m at
    angles 0.05–0.15 rad; cells of no volume (flat ones on the box faces) dropped."""
    rng = np.random.default_rng(seed)
    axes = [np.arange(lo, hi + 1e-9, h) for lo, hi in ((12.0, 32.0), (-1.0, 6.0), (0.0, 1.0))]
    pts = np.array(np.meshgrid(*axes, indexing="ij")).reshape(3, -1)
    lo, hi = pts.min(axis=1)[:, None], pts.max(axis=1)[:, None]
    inner = np.all((pts > lo + 1e-9) & (pts < hi - 1e-9), axis=0)
    pts[:, inner] += rng.uniform(-0.2 * h, 0.2 * h, (3, int(inner.sum())))
    cells = Delaunay(pts.T).simplices.T.copy()
    a, b, c, d = (pts[:, cells[i]] for i in range(4))
    vol = np.einsum("ij,ij->j", b - a, np.cross(c - a, d - a, axis=0)) / 6.0
    return pts, cells[:, np.abs(vol) > 1e-9 * h**3]


def _time_at_radius(points: np.ndarray, times: np.ndarray, r: float) -> float:
    """Time [s] at which the pathline first reaches radius r [m]: the segment that crosses
    it is straight and run at constant speed, so the crossing is solved exactly."""
    radius = np.hypot(points[0], points[1])
    i = int(np.argmax(radius <= r))
    assert radius[i] <= r < radius[i - 1]
    a, d = points[:2, i - 1], points[:2, i] - points[:2, i - 1]
    qa, qb, qc = d @ d, 2.0 * a @ d, a @ a - r * r
    s = (-qb - math.sqrt(qb * qb - 4.0 * qa * qc)) / (2.0 * qa)
    return float(times[i - 1] + s * (times[i] - times[i - 1]))


@pytest.mark.parametrize("h", [0.5, pytest.param(0.25, marks=pytest.mark.slow)])
def test_radial_travel_time_to_a_well_matches_the_analytic_time(h):
    pts, cells = _sector_mesh(h, seed=0)
    grads, _ = gradients(pts, cells)
    head = Q / (2.0 * math.pi * K * B) * np.log(np.hypot(pts[0], pts[1]))
    velocity = -K * np.einsum("eik,ie->ke", grads, head[cells]) / THETA
    tracker = Tracker(pts, cells, velocity)
    edges = [np.linalg.norm(pts[:, cells[i]] - pts[:, cells[j]], axis=0)
             for i in range(4) for j in range(i)]
    tol = (float(np.max(edges)) / R1) ** 2
    expected = math.pi * B * THETA * (R0**2 - R1**2) / Q
    for angle in (0.05, 0.1, 0.15):
        x0 = np.array([R0 * math.cos(angle), R0 * math.sin(angle), 0.5])
        path = tracker.track(x0)
        t = _time_at_radius(path.points, path.times, R1)
        assert t == pytest.approx(expected, rel=tol), (angle, t / expected - 1.0, tol)
