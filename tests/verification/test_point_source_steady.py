"""Continuous point source in uniform 3D flow with first-order decay, at steady state.

Reference: Hunt, B. (1978), *Dispersive sources in uniform ground-water flow*, Journal of the
Hydraulics Division, ASCE 104(HY1); Wexler, E.J. (1992), *Analytical solutions for one-,
two-, and three-dimensional solute transport in ground-water systems with uniform flow*,
USGS Techniques of Water-Resources Investigations, book 3, chapter B7 (the continuous point
source; its steady limit). Citations from memory; the formula is derived in
``_point_source.py`` and checked here against its PDE and its source strength before it is
trusted (``test_reference_solution_satisfies_the_equation``,
``test_reference_solution_carries_the_source_rate``).

Set-up (invented, not a real site): a quarter of a plume. A mass loading Ṁ sits on the edge
where the south face (y = 0) meets the bottom face (z = −H); both are no-flux faces
parallel to the flow and act as mirrors, and so do the north and top faces. The reference is
the sum over the loaded mesh nodes (rate Ṁ × fe3d's nodal-volume weight at each node) of
the point-source solution and its images in the four no-flux faces. fe3d puts the load on
the right-hand side at those nodes, and a nodal load is the Galerkin load vector of a point
source at the node (φ_i(x_j) = δ_ij), so superposing over the nodes is exact for the
discrete source distribution; it is not the Domenico (1987)
approximation, whose centreline error reaches tens of percent (West, M.R., Kueper, B.H. &
Ungs, M.J. 2007, *On the use and error of approximation in the Domenico (1987) solution*,
Ground Water 45(2); citation from memory).

Seepage velocity 1 m/d along x; α_L = 1 m, α_TH = 0.4 m, α_TV = 0.2 m (so D_y ≠ D_z);
half-life 6.93 d (λ = 0.1 /d) in the dissolved phase only, with K_d giving R = 1.5, which
must not change the steady state. Backward Euler with 200 d steps to 2000 d: the slowest
transient decays at about λ/R (decay acts on the dissolved third of the retarded mass), and
a backward-Euler step shrinks it by 1/(1 + λΔt/R) ≈ 1/14, so after ten steps it is near
1e-11 (an estimate); the test asserts that the concentration changes by at most 1e-9 of its
peak between the last two outputs. The steady state of backward Euler is the steady discrete
solution whatever the step; only τ (T8) depends on the step, and at 200 d its time term is
negligible.

Tolerances (issue 5): centreline within 3 % of the local exact value, transverse profiles
within 3 % of the exact centreline value at the same x (the exact value off the axis goes to
zero, so a local relative error means nothing in the tail), at nodes more than three cells
(plan cell size h) beyond the edge of the loaded box; the west and east fixed-head faces
are not mirrors, so points within 5 m (5 α_L) of the east face are left out. Mass budget
≤ 1e-8 (design target, theory.md T9).
"""

from __future__ import annotations

import functools
import math

import numpy as np
import pytest
from _point_source import mirrored, point_source

from fe3d.case import builder
from fe3d.case.builder import Layer, Material, Solver, Source, Species, Time, box_case
from fe3d.case.parts import TransportInputs
from fe3d.linalg import FLOW_TOLERANCE
from fe3d.pipeline import mesh_and_flow
from fe3d.transport.run import run_transport

pytestmark = pytest.mark.verification

DAY = 86400.0
LENGTH, WIDTH, DEPTH = 32.0, 10.0, 5.0  # [m]; top at 0, bottom at −DEPTH
X_SOURCE = 6.0  # [m] on the edge y = 0, z = −DEPTH
V = 1.0 / DAY  # seepage velocity [m/s]: K 10 m/d, gradient 0.025, θ 0.25
THETA = 0.25
ALPHA = (1.0, 0.4, 0.2)  # α_L, α_TH, α_TV [m]
DECAY = 0.1 / DAY  # λ [1/s]
KD = 7.8125e-5  # [m³/kg]: R = 1 + 1600 · 7.8125e-5 / 0.25 = 1.5
MASS_RATE = 10.0e-3 / DAY  # Ṁ = 10 g/d [kg/s]
PARAMS = {"porosity": THETA, "velocity": V, "decay": DECAY,
          "dispersion": (ALPHA[0] * V, ALPHA[1] * V, ALPHA[2] * V)}
TOLERANCE = 0.03  # issue 5


def _exact(x: np.ndarray, y: np.ndarray, z: np.ndarray) -> np.ndarray:
    return point_source(x, y, z, mass_rate=MASS_RATE, **PARAMS)  # type: ignore[arg-type]


def test_reference_solution_satisfies_the_equation():
    """Finite-difference residual of θ(v c_x − D_x c_xx − D_y c_yy − D_z c_zz + λc) ≤ 1e-5 of
    the largest term, at 200 random points 1–20 m from the source (central differences with
    step 1e-3 m, truncation O((step/r)²); measured 9.4e-7). A wrong stretch (D_y/D_x for
    D_x/D_y) or λ in place of λ/D_x in the exponent gives a residual of order 1. The factor
    in front is not seen by this check; the source-rate check below fixes it."""
    rng = np.random.default_rng(0)
    direction = rng.normal(size=(3, 200))
    p = direction / np.linalg.norm(direction, axis=0) * rng.uniform(1.0, 20.0, 200)
    s = 1e-3
    dx, dy, dz = PARAMS["dispersion"]  # type: ignore[misc]
    c = _exact(*p)
    shift = np.eye(3)[:, :, None] * s
    plus = [_exact(*(p + shift[i])) for i in range(3)]
    minus = [_exact(*(p - shift[i])) for i in range(3)]
    c_x = (plus[0] - minus[0]) / (2 * s)
    second = [(plus[i] - 2 * c + minus[i]) / s**2 for i in range(3)]
    terms = THETA * np.array([V * c_x, -dx * second[0], -dy * second[1], -dz * second[2],
                              DECAY * c])
    residual = np.abs(terms.sum(axis=0))
    scale = np.abs(terms).max(axis=0)
    assert np.max(residual / scale) <= 1e-5, np.max(residual / scale)


def _box_flux(a: float, n: int = 48) -> float:
    """Total solute flux θ(v c − D∇c)·n [kg/s] out of the cube |x|, |y|, |z| ≤ a around the
    source: Gauss–Legendre with n × n points per face, gradient by central differences."""
    g, w = np.polynomial.legendre.leggauss(n)
    u, t = np.meshgrid(a * g, a * g, indexing="ij")
    weight = np.outer(w, w) * a * a
    dxyz = PARAMS["dispersion"]
    step = 1e-4 * a
    total = 0.0
    for axis in range(3):
        for sign in (1.0, -1.0):
            p = np.empty((3, *u.shape))
            p[axis] = sign * a
            p[(axis + 1) % 3], p[(axis + 2) % 3] = u, t
            e = np.zeros((3, 1, 1))
            e[axis] = step
            grad = (_exact(*(p + e)) - _exact(*(p - e))) / (2 * step)
            normal_flux = -dxyz[axis] * grad * sign  # type: ignore[index]
            if axis == 0:
                normal_flux = normal_flux + V * _exact(*p) * sign
            total += THETA * float(np.sum(weight * normal_flux))
    return total


def test_reference_solution_carries_the_source_rate():
    """The flux out of a small cube around the source tends to Ṁ as the cube shrinks.

    Out-flux F(a) = Ṁ − θλ∫_cube c dV and ∫_cube c dV = C a² + O(a³) (c ~ 1/r, the odd
    term vanishes on a symmetric cube), so F(a) falls short of Ṁ by O(a²) and the
    Richardson value (4F(a/2) − F(a))/3 differs from Ṁ by O(a³). Bounds: shortfall at
    a = 0.05 m below 1e-3 Ṁ (measured 4.0e-4), Richardson value within 1e-5 Ṁ (measured
    2.7e-6; quadrature and differencing errors are far smaller)."""
    a = 0.05
    f1, f2 = _box_flux(a), _box_flux(a / 2)
    assert 0.0 < MASS_RATE - f1 < 1e-3 * MASS_RATE
    ratio = (MASS_RATE - f1) / (MASS_RATE - f2)
    assert ratio == pytest.approx(4.0, rel=0.05)  # the shortfall is O(a²)
    assert (4 * f2 - f1) / 3 == pytest.approx(MASS_RATE, rel=1e-5)


def _case(h: float, dz: float, solver: str):
    a = h / 2  # half-width of the loaded box: its plan corners become mesh nodes
    case = box_case(
        length=LENGTH, width=WIDTH, cell=h, dz=dz, heads={"west": 0.025 * LENGTH, "east": 0.0},
        layers=[Layer("gravel", -DEPTH, Material(10.0, 10.0, porosity=THETA,
                                                 longitudinal_dispersivity=ALPHA[0],
                                                 transverse_dispersivity=ALPHA[1],
                                                 vertical_dispersivity=ALPHA[2]))],
        species=[Species("plume", kd=KD * 1000, half_life=math.log(2) / (DECAY * DAY),
                         options={"decay_in_sorbed_phase": False})],
        sources=[Source("tank_leak", species="plume", kind="mass_loading",
                        mass_rate=MASS_RATE * DAY * 1000, x=(X_SOURCE - a, X_SOURCE + a),
                        y=(0, a), z=(-DEPTH, -DEPTH + a))],
        time=Time(2000.0, 200.0, output_times=(1800.0, 2000.0), scheme="backward_euler"),
        # the steady discrete solution of SUPG; fe3d's default corrects each step within
        # bounds that shrink like Δt (T16b): at 200 d steps (cell Courant number about 130)
        # it is the low-order scheme (measured 23 % centreline error; README "Current
        # limits")
        solver=Solver(linear_solver=solver, monotone=False))
    # the mesh as stated (its cell size is part of the check): corridor off, and the loaded
    # box (h by h/2 in plan: the point source's discrete stand-in) not refined (theory.md
    # M6: half a cell across its shorter side asks for cells of h, the background size)
    return builder.with_changes(case, mesh={"corridor": False, "cells_across_source": 0.5})


def _flux_tolerance(h: float, dz: float) -> float:
    """Relative error allowed in the Darcy flux of the uniform flow, from the flow solver's
    stopping rule rather than by trial.

    A linear head is exact in P1, so the only error is the solver's: CG stops at relative
    residual ``FLOW_TOLERANCE`` (1e-10), and the relative head error is then at most
    cond(A) times that. For a P1 conductance matrix cond(A) grows like (L/h)² with the
    smallest cell dimension (here the layer thickness ``dz``; standard estimate, e.g. Elman,
    Silvester & Wathen 2005, *Finite Elements and Fast Iterative Solvers*, ch. 1, from
    memory, constant taken as 1). A cell's flux is a difference of heads over its plan size
    ``h``, which multiplies the relative error by at most L/h. The bound is loose (about
    4e-5 here; 1.0e-9 was measured on one machine), but a wrong boundary condition or
    assembly gives errors of order one."""
    return FLOW_TOLERANCE * (LENGTH / dz) ** 2 * (LENGTH / h)


def _run_and_compare(h: float, dz: float, solver: str = "auto") -> dict[str, float]:
    """Run fe3d to steady state; return the largest errors (see the module docstring)."""
    case = _case(h, dz, solver)
    site, flow = mesh_and_flow(case)
    rtol = _flux_tolerance(h, dz)
    np.testing.assert_allclose(flow.darcy_flux[0] / THETA, V, rtol=rtol)
    np.testing.assert_allclose(flow.darcy_flux[1:], 0.0, atol=rtol * V * THETA)
    snaps = list(run_transport(site, flow, TransportInputs.of(case)))
    for snap in snaps:
        assert snap.budgets["plume"].relative_error <= 1e-8
    last = snaps[-1]
    assert last.budgets["plume"].source_input == pytest.approx(MASS_RATE * last.time, rel=1e-12)
    c = last.concentration["plume"]
    change = np.max(np.abs(c - snaps[-2].concentration["plume"])) / np.max(c)
    assert change <= 1e-9, f"not at steady state: relative change {change:.2e}"

    # the discrete source: nodes of the loaded box, weighted by their lumped volume
    p, a, eps = site.points, h / 2, 1e-9
    loaded = ((np.abs(p[0] - X_SOURCE) <= a + eps) & (p[1] <= a + eps)
              & (p[2] <= -DEPTH + a + eps))
    volume = np.abs(site.cell_volumes())
    nodal = np.bincount(site.cells.ravel(), weights=np.tile(volume / 4.0, 4),
                        minlength=site.n_nodes)
    rates = MASS_RATE * nodal[loaded] / nodal[loaded].sum()

    def exact(at: np.ndarray, n_images: int = 2) -> np.ndarray:
        return mirrored(at, p[:, loaded], rates, y_walls=(0.0, WIDTH),
                        z_walls=(-DEPTH, 0.0), n_images=n_images, **PARAMS)

    on_edge = (np.abs(p[1]) <= eps) & (np.abs(p[2] + DEPTH) <= eps)
    window = (p[0] >= X_SOURCE + a + 3 * h) & (p[0] <= LENGTH - 5.0)
    centre = on_edge & window
    ref = exact(p[:, centre])
    # two image periods suffice: a third changes the reference by < 1e-6
    np.testing.assert_allclose(exact(p[:, centre], n_images=3), ref, rtol=1e-6)
    rel = np.abs(c[centre] - ref) / ref
    far = p[0, centre] >= X_SOURCE + 10.0
    errors = {"centreline": float(rel.max()), "centreline beyond 10 m": float(rel[far].max())}
    for distance in (5.0, 10.0):
        band = window & (np.abs(p[0] - (X_SOURCE + distance)) <= 0.5 * h)
        for label, plane in (("horizontal", np.abs(p[2] + DEPTH) <= eps),
                             ("vertical", np.abs(p[1]) <= eps)):
            sel = band & plane & ~on_edge  # off the axis: the centreline is checked above
            assert sel.sum() >= 5
            x_sel = p[0, sel]
            axis_ref = exact(np.vstack([x_sel, np.zeros_like(x_sel),
                                        np.full_like(x_sel, -DEPTH)]))
            err = np.abs(c[sel] - exact(p[:, sel])) / axis_ref
            errors[f"{label} at {distance:g} m"] = float(err.max())
    return errors


@functools.cache
def _errors(h: float, dz: float, solver: str = "auto") -> dict[str, float]:
    errors = _run_and_compare(h, dz, solver)
    print(f"h = {h} m, dz = {dz} m:",
          ", ".join(f"{k} {100 * v:.2f} %" for k, v in errors.items()))
    return errors


def test_steady_plume_matches_the_point_source_solution():
    """h = 1 m, layer cell thickness 0.25 m (9.1 k nodes, grid Péclet 1.2): every error ≤ 3 %.

    Measured when written (two prism splits of the mesher: with every cell layer cut alike /
    with alternate cell layers mirrored, the latter in the working tree at the time):
    centreline 1.44 % / 1.76 % (largest a few cells beyond the box; 0.94 % / 0.35 % from
    10 m on); off-axis profile nodes at 5 m 1.71 % / 0.98 %, at 10 m 0.44 % / 0.37 %.
    About 5 s."""
    errors = _errors(1.0, 0.25)
    assert max(errors.values()) <= TOLERANCE, errors


@pytest.mark.slow
def test_steady_plume_on_a_finer_mesh():
    """h = 0.7 m, 0.35 m (13.7 k nodes, direct solver): every error ≤ 3 %; and away from the
    source the error falls with the mesh: the centreline error from 10 m on is at most
    0.75 × that on h = 1 m, 0.5 m (same cell shape; second order would give 0.49; the bound
    leaves room for the unstructured plan mesh, whose nodes differ between the two).

    Near the source the relative error at a given number of cells does not fall with h (the
    solution is singular like 1/r, so the near field looks the same in cell units): the 3 %
    bound beyond three cells is a property of the cell shape, not a converging quantity.
    Measured when written, centreline largest beyond three cells / from 10 m on, and the
    largest off-axis profile error (every cell layer cut alike | alternate layers mirrored):

    - h = 1 m, 0.5 m: 2.38 % / 1.60 %, 2.07 % | 3.27 % / 0.79 %, 1.32 % (3.27 % > 3 %: this
      mesh is used here only for the far-field ratio);
    - h = 0.7 m, 0.35 m: 2.23 % / 0.81 %, 0.74 % | 1.31 % / 0.40 %, 1.12 %; ratio 0.51 | 0.51;
    - h = 0.5 m, 0.25 m (34 k nodes, about 40 s, not run here): 2.77 % / 0.32 %, 0.44 % |
      1.80 % / 0.25 %."""
    fine = _errors(0.7, 0.35, "direct")
    coarse = _errors(1.0, 0.5)
    assert max(fine.values()) <= TOLERANCE, fine
    far_ratio = fine["centreline beyond 10 m"] / coarse["centreline beyond 10 m"]
    assert far_ratio <= 0.75, (coarse, fine)
