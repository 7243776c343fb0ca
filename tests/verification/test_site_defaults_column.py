r"""A 1D column at site resolution run with fe3d's default settings, against exact solutions.

The outside audit of issue 11: the case is written as a practitioner writes it (5 m cells,
no solver options, ``time.step`` left out, the mesher's plume corridor on by default), and
the receptor numbers a report quotes (first time above the limit, peak, peak time) are
compared with exact solutions of the same problem.

The column (an invented sand strip): 400 m long, 5 m × 5 m across, K = 10 m/d, heads 5 m
→ 0 m (gradient 0.0125), porosity 0.25, so q = 0.125 m/d and v = 0.5 m/d; bulk density
1600 kg/m³ and Kd = 0.09375 L/kg, R = 1 + ρ_b Kd/θ = 1.6; α_L = 1 m (grid Péclet 5 on the
5 m cells the case asks for; the corridor refines towards its target of 2); a half-life of
2 yr in both phases (fe3d's default), so μ = λR in the equation below; c0 = 20 mg/L at the
west face from t = 0; receptors on the axis 100 m and 200 m downstream; 900 d. The front
reaches about 280 m by then, so the outflow face at 400 m is far from the receptors and the
semi-infinite references apply (the exact value at 400 m and 900 d is below 1e-12 c0).

References
----------
- Ogata, A. & Banks, R.B. (1961), *A solution of the differential equation of longitudinal
  dispersion in porous media*, USGS Professional Paper 411-A, with retardation and decay by
  van Genuchten, M.Th. & Alves, W.J. (1982), *Analytical solutions of the one-dimensional
  convective-dispersive solute transport equation*, USDA Technical Bulletin 1661: the
  first-type (fixed concentration) inlet, for R c_t = D c_xx − v c_x − μ c. Evaluated here
  by ``_patch_source.patch_concentration`` with a patch far larger than the transverse
  spread, which is that 1D solution (checked to 1e-9 of c0 in ``test_patch_source.py``).
- van Genuchten & Alves (1982), the third-type (flux) inlet v c − D c_x = v c0 with decay
  (formula in :func:`flux_inlet_concentration`, written from memory and checked below
  against its PDE, inlet condition and initial condition). A pulse of length t0 is the
  difference of two such solutions shifted by t0 (the problem is linear with constant
  coefficients and the inlet keeps its type when the pulse stops; fe3d's inflow
  concentration does too: the water entering carries c0, then clean water).

Why the pulse uses the flux inlet. When a ``fixed_concentration`` source stops, fe3d lets
clean water in through the face (zero total flux of solute, theory.md T3), whereas the
superposition of two first-type solutions holds c = 0 there, so solute diffuses back out of
the inlet. The two problems differ by the mass that leaves that way, which grows with α_L:
measured in the audit (/tmp/s9/C, not part of the suite) +5.4 % and +6.9 % in the peak at
100 m and 200 m with α_L = 2.5 m, −1.1 % and −1.0 % against the flux-inlet pulse.

Tolerances (issue 11 criteria, project targets, no published source): the first time above
the limit within 10 % of exact, the peak within 5 %; peak times within 5 % as well. The
budget closes to 1e-8 relative (theory.md T9, the linear problem's closure) and no value
falls below −1e-10 c0 (the linear solver's relative tolerance, issue 11 "Bounds").

Measured when written (514 steps, about 10 s a run on a shared machine): continuous inlet,
first times at c0/1000 and c0/4000: −0.30 % and −0.38 % at 100 m, −0.13 % and −0.15 % at
200 m, the value at 900 d within 1e-5 of c0; the flux-inlet pulse: peak −0.33 % and −0.30 %,
peak time −0.004 % and +0.012 %, first time at c0/4000 −0.12 % and −0.04 %.
With the limiter's bounds taken from cⁿ as well (3 Dec 2026): pulse peak +0.08 % and
+0.01 % (−0.26 % and −0.22 % with the former bounds on the same day's code).

Not tested here, because they fail: the same column at grid Péclet 10 with a step given by
hand, at the run's Courant number 1.9 (10 d), puts the first time at c0/4000 9 % early, and
at 4.7 (25 d) 40 % early (the run warns in both; 42 % at 4.7 before the limiter's bounds
took in cⁿ, and 8–15 % and 60–70 % before its passes ran longer, both 3 Dec 2026;
docs/verification.md). That is the step the user chose, not
the default.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from _patch_source import DAY, first_time_above, patch_concentration
from scipy.optimize import brentq, minimize_scalar
from test_column import _exp_erfc

from fe3d.case.builder import (
    Layer,
    Material,
    ObservationPoint,
    Source,
    Species,
    Time,
    box_case,
    with_changes,
)
from fe3d.case.parts import TransportInputs
from fe3d.pipeline import mesh_and_flow
from fe3d.post.probes import breakthrough
from fe3d.transport.run import run_transport

pytestmark = pytest.mark.verification

LENGTH, SIDE, CELL = 400.0, 5.0, 5.0  # [m]
V = 0.5 / DAY  # seepage velocity [m/s] (K 10 m/d × 0.0125 / 0.25)
ALPHA_L = 1.0  # [m]
D = ALPHA_L * V  # [m²/s]
R = 1.6
HALF_LIFE = 730.5  # [d] = 2 yr
MU = math.log(2.0) / (HALF_LIFE * DAY) * R  # [1/s]: both phases decay
C0 = 20.0  # [mg/L]
RECEPTORS = (100.0, 200.0)  # [m]
END = 900.0  # [d]
PULSE = 100.0  # [d]
UNBOUNDED = [(-1e7, 1e7)]  # a patch this large is the 1D problem


def flux_inlet_concentration(x: np.ndarray | float, t: np.ndarray | float) -> np.ndarray:
    """c/c0 of van Genuchten & Alves (1982), third-type inlet with decay (module docstring),
    at x [m] and t [s] (0 for t ≤ 0)::

        c/c0 = v/(v+u) exp[(v−u)x/(2D)] erfc[(Rx − ut)/(2√(DRt))]
             + v/(v−u) exp[(v+u)x/(2D)] erfc[(Rx + ut)/(2√(DRt))]
             + v²/(2μD) exp[vx/D − μt/R] erfc[(Rx + vt)/(2√(DRt))],  u = v√(1 + 4μD/v²).
    """
    x, t = np.broadcast_arrays(np.asarray(x, dtype=float), np.asarray(t, dtype=float))
    tt = np.where(t > 0, t, 1.0)
    u = V * math.sqrt(1.0 + 4.0 * MU * D / V**2)
    s = 2.0 * np.sqrt(D * R * tt)
    c = (V / (V + u) * _exp_erfc((V - u) * x / (2 * D), (R * x - u * tt) / s)
         + V / (V - u) * _exp_erfc((V + u) * x / (2 * D), (R * x + u * tt) / s)
         + V**2 / (2 * MU * D) * _exp_erfc(V * x / D - MU * tt / R, (R * x + V * tt) / s))
    return np.where(t > 0, c, 0.0)


def flux_pulse(x: float, t: np.ndarray | float) -> np.ndarray:
    """c/c0 of the flux-inlet pulse of length ``PULSE`` (superposition)."""
    t = np.asarray(t, dtype=float)
    return flux_inlet_concentration(x, t) - flux_inlet_concentration(x, t - PULSE * DAY)


def test_flux_inlet_reference_solves_its_problem():
    """The third-type formula, with this column's coefficients, against its problem:

    - PDE residual R c_t − D c_xx + v c_x + μ c by central differences (steps 1e-2 m and
      1e2 s) at 30 points 5–150 m, t = 300 d: ≤ 1e-6 of the largest term. The truncation
      error relative to the terms is about (h/ℓ)² with ℓ = √(D t/R) ≈ 90 m the front's
      width (~1e-8), and round-off in the second difference about ε/(h/ℓ)² ≈ 2e-16 · 8e7
      ≈ 2e-8; a wrong coefficient leaves a residual of order 1.
    - inlet flux v c − D c_x = v c0 at x = 0 (one-sided second-order difference, step
      1e-3 m): relative error ≤ 1e-5 (truncation (h²/3)|c'''|/|v| ≈ 1e-7 at this scale);
    - c(x, 0+) = 0: 1 m downstream after 1 s, below 1e-12.
    """
    x, t, hx, ht = np.linspace(5.0, 150.0, 30), 300.0 * DAY, 1e-2, 1e2
    c = flux_inlet_concentration
    c_t = (c(x, t + ht) - c(x, t - ht)) / (2 * ht)
    c_x = (c(x + hx, t) - c(x - hx, t)) / (2 * hx)
    c_xx = (c(x + hx, t) - 2 * c(x, t) + c(x - hx, t)) / hx**2
    terms = np.array([R * c_t, -D * c_xx, V * c_x, MU * c(x, t)])
    residual = np.abs(terms.sum(axis=0)) / np.abs(terms).max()
    assert residual.max() <= 1e-6, residual.max()
    c3 = c(np.array([0.0, 1e-3, 2e-3]), t)
    flux = V * c3[0] - D * (-3 * c3[0] + 4 * c3[1] - c3[2]) / 2e-3
    assert flux == pytest.approx(V, rel=1e-5)
    assert float(c(1.0, 1.0)) == pytest.approx(0.0, abs=1e-12)


def _column(kind: str, stop: float | None):
    """The column case with fe3d's defaults (no solver section, no time.step)."""
    sand = Material(10.0, 10.0, porosity=0.25, bulk_density=1600.0,
                    longitudinal_dispersivity=ALPHA_L, transverse_dispersivity=0.1)
    case = box_case(
        length=LENGTH, width=SIDE, cell=CELL, dz=SIDE, heads={"west": 5.0, "east": 0.0},
        layers=[Layer("sand", -SIDE, sand)],
        species=[Species("solute", limit=C0 / 4000.0, kd=0.09375, half_life=HALF_LIFE)],
        sources=[Source("inlet", species="solute", shape="face_patch", face="west",
                        kind=kind, concentration=C0, stop=stop)],
        observation_points=[ObservationPoint(f"X{x:.0f}", x, SIDE / 2, -SIDE / 2,
                                             kind="receptor") for x in RECEPTORS],
        time=Time(END, 1.0, output_interval=END / 3), title="site defaults column")
    case = with_changes(case, time={"step": None})
    assert case.solver.monotone and case.solver.flux_limiting and case.mesh.corridor
    return case


def _run(case):
    """Receptor histories (c/c0) and times [s], and the final snapshot."""
    site, flow = mesh_and_flow(case)
    # uniform flow is exact in P1 up to the flow solve's relative residual 1e-10 times the
    # conductance matrix's condition number, about (L/h)² ≈ (400 m / 2.5 m)² ≈ 3e4 here
    np.testing.assert_allclose(flow.darcy_flux[0] / 0.25, V, rtol=1e-5)
    *_, last = run_transport(site, flow, TransportInputs.of(case))
    b = last.budgets["solute"]
    assert b.relative_error <= 1e-8, b
    lowest = float(last.diagnostics.min_concentration["solute"][0])
    assert lowest >= -1e-10 * C0 * 1e-3, lowest
    return last.history_times, last.history["solute"] / (C0 * 1e-3)


def _table(rows: list[tuple[str, float, float]]) -> str:
    return "\n".join(f"{name:<28} fe3d {f:12.6g} exact {e:12.6g} error {100 * (f - e) / e:+7.2f} %"
                     for name, f, e in rows)


@pytest.mark.slow
def test_continuous_inlet_first_times_with_default_settings():
    """First time above c0/1000 and c0/4000 at 100 m and 200 m within 10 % of van Genuchten
    & Alves (1982) (module docstring), and the value at 900 d within 1 % of c0 (there the
    solution is smooth and the scheme second order: issue 11 "second order where smooth";
    measured 0.01 %)."""
    times, hist = _run(_column("fixed_concentration", None))
    ref = {"velocity": V, "dispersion": (D, D, D), "patch_y": UNBOUNDED,
           "patch_z": UNBOUNDED, "retardation": R, "decay_rate": MU}
    rows, worst = [], 0.0
    for k, x in enumerate(RECEPTORS):
        for ratio in (1e-3, 2.5e-4):
            fe3d = breakthrough(times, hist[:, k], ratio).first_above_limit
            exact = first_time_above(ratio, x, 0.0, 0.0, t_max=END * DAY, xtol=1e-3 * DAY,
                                     **ref)
            assert fe3d is not None and exact is not None
            rows.append((f"first c0/{1 / ratio:.0f} at {x:.0f} m [d]", fe3d / DAY, exact / DAY))
            worst = max(worst, abs(fe3d - exact) / exact)
        end_exact = float(patch_concentration(x, 0.0, 0.0, times[-1], **ref))
        assert abs(hist[-1, k] - end_exact) <= 0.01, _table(rows)
    assert worst <= 0.10, _table(rows)


def _exact_peak(x: float) -> tuple[float, float]:
    """Peak c/c0 and its time [s] of the flux-inlet pulse at x [m]: the largest of 20,000
    samples over the run, then a bounded scalar search (to 1e-3 d) around it."""
    ts = np.linspace(1.0 * DAY, END * DAY, 20000)
    j = int(np.argmax(flux_pulse(x, ts)))
    found = minimize_scalar(lambda t: -float(flux_pulse(x, t)), bounds=(ts[j - 1], ts[j + 1]),
                            method="bounded", options={"xatol": 1e-3 * DAY})
    return float(-found.fun), float(found.x)


def _exact_first(x: float, ratio: float) -> float:
    """First time [s] the flux-inlet pulse exceeds ``ratio`` at x: Brent's root on the first
    bracket of 4,000 samples (the pulse rises once before its peak)."""
    ts = np.linspace(1.0 * DAY, END * DAY, 4000)
    i = int(np.argmax(flux_pulse(x, ts) > ratio))
    return float(brentq(lambda t: float(flux_pulse(x, t)) - ratio, ts[i - 1], ts[i],
                        xtol=1e-3 * DAY))


@pytest.mark.slow
def test_flux_inlet_pulse_peak_and_times_with_default_settings():
    """A 100 d pulse through the flux inlet: peak within 5 %, peak time within 5 % and first
    time above c0/4000 within 10 % of exact (van Genuchten & Alves 1982, superposed) at
    100 m and 200 m."""
    times, hist = _run(_column("inflow_concentration", PULSE))
    rows = []
    for k, x in enumerate(RECEPTORS):
        b = breakthrough(times, hist[:, k], 2.5e-4)
        peak, peak_time = _exact_peak(x)
        first = _exact_first(x, 2.5e-4)
        rows += [(f"peak c/c0 at {x:.0f} m", b.peak, peak),
                 (f"peak time at {x:.0f} m [d]", b.peak_time / DAY, peak_time / DAY),
                 (f"first c0/4000 at {x:.0f} m [d]", (b.first_above_limit or 0.0) / DAY,
                  first / DAY)]
    table = _table(rows)
    for name, fe3d, exact in rows:
        tolerance = 0.10 if name.startswith("first") else 0.05
        assert abs(fe3d - exact) <= tolerance * exact, table
