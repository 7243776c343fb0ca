r"""Mass in the model from a decaying mass-loading box, fe3d's default settings, against the
exact mass balance.

The outside audit of issue 11, item "mass balance": a leak loads a box at a constant rate S
for one year and stops; the solute decays in both phases (fe3d's default) with a half-life
of one year; nothing reaches a boundary by the end. The total mass in the model (dissolved
plus sorbed) then obeys the balance of a well-mixed reservoir whatever the plume's shape::

    dM/dt = S·[t < t_stop] − λ M,   M(0) = 0,
    M(t) = (S/λ)(1 − e^(−λt))                       for t ≤ t_stop,
    M(t) = M(t_stop) e^(−λ(t − t_stop))             after,

(first-order decay of a conserved total: any text on linear reservoirs or radioactive
decay; integrated by hand, elementary). Mass in = stored + decayed + out then gives the
decayed mass S·min(t, t_stop) − M(t) exactly.

The site (invented): a sand 400 m × 100 m × 20 m, K = 20 m/d, gradient 0.005, porosity
0.25 (v = 0.4 m/d), bulk density 1600 kg/m³, Kd = 0.09375 L/kg (R = 1.6), α_L = 2.5 m,
α_T = 0.25 m; the box x 40–50 m, y 45–55 m, z −12 to −8 m loaded at 5 kg/yr for 1 yr; 2 yr.
Cells of 10 m, 5 m within 20 m of the box, 1 m cell layers, as a practitioner would write
them; no solver options and no ``time.step`` (fe3d's defaults: the bounded Crank–Nicolson
scheme, steps holding the plume's Courant number at 1, the plume corridor).

Tolerance. fe3d's budget closes to 1e-8 of the input (theory.md T9), so the stored mass
can differ from M(t) only by the time integration of the loss λM. Each step is at worst
the low-order backward Euler step (the bounded scheme's correction towards Crank–Nicolson
only removes error), whose global error for this linear ODE is at most
(Δt_max/2)·λ·∫|dM/dt| dt ≤ λ Δt_max M_max (the total variation of M is 2 M_max: it rises
to M_max and falls): a first-order bound, from the largest step the run took. Measured when
written (59,388 nodes, 496 steps, the largest 2.85 d; grid Péclet 2.2, plume Courant 0.91):
4.2e-7 of M_max, against the bound 5.4e-3 of M_max; outflow 4e-11 of the input.
A wrong decay (e.g. the dissolved phase only, λ/R overall) misses by tens of per cent.
The outflow is checked to be below 1e-9 of the input first (the front is 5.8 standard
deviations from the outflow face at 2 yr).
"""

from __future__ import annotations

import math

import pytest

from fe3d.case.builder import Layer, Material, Source, Species, Time, box_case, with_changes
from fe3d.case.parts import TransportInputs
from fe3d.pipeline import mesh_and_flow
from fe3d.transport.run import run_transport

pytestmark = pytest.mark.verification

DAY = 86400.0
YEAR = 365.25 * DAY
RATE = 5.0 / YEAR  # [kg/s]
STOP = 1.0 * YEAR  # [s]
LAMBDA = math.log(2.0) / YEAR  # [1/s], half-life 1 yr


def exact_mass(t: float) -> float:
    """M(t) [kg] of the reservoir balance (module docstring)."""
    t_in = min(t, STOP)
    return RATE / LAMBDA * (1.0 - math.exp(-LAMBDA * t_in)) * math.exp(
        -LAMBDA * max(t - STOP, 0.0))


def test_exact_mass_solves_the_balance():
    """M' = S − λM before the stop and M' = −λM after, by central differences with step
    h = 1 d. Their truncation error is (h²/6)|M'''| ≤ (h²/6) λ² S ≈ 9e-14 kg/s (|M'''| is
    at most λ²S); tolerance twice that (round-off ε M/h ≈ 1e-20 kg/s is negligible). Also
    M(0) = 0 and continuity at the stop."""
    h = DAY
    truncation = h * h / 6.0 * LAMBDA**2 * RATE
    for t, source in ((0.3 * YEAR, RATE), (1.7 * YEAR, 0.0)):
        slope = (exact_mass(t + h) - exact_mass(t - h)) / (2 * h)
        assert slope == pytest.approx(source - LAMBDA * exact_mass(t), abs=2 * truncation)
    assert exact_mass(0.0) == 0.0
    assert exact_mass(STOP * (1 + 1e-12)) == pytest.approx(exact_mass(STOP), rel=1e-9)


@pytest.mark.slow
def test_stored_and_decayed_mass_follow_the_exact_balance():
    """At every output time (each quarter year): stored mass within λ Δt_max M_max of M(t),
    decayed mass within the same of S·min(t, t_stop) − M(t), input = stored + decayed + out
    to 1e-8 (module docstring)."""
    sand = Material(20.0, 20.0, porosity=0.25, bulk_density=1600.0,
                    longitudinal_dispersivity=2.5, transverse_dispersivity=0.25)
    case = box_case(
        length=400.0, width=100.0, cell=10.0, fine_cell=5.0, fine_radius=20.0, dz=1.0,
        heads={"west": 2.0, "east": 0.0}, layers=[Layer("sand", -20.0, sand)],
        species=[Species("solute", limit=0.005, kd=0.09375, half_life=YEAR / DAY)],
        sources=[Source("leak", species="solute", kind="mass_loading",
                        mass_rate=RATE * 1000.0 * DAY, x=(40.0, 50.0), y=(45.0, 55.0),
                        z=(-12.0, -8.0), stop=STOP / DAY)],
        time=Time(2.0 * YEAR / DAY, 1.0, output_interval=0.25 * YEAR / DAY),
        title="site defaults leak")
    case = with_changes(case, time={"step": None})
    assert case.solver.monotone and case.solver.flux_limiting and case.mesh.corridor
    site, flow = mesh_and_flow(case)
    snaps = list(run_transport(site, flow, TransportInputs.of(case)))
    diag = snaps[-1].diagnostics
    m_max = max(exact_mass(s.time) for s in snaps)
    bound = LAMBDA * diag.largest_step * m_max
    rows = []
    for snap in snaps:
        b = snap.budgets["solute"]
        t_in = min(snap.time, STOP)
        exact = exact_mass(snap.time)
        rows.append(f"t={snap.time / YEAR:4.2f} yr stored {b.stored:.7g} exact {exact:.7g} "
                    f"decayed {b.decayed:.7g} exact {RATE * t_in - exact:.7g} "
                    f"out {b.total_outflow:.2e} closure {b.relative_error:.1e}")
        table = "\n".join([*rows, f"bound {bound:.3e} kg, largest step "
                                   f"{diag.largest_step / DAY:.2f} d"])
        assert b.source_input == pytest.approx(RATE * t_in, rel=1e-12), table
        assert b.total_outflow <= 1e-9 * max(b.source_input, 1e-30), table
        assert b.relative_error <= 1e-8, table
        assert abs(b.stored - exact) <= bound, table
        assert abs(b.decayed - (RATE * t_in - exact)) <= bound, table
