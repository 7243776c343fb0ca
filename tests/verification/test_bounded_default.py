"""Bounds of fe3d's default transport scheme over drawn steps, Péclet numbers and starts.

The default step (theory.md T16, T16b) is the low-order backward Euler step, corrected
towards the Galerkin step of ``time.scheme`` by limited fluxes; nonlinear species
(Langmuir, second-order decay) take the low-order step alone, by Newton. The claim checked
here (issue 11, "Bounds"): whatever the step (cell Courant number 0.01–100), the grid Péclet
number (0.1–50) and the start (a fixed-concentration inlet switched on at t = 0, an initial
box, a uniform initial concentration flushed by clean water), no value falls below
−tol·c0 and none rises above c0, with backward Euler and Crank–Nicolson, in a 1D column and
a 3D puff, and for Langmuir and second-order species in the column.

Sources
-------
- Varga, R.S. (1962), *Matrix Iterative Analysis*, Prentice-Hall (from memory): a matrix
  with positive diagonal, nonpositive off-diagonal entries and (column) diagonal dominance,
  strict in at least one row of each connected block, is an M-matrix and its inverse is
  nonnegative. The low-order step matrix m_L/Δt + L (lumped storage, discrete upwinding,
  T16) is one, so c_L = S⁻¹(m_L cⁿ/Δt + b) stays within the range of cⁿ and of the held
  values (discrete maximum principle); for the nonlinear species Newton's fixed point is the
  same system with a nonnegative diagonal added (T10, T11), still an M-matrix.
- Zalesak, S.T. (1979), "Fully multidimensional flux-corrected transport algorithms for
  fluids", J. Comput. Phys. 31 (from memory): the limiter lets each antidiffusive flux in
  only as far as keeps every node within its neighbours' range of the current field.
- Kuzmin, D. (2009), "Explicit and implicit FEM-FCT algorithms with flux linearization",
  J. Comput. Phys. 228 (from memory): the linearised correction of the implicit low-order
  step towards a high-order target, each limited pass keeping the local bounds, so the
  corrected field stays within the low-order field's local extrema.

Tolerance. In exact arithmetic both bounds hold exactly. In floating point the low-order
field is the output of a linear solve accepted at relative residual ``solver.tolerance``
(1e-10, checked against the true residual in fe3d.linalg); the limiter adds only convex
combinations of values already computed. The bounds asserted are therefore
−tol·c0 ≤ c ≤ (1 + tol)·c0: the issue's −(solver tolerance × c0) for the minimum, and the
same allowance above c0 (the same solve can miss the maximum principle by as much as the
minimum; measured largest excess above c0: 9.3e-14 c0, the round-off of the direct solve).
The columns and the puff here have fewer than 5,000 unknowns, so fe3d factorises directly
(``fe3d.linalg.DIRECT_LIMIT``) and the error is round-off, far inside the allowance; no
conditioning argument was needed. Newton stops at relative residual tol as well.

The mass budget (theory.md T9) closes at every output time to 1e-8 relative for the linear
species and 1e-6 for the nonlinear ones (issue criteria, as in test_mass_budget.py and
test_nonlinear_sorption.py).

Measured when written (nominal Courant v Δt/h, h the cell size; fe3d's own cell Courant
number, over the column's thin tetrahedra, is up to 3× larger), 159 runs: the most
negative value was 0 in every column run, linear and nonlinear (no value ever fell below
zero), and −8.5e-22 c0 in the puff; the largest excess above c0 was 9.3e-14 c0 (linear
column), 0 (puff), 2.7e-14 c0 (Langmuir), 0 (second order); budgets ≤ 1.7e-14 (column),
4.8e-15 (puff), 1.3e-9 (Langmuir), 1.2e-10 (second order). SUPG with BDF2
(``solver.monotone = false``) in the same column at grid Péclet 10 undershoots −7.0 % of
c0 at Courant 0.05, −6.5 % at 0.1 and −0.019 % at 0.75, and overshoots by 5–6 %: the
reason BDF2 is refused with the bounded scheme.

Found while writing: a Langmuir column at grid Péclet 0.1 and very long steps stops with a
NewtonError instead of finishing (see ``test_langmuir_column_at_long_steps_finishes``).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st

from fe3d.case.builder import Layer, Material, Source, Species, Time, box_case, with_changes
from fe3d.case.parts import TransportInputs
from fe3d.errors import CaseErrors
from fe3d.pipeline import mesh_and_flow
from fe3d.transport.run import run_transport

pytestmark = pytest.mark.verification

DAY = 86400.0
THETA = 0.25
C0 = 1.0  # [kg/m³]
TOL = 1e-10  # solver.tolerance, the case-file default (fe3d.case.schema.SolverControl)
SCHEMES = ("backward_euler", "crank_nicolson")

# the column: 20 m × 0.5 m × 0.5 m, one cell wide and thick; K 10 m/d, head drop 0.5 m
# over 20 m, θ 0.25: v = 1 m/d
COLUMN_LENGTH, COLUMN_CELL = 20.0, 0.5  # [m]
# the puff: 24 m × 10 m × 5 m, 1 m cells; head drop 0.6 m over 24 m: v = 1 m/d
PUFF_LENGTH, PUFF_WIDTH, PUFF_DEPTH, PUFF_CELL = 24.0, 10.0, 5.0, 1.0  # [m]
V = 1.0  # seepage velocity [m/d]

FIXED_STEPS = 24
"""Steps of a fixed-step run (its end is 24 Δt): enough for a front to form and move at
every Courant number, few enough to keep each example to a few hundredths of a second."""

COURANT_END = 8.0
"""A run with ``time.courant`` ends at 8 h/v × the Courant target: the plume's step rule
(end/2^k) then takes about 32 steps at any target."""

LANGMUIR = {"sorption": "langmuir", "langmuir_capacity": "100 mg/kg",
            "langmuir_affinity": "5 m^3/kg"}  # s(c0)/c0 = 8.3e-5 m³/kg: R(c0) ≈ 1.5
SECOND_ORDER = {"second_order_rate": "5 m^3/kg/d"}  # k c0 = 5 /d: strong loss at the front



def _examples(n: int) -> settings:
    """``n`` drawn examples, fixed (derandomize) so CI sees the same examples every run."""
    return settings(max_examples=n, derandomize=True, deadline=None, database=None,
                    suppress_health_check=[HealthCheck.too_slow])


courants = st.floats(-2.0, 2.0).map(lambda x: 10.0**x)  # nominal v Δt/h, 0.01–100
peclets = st.floats(-1.0, math.log10(50.0)).map(lambda x: 10.0**x)  # v h / D_L, 0.1–50
starts = st.sampled_from(["inlet", "box", "uniform"])
step_rules = st.sampled_from(["fixed", "courant"])


def _column_case(alpha_l: float, start: str, options: dict | None = None):
    """The column with longitudinal dispersivity ``alpha_l`` [m] (grid Péclet h/α_L) and one
    of three starts: ``inlet``, c0 held on the west face from t = 0 in a clean column;
    ``box``, c0 in the first quarter at t = 0 (an initial_plume box); ``uniform``, c0
    everywhere at t = 0 (species initial concentration) with clean water flowing in."""
    h = COLUMN_CELL
    c0 = f"{C0} kg/m^3"
    sources = {"inlet": [Source("inlet", shape="face_patch", face="west", concentration=c0)],
               "box": [Source("slab", kind="initial_plume", concentration=c0,
                              x=(0.0, COLUMN_LENGTH / 4), y=(0.0, h), z=(-h, 0.0))],
               "uniform": []}[start]
    species = Species("tracer", initial_concentration=c0 if start == "uniform" else None,
                      options=options or {})
    case = box_case(
        length=COLUMN_LENGTH, width=h, cell=h, dz=h, heads={"west": 0.5, "east": 0.0},
        layers=[Layer("sand", -h, Material(10.0, 10.0, porosity=THETA,
                                           longitudinal_dispersivity=alpha_l,
                                           transverse_dispersivity=alpha_l / 10.0))],
        species=[species], sources=sources, time=Time(10.0, 0.25))
    # the mesh as stated (the cell size sets the grid Péclet number): corridor off
    return with_changes(case, mesh={"corridor": False})


def _puff_case(alpha_l: float):
    """The puff: c0 in a 4 m × 4 m × 2 m initial_plume box in uniform flow along x (1,968 nodes),
    α_T = α_V = α_L/10."""
    case = box_case(
        length=PUFF_LENGTH, width=PUFF_WIDTH, cell=PUFF_CELL, dz=PUFF_CELL,
        heads={"west": 0.6, "east": 0.0},
        layers=[Layer("sand", -PUFF_DEPTH, Material(10.0, 10.0, porosity=THETA,
                                                    longitudinal_dispersivity=alpha_l,
                                                    transverse_dispersivity=alpha_l / 10.0))],
        sources=[Source("puff", kind="initial_plume", concentration=f"{C0} kg/m^3",
                        x=(4.0, 8.0), y=(3.0, 7.0), z=(-3.5, -1.5))],
        time=Time(10.0, 0.25))
    return with_changes(case, mesh={"corridor": False})


def _with_steps(case, courant: float, h: float, rule: str, scheme: str):
    """``rule`` fixed: Δt = courant·h/v for FIXED_STEPS steps; ``courant``: no time.step,
    the plume's step rule with target ``courant`` (T14b) over COURANT_END·courant·h/v."""
    dt = courant * h / V  # [d]
    if rule == "fixed":
        return with_changes(case, time={"step": f"{dt!r} d", "end": f"{FIXED_STEPS * dt!r} d",
                                        "scheme": scheme})
    return with_changes(case, time={"step": None, "courant": courant,
                                    "end": f"{COURANT_END * dt!r} d", "scheme": scheme})


@pytest.fixture(scope="module")
def column():
    """Mesh and steady flow of the column, built once (dispersivity and steps do not enter
    the flow)."""
    site, flow = mesh_and_flow(_column_case(0.05, "inlet"))
    # K 10 m/d × (0.5/20) / θ 0.25 = 1 m/d, exact in P1 (linear head)
    np.testing.assert_allclose(flow.darcy_flux[0] * DAY / THETA, V, rtol=1e-9)
    assert site.n_nodes < 5000  # direct factorisation (fe3d.linalg.DIRECT_LIMIT)
    return site, flow


@pytest.fixture(scope="module")
def puff():
    """Mesh and steady flow of the puff box, built once."""
    site, flow = mesh_and_flow(_puff_case(0.1))
    np.testing.assert_allclose(flow.darcy_flux[0] * DAY / THETA, V, rtol=1e-9)
    assert 1000 < site.n_nodes < 5000  # about two thousand nodes, direct factorisation
    return site, flow


def _assert_bounded(site, flow, case, budget_rtol: float, label: str) -> tuple[float, float]:
    """Run the case; assert −tol·c0 ≤ c ≤ (1 + tol)·c0 after every step (the run's own
    extremes, folded over every accepted step) and the budget at every output time.
    Returns (lowest value, largest excess above c0) [kg/m³]."""
    snaps = list(run_transport(site, flow, TransportInputs.of(case)))
    diag = snaps[-1].diagnostics
    lowest = min(diag.min_concentration["tracer"][0],
                 min(float(s.concentration["tracer"].min()) for s in snaps))
    highest = max(diag.max_concentration["tracer"][0],
                  max(float(s.concentration["tracer"].max()) for s in snaps))
    worst_budget = max(s.budgets["tracer"].relative_error for s in snaps)
    where = (f"{label}: min {lowest:.3e}, max − c0 {highest - C0:.3e} kg/m³, budget "
             f"{worst_budget:.1e}, {diag.n_steps} steps, Courant ≤ "
             f"{diag.max_courant['tracer']:.3g}, grid Péclet ≤ "
             f"{diag.max_grid_peclet['tracer']:.3g}, cuts {diag.step_cuts}")
    print(where)
    assert lowest >= -TOL * C0, where
    assert highest <= (1.0 + TOL) * C0, where
    assert worst_budget <= budget_rtol, where
    return lowest, highest - C0


@pytest.mark.parametrize("scheme", SCHEMES)
@_examples(30)
@given(courant=courants, peclet=peclets, start=starts, rule=step_rules)
@example(courant=0.01, peclet=0.1, start="inlet", rule="fixed")  # the corners, always run
@example(courant=0.01, peclet=50.0, start="box", rule="fixed")
@example(courant=100.0, peclet=0.1, start="uniform", rule="fixed")
@example(courant=100.0, peclet=50.0, start="inlet", rule="fixed")
@example(courant=0.01, peclet=50.0, start="inlet", rule="courant")
@example(courant=100.0, peclet=50.0, start="box", rule="courant")
def test_column_stays_within_bounds(column, scheme, courant, peclet, start, rule):
    """1D column, linear species: bounds and budget (≤ 1e-8) over drawn steps, grid Péclet
    numbers and starts. The grid Péclet number v h/D_L = h/α_L: α_L is drawn against the
    fixed 0.5 m cell (fe3d's own diagnostic equals it to 1e-9, the longest element length
    along the flow being the cell size)."""
    site, flow = column
    case = _with_steps(_column_case(COLUMN_CELL / peclet, start), courant, COLUMN_CELL,
                       rule, scheme)
    _assert_bounded(site, flow, case, 1e-8,
                    f"column {scheme} {start} {rule} Courant {courant:.3g} Péclet {peclet:.3g}")


@pytest.mark.slow
@pytest.mark.parametrize("scheme", SCHEMES)
@_examples(6)
@given(courant=courants, peclet=peclets, rule=step_rules)
@example(courant=0.01, peclet=50.0, rule="fixed")
@example(courant=100.0, peclet=0.1, rule="fixed")
@example(courant=100.0, peclet=50.0, rule="courant")
def test_puff_stays_within_bounds(puff, scheme, courant, peclet, rule):
    """3D puff (initial_plume box in uniform flow): bounds and budget (≤ 1e-8) over drawn
    steps and grid Péclet numbers (α_L drawn against the nominal 1 m cell; on the
    unstructured plan triangulation fe3d's element lengths differ from it)."""
    site, flow = puff
    case = _with_steps(_puff_case(PUFF_CELL / peclet), courant, PUFF_CELL, rule, scheme)
    _assert_bounded(site, flow, case, 1e-8,
                    f"puff {scheme} {rule} Courant {courant:.3g} Péclet {peclet:.3g}")


@pytest.mark.parametrize("scheme", SCHEMES)
@pytest.mark.parametrize("law", ["langmuir", "second_order"])
@_examples(15)
@given(courant=courants, peclet=peclets, start=starts, rule=step_rules)
@example(courant=0.01, peclet=0.1, start="inlet", rule="fixed")
@example(courant=0.01, peclet=50.0, start="box", rule="fixed")
@example(courant=100.0, peclet=50.0, start="uniform", rule="fixed")
@example(courant=10.0, peclet=0.1, start="inlet", rule="fixed")
def test_nonlinear_column_stays_within_bounds(column, law, scheme, courant, peclet, start,
                                              rule):
    """1D column with a Langmuir or a second-order species (the low-order backward Euler
    step by Newton, whatever ``time.scheme``): bounds and budget (≤ 1e-6). The corner
    Courant 100, grid Péclet 0.1 is not among the fixed examples: there the Langmuir run
    stops with a NewtonError before its end (test_langmuir_column_at_long_steps_finishes,
    expected to fail until fixed); Courant 10 there finishes after 22 step cuts."""
    site, flow = column
    options = LANGMUIR if law == "langmuir" else SECOND_ORDER
    case = _with_steps(_column_case(COLUMN_CELL / peclet, start, options), courant,
                       COLUMN_CELL, rule, scheme)
    _assert_bounded(site, flow, case, 1e-6, f"column {law} {scheme} {start} {rule} "
                    f"Courant {courant:.3g} Péclet {peclet:.3g}")


def test_bdf2_is_refused_with_the_bounded_scheme():
    """BDF2 with the default (bounded) scheme: one CaseError, one line, naming time.scheme
    (behaviour requirement, issue 11)."""
    with pytest.raises(CaseErrors) as info:
        with_changes(_column_case(0.05, "inlet"), time={"scheme": "bdf2"})
    assert len(info.value.errors) == 1
    line = str(info.value)
    assert "\n" not in line
    assert line.startswith("time.scheme"), line


def test_supg_with_bdf2_undershoots(column):
    """The documented reason for the refusal, observed: with ``solver.monotone = false``
    (SUPG) BDF2 is accepted, and in the column with an inlet switched on at t = 0, grid
    Péclet 10, Courant 0.1, its minimum lies below −1 % of c0 (measured −6.5 %; the
    bounded scheme's minimum in the same column is 0). The 1 % is a threshold for "clearly
    beyond round-off", no source."""
    site, flow = column
    case = with_changes(_column_case(COLUMN_CELL / 10.0, "inlet"),
                        time={"step": f"{0.1 * COLUMN_CELL!r} d",
                              "end": f"{40 * 0.1 * COLUMN_CELL!r} d", "scheme": "bdf2"},
                        solver={"monotone": False})
    *_, last = run_transport(site, flow, TransportInputs.of(case))
    lowest = last.diagnostics.min_concentration["tracer"][0]
    print(f"SUPG + BDF2 minimum {lowest:.3e} kg/m³")
    assert lowest < -0.01 * C0
    assert last.budgets["tracer"].relative_error <= 1e-8


@pytest.mark.slow
def test_langmuir_column_at_long_steps_finishes(column):
    """The bounded default must also finish: a Langmuir column at grid Péclet 0.1 with
    fixed steps of Courant 100 (24 steps) runs to its end. (It stopped with a NewtonError
    near steady state when Newton's target was 1e-10 × a first residual already at 9e-21,
    below round-off; Newton now stops at the round-off of evaluating the residual.)"""
    site, flow = column
    case = _with_steps(_column_case(COLUMN_CELL / 0.1, "inlet", LANGMUIR), 100.0,
                       COLUMN_CELL, "fixed", "backward_euler")
    _assert_bounded(site, flow, case, 1e-6, "column langmuir, Courant 100, Péclet 0.1")
