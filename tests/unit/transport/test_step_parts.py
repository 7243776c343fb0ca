"""The step planner and the step function, used directly (no case file, no mesher).

Planner: behaviour tests of its contract (steps land exactly on breakpoints, halve after a
failure, restart after a source switch). Step function: one tetrahedron without flow and
two tetrahedra with a uniform flow, built from arrays; references are closed forms of the
discrete steps (stated in each test) and round-off tolerances (a few ε times the scale).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from fe3d.case.schema import SolverControl, Species, TimeControl
from fe3d.errors import SolverError
from fe3d.mesh.site_mesh import SiteMesh
from fe3d.transport.model import (
    Coefficients,
    Dispersion,
    MediumFields,
    SpeciesModel,
    lumped,
)
from fe3d.transport.planner import StepPlanner
from fe3d.transport.sources import SourceGeometry
from fe3d.transport.step import StepContext, StepState, take_step
from fe3d.transport.systems import Scheme, StepSystems
from fe3d.transport.timeschemes import step_coefficients

DAY = 86400.0
EPS = np.finfo(float).eps


# --- the planner ---------------------------------------------------------------------------

def _planner(**time: object) -> StepPlanner:
    tc = TimeControl(**{"end": "10 d", **time})
    switches = {3.5 * DAY}
    return StepPlanner(tc, sorted({2.0 * DAY, 3.5 * DAY, tc.end}), switches, max_step_cuts=2)


def _walk(planner: StepPlanner, plume_step: float | None = None) -> list[tuple[float, bool]]:
    ends = []
    while not planner.finished:
        step = planner.next(plume_step)
        ends.append((step.t1, planner.advance(step)))
    return ends


def test_fixed_steps_land_on_every_breakpoint_and_restart_after_a_switch():
    """Steps of at most 1.5 d between the breakpoints 2, 3.5 and 10 d: every breakpoint is a
    step end (exactly), and only the end at the source switch (3.5 d) asks for a restart."""
    ends = _walk(_planner(step="1.5 d"))
    times = [t for t, _ in ends]
    for b in (2.0, 3.5, 10.0):
        assert b * DAY in times
    assert [t for t, restart in ends if restart] == [3.5 * DAY]
    assert all(b - a <= 1.5 * DAY * (1 + 1e-12) for a, b in zip([0.0, *times], times,
                                                                 strict=False))


def test_plume_steps_are_end_over_a_power_of_two_and_land_on_breakpoints():
    """Without time.step the handed-in plume step is used (capped by time.max_step) and
    every breakpoint is hit exactly."""
    planner = _planner()
    assert planner.follows_plume
    ends = _walk(planner, plume_step=10.0 * DAY / 8)
    times = [t for t, _ in ends]
    assert {2.0 * DAY, 3.5 * DAY, 10.0 * DAY} <= set(times)


def test_a_failed_step_is_halved_and_the_failure_raised_after_the_allowed_cuts():
    planner = _planner(step="2 d")
    first = planner.next()
    planner.failed(first, SolverError("no convergence"))
    retry = planner.next()
    assert retry.t0 == first.t0 and retry.dt == pytest.approx(first.dt / 2, rel=1e-12)
    planner.failed(retry, SolverError("no convergence"))
    with pytest.raises(SolverError, match="failed after 2 step cuts"):
        planner.failed(planner.next(), SolverError("no convergence"))
    assert planner.step_cuts == 3


# --- the step function ---------------------------------------------------------------------

def _site(n_tets: int) -> SiteMesh:
    """One unit tetrahedron, or two sharing a face (a 'two-cell system')."""
    pts = np.array([[0, 1, 0, 0, 1], [0, 0, 1, 0, 1], [0, 0, 0, 1, 1]], dtype=float)
    cells = np.array([[0, 1, 2, 3], [1, 2, 3, 4]][:n_tets]).T
    if n_tets == 2:  # orient the second cell positively
        p = pts[:, cells[:, 1]]
        if np.linalg.det(p[:, 1:] - p[:, :1]) < 0:
            cells[[2, 3], 1] = cells[[3, 2], 1]
    used = np.unique(cells)
    return SiteMesh(points=pts[:, used], cells=np.searchsorted(used, cells),
                    cell_layer=np.zeros(n_tets, dtype=np.int64), layer_names=("unit",),
                    faces={})


def _context(site: SiteMesh, q: np.ndarray, *, half_life_days: float | None, scheme: str,
             theta: float = 0.25) -> tuple[StepContext, SpeciesModel]:
    """A StepContext built from records only: one material, no dispersion, no sources."""
    e, n = site.n_cells, site.n_nodes
    vol = site.cell_volumes()
    medium = MediumFields(
        porosity=np.full(e, theta), bulk_density=np.zeros(e), cell_volume=vol,
        dispersion=Dispersion(darcy_flux=q, porosity=np.full(e, theta),
                              cell_unit=np.zeros(e, dtype=np.int64), longitudinal=np.zeros(1),
                              transverse_horizontal=np.zeros(1),
                              transverse_vertical=np.zeros(1),
                              effective_diffusion=np.zeros(1)),
        material_names=["m"], outflow_weights={}, outflow_matrix=_zeros(n))
    lam = 0.0 if half_life_days is None else math.log(2) / (half_life_days * DAY)
    spec = Species(limit="1 mg/L", half_life=None if half_life_days is None
                   else f"{half_life_days} d")
    a = q / theta
    speed = np.sqrt(np.sum(a * a, axis=0))
    h = np.ones(e)
    model = SpeciesModel(
        name="s", spec=spec,
        coefficients=Coefficients(storage=np.full(e, theta), decay=np.full(e, lam * theta),
                                  darcy_flux=q, along_flow_diffusivity=np.zeros(e),
                                  element_length=h),
        courant_rate=float(np.max(speed / h)),
        isotherms=(), reaction=None, in_user_law=False, sorbed_decay=lam,
        dissolved_volume=lumped(site, theta * vol), sorbed_capacity=np.zeros(n),
        decay_weight=lumped(site, lam * theta * vol), outflow_weights={})
    time = TimeControl(end="10 d", step="1 d", scheme=scheme)
    solver = SolverControl(linear_solver="direct")
    sources = SourceGeometry(sources=(), held_nodes={}, held_shares={}, inflow_weights={},
                             loading_weights={}, injection={"s": np.zeros(n)},
                             upper_bound={"s": np.zeros(n)})
    systems = StepSystems(site, medium, q, Scheme.of(solver), time, solver, held_nodes={})
    ctx = StepContext(site=site, darcy_flux=q, species=(model,), systems=systems,
                      sources=sources, decay_matrix={}, user_law=None, solver=solver,
                      time_scheme=scheme, grads=None)
    return ctx, model


def _zeros(n: int):
    import scipy.sparse as sp

    return sp.csr_matrix((n, n))


def _state(c: np.ndarray) -> StepState:
    return StepState(fields={"s": c}, held_before={"s": np.zeros(c.size, dtype=bool)},
                     older=None, last_budget={})


@pytest.mark.parametrize(("scheme", "factor"), [
    ("backward_euler", lambda x: 1.0 / (1.0 + x)),
    ("crank_nicolson", lambda x: (1.0 - x / 2) / (1.0 + x / 2)),
])
def test_a_step_of_pure_decay_is_the_schemes_recurrence(scheme, factor):
    """No flow, uniform c: one step multiplies c by the scheme's amplification factor
    (backward Euler 1/(1 + λΔt), Crank–Nicolson (1 − λΔt/2)/(1 + λΔt/2); R17, R18) at every
    node, with the default bounded scheme (T16b: the low-order step is backward Euler, the
    sinks' remainder takes it to the target); the decayed mass in the budget terms is the
    mass lost. Tolerance: 64 ε relative (a direct solve of a 4 × 4 system)."""
    site = _site(1)
    ctx, model = _context(site, np.zeros((3, 1)), half_life_days=2.0, scheme=scheme)
    dt = 1.0 * DAY
    c0 = np.full(site.n_nodes, 3.0)
    result = take_step(ctx, _state(c0), 0.0, dt, dt, step_coefficients(scheme, dt, None))
    lam_dt = math.log(2) / 2.0
    np.testing.assert_allclose(result.fields["s"], 3.0 * factor(lam_dt), rtol=64 * EPS)
    lost = model.mass(c0) - model.mass(result.fields["s"])
    assert result.budget["s"].decayed == pytest.approx(lost, rel=1e3 * EPS)


def test_a_step_of_pure_advection_on_two_cells_keeps_the_bounds_and_the_mass():
    """Two tetrahedra, uniform flow along x, no dispersion, no sources, an initial bump at
    one node: one step with the default scheme at a cell Courant number of 4 stays within
    [0, the bump] (T16, T16b) and keeps the mass (no face lets water out: the boundary
    terms are off here), both to round-off."""
    site = _site(2)
    q = np.tile(np.array([[1e-6], [0.0], [0.0]]), (1, 2))
    ctx, model = _context(site, q, half_life_days=None, scheme="crank_nicolson")
    dt = 4.0 * 0.25 / 1e-6
    c0 = np.zeros(site.n_nodes)
    c0[0] = 1.0
    result = take_step(ctx, _state(c0), 0.0, dt, dt, step_coefficients("crank_nicolson", dt,
                                                                          None))
    c = result.fields["s"]
    assert c.min() >= -64 * EPS and c.max() <= 1.0 + 64 * EPS
    assert model.mass(c) == pytest.approx(model.mass(c0), rel=1e3 * EPS)
