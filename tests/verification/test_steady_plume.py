"""The long-term plume (steady solve, theory.md T17) against the continuous point source in
uniform 3D flow with decay, and against the long-time limit of the transient run.

Reference: Hunt, B. (1978), *Dispersive sources in uniform ground-water flow*, Journal of the
Hydraulics Division, ASCE 104(HY1); Wexler, E.J. (1992), *Analytical solutions for one-,
two-, and three-dimensional solute transport in ground-water systems with uniform flow*, USGS
TWRI book 3, chapter B7 (citations from memory). The formula is derived and checked against
its PDE and its source rate in ``_point_source.py`` / ``test_point_source_steady.py``; this
module reuses that check's invented site (a quarter plume on the edge of a 32 m × 10 m × 5 m
box, v = 1 m/d, α = 1, 0.4, 0.2 m, λ = 0.1 /d in the dissolved phase, R = 1.5), its mesh
(h = 1 m, layer cells 0.25 m) and its tolerances: centreline within 3 % of the local exact
value, transverse profiles at 5 m and 10 m within 3 % of the exact centreline value, at
nodes more than three cells beyond the loaded box and more than 5 m from the east face.
The steady solve must be at least as close as the transient check, which uses SUPG
(``solver.monotone = false``): so must the SUPG steady solve and the default, flux-corrected
one (T17).
"""

from __future__ import annotations

import numpy as np
import pytest
from _point_source import mirrored
from test_point_source_steady import DEPTH, MASS_RATE, PARAMS, TOLERANCE, WIDTH, X_SOURCE
from test_point_source_steady import _case as point_source_case

from fe3d.case import builder
from fe3d.case.parts import TransportInputs
from fe3d.pipeline import mesh_and_flow
from fe3d.transport.run import run_transport
from fe3d.transport.steady import solve_steady_transport
from fe3d.transport.steady_correction import BOUND_ROOM, CORRECTION_TOLERANCE

pytestmark = pytest.mark.verification

H, DZ = 1.0, 0.25  # plan cell size and layer cell thickness [m] of the transient check
DAY = 86400.0
STEP = 200.0 * DAY  # the transient check's backward Euler step [s]
STEPS = 10  # to 2000 d
RETARDATION = 1.5
DECAY = PARAMS["decay"]


def _errors(site, c: np.ndarray) -> dict[str, float]:
    """Largest relative errors of the nodal field ``c`` [kg/m³] against the images sum of
    point sources at the loaded nodes (rate × lumped-volume share; see the transient check)."""
    p, a, eps = site.points, H / 2, 1e-9
    loaded = ((np.abs(p[0] - X_SOURCE) <= a + eps) & (p[1] <= a + eps)
              & (p[2] <= -DEPTH + a + eps))
    nodal = np.bincount(site.cells.ravel(), weights=np.tile(np.abs(site.cell_volumes()) / 4, 4),
                        minlength=site.n_nodes)
    rates = MASS_RATE * nodal[loaded] / nodal[loaded].sum()

    def exact(at: np.ndarray) -> np.ndarray:
        return mirrored(at, p[:, loaded], rates, y_walls=(0.0, WIDTH), z_walls=(-DEPTH, 0.0),
                        n_images=2, **PARAMS)

    on_edge = (np.abs(p[1]) <= eps) & (np.abs(p[2] + DEPTH) <= eps)
    window = (p[0] >= X_SOURCE + a + 3 * H) & (p[0] <= p[0].max() - 5.0)
    centre = on_edge & window
    errors = {"centreline": float(np.max(np.abs(c[centre] / exact(p[:, centre]) - 1.0)))}
    for distance in (5.0, 10.0):
        band = window & (np.abs(p[0] - (X_SOURCE + distance)) <= 0.5 * H) & ~on_edge
        for label, plane in (("horizontal", np.abs(p[2] + DEPTH) <= eps),
                             ("vertical", np.abs(p[1]) <= eps)):
            sel = band & plane
            assert sel.sum() >= 5
            axis = np.vstack([p[0, sel], np.zeros(sel.sum()), np.full(sel.sum(), -DEPTH)])
            errors[f"{label} at {distance:g} m"] = float(
                np.max(np.abs(c[sel] - exact(p[:, sel])) / exact(axis)))
    return errors


def _steady_and_transient(**solver):
    case = builder.with_changes(point_source_case(H, DZ, "auto"), solver=solver)
    site, flow = mesh_and_flow(case)
    inputs = TransportInputs.of(case)
    steady = solve_steady_transport(site, flow, inputs).species[0]
    *_, before, last = run_transport(site, flow, inputs)
    return site, steady, last.concentration["plume"], before.concentration["plume"]


def test_steady_solve_matches_the_point_source_solution():
    """SUPG steady solve (the transient check's scheme): every error ≤ 3 % (issue 5's
    tolerance, as the transient check). Measured when written: centreline 1.76 %, profiles
    ≤ 0.98 %, the same as the transient run to the digits shown. The steady balance closes
    to the iterative solver's tolerance (relative residual 1e-10; bound 1e-8, theory.md T9's
    design target) and its input is the source rate exactly (a load, not a held node)."""
    case = builder.with_changes(point_source_case(H, DZ, "auto"), solver={"monotone": False})
    site, flow = mesh_and_flow(case)
    result = solve_steady_transport(site, flow, TransportInputs.of(case))
    (plume,) = result.species
    assert plume.operator == "supg"
    errors = _errors(site, plume.concentration)
    print({k: f"{100 * v:.2f} %" for k, v in errors.items()})
    assert max(errors.values()) <= TOLERANCE, errors
    assert plume.balance.source_input == pytest.approx(MASS_RATE, rel=1e-12)
    assert plume.balance.relative_error <= 1e-8, plume.balance


def test_default_flux_corrected_steady_solve_matches_the_point_source_solution():
    """The default scheme (monotone, flux corrected towards the Galerkin solve): every error
    ≤ 3 % like the transient check, while the low-order solve alone misses by 20–23 %
    (measured when written; the transient default at 200 d steps is that low-order scheme,
    README "Current limits"). Measured: centreline 1.99 %, profiles ≤ 1.10 %, 10
    iterations. Bounded: no value below −γ · tolerance of the peak (T17's stopping rule,
    see test_steady_correction.py)."""
    case = builder.with_changes(point_source_case(H, DZ, "auto"), solver={"monotone": True})
    site, flow = mesh_and_flow(case)
    (plume,) = solve_steady_transport(site, flow, TransportInputs.of(case)).species
    assert plume.operator == "flux_corrected"
    c = plume.concentration
    errors = _errors(site, c)
    print({k: f"{100 * v:.2f} %" for k, v in errors.items()}, plume.iterations, "iterations")
    assert max(errors.values()) <= TOLERANCE, errors
    assert c.min() >= -BOUND_ROOM * CORRECTION_TOLERANCE * c.max()
    assert plume.balance.relative_error <= 1e-8, plume.balance


def test_low_order_steady_solve_is_the_long_time_limit_of_the_bounded_step():
    """Low-order operator (T16, ``flux_limiting = false``): the transient backward Euler run
    with lumped storage converges to the steady solve at a rate known in advance.

    Why: the error e = c − c_∞ obeys (M_L/Δt + L) eⁿ⁺¹ = M_L eⁿ/Δt, and L has nonpositive
    off-diagonal entries and column sums ≥ λθ per node (decay; outflow and the zero column
    sums of advection, dispersion and the added diffusion add nothing negative). With the
    uniform R, the matrix I(1 + λΔt/R) + Δt L M_L⁻¹ is column diagonally dominant by at least
    1 + λΔt/R, so ‖M_L eⁿ⁺¹‖₁ ≤ ‖M_L eⁿ‖₁ / (1 + λΔt/R) (Varga 1962, *Matrix Iterative
    Analysis*, for the M-matrix facts; from memory). From c = 0 after N = 10 steps of 200 d:
    relative error ≤ (1 + 20/1.5)⁻¹⁰ = 2.7e-12. On top, each solve (the steady one and the
    last step) stops at relative residual ``solver.tolerance`` = 1e-10 in the 2-norm, which
    bounds the weighted 1-norm error by √n · 1e-10 · (input / decayed) (the same column
    dominance, ‖r‖₁ ≤ √n ‖r‖₂); twice that is the floor. Measured when written: 4.7e-10
    (bound 2.1e-8)."""
    site, steady, last, _ = _steady_and_transient(monotone=True, flux_limiting=False)
    c = steady.concentration
    weight = np.bincount(site.cells.ravel(), weights=np.tile(np.abs(site.cell_volumes()) / 4, 4),
                         minlength=site.n_nodes)  # M_L up to the uniform θR
    relative = float(weight @ np.abs(last - c)) / float(weight @ np.abs(c))
    contraction = (1.0 + DECAY * STEP / RETARDATION) ** -STEPS
    floor = 2.0 * np.sqrt(site.n_nodes) * 1e-10 * (
        steady.balance.source_input / steady.balance.decayed)
    print(f"relative weighted 1-norm difference {relative:.2e}, bound {contraction + floor:.2e}")
    assert relative <= contraction + floor
    assert c.min() >= 0.0  # an M-matrix solve from nonnegative loads (Varga 1962)


def test_supg_steady_solve_is_the_long_time_limit_of_the_transient_run():
    """SUPG (``monotone = false``): the transient check's run, at 2000 d, equals the steady
    solve to within 3e-5 of the peak.

    Where the bound comes from: the transient run has reached its own steady state to 1e-9
    of the peak (its last two outputs; asserted by the transient check); its steady state
    differs from the steady solve only by τ (T8), built with Δt = 200 d instead of an
    unbounded step. The time term changes τ by a relative ½(h/(|a|Δt))² at most, with the
    plan cell size h = 1 m and |a| = v/R = 0.667 m/d: 2.8e-5; the SUPG terms move the field
    by less than its own size, so the fields differ by at most 2.8e-5 of the peak, plus
    the two solves' tolerance (1e-10 relative residual, well below). Measured when written:
    9e-9."""
    _, steady, last, before = _steady_and_transient(monotone=False)
    c = steady.concentration
    peak = float(c.max())
    assert float(np.max(np.abs(last - before))) <= 1e-9 * peak
    speed = PARAMS["velocity"] / RETARDATION
    tau_share = 0.5 * (H / (speed * STEP)) ** 2
    difference = float(np.max(np.abs(last - c))) / peak
    print(f"largest difference {difference:.2e} of the peak, bound {tau_share + 1e-9:.2e}")
    assert difference <= tau_share + 1e-9
