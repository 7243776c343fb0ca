r"""Exact transient concentration from a continuous rectangular patch source in uniform flow.

Reference: Wexler, E.J. (1992), *Analytical solutions for one-, two-, and three-dimensional
solute transport in ground-water systems with uniform flow*, USGS Techniques of
Water-Resources Investigations, book 3, chapter B7: the finite patch source in an aquifer of
infinite width and height (its eq. 121b, numbered so in a transcription of the report read
while writing this; the report itself was not at hand). The solution goes back to Sagar, B.
(1982), *Dispersion in three dimensions: approximate analytic solutions*, Journal of the
Hydraulics Division, ASCE 108(HY1) (citation from memory). West, M.R., Kueper, B.H. & Ungs,
M.J. (2007), *On the use and error of approximation in the Domenico (1987) solution*, Ground
Water 45(2), use it as the exact answer against which the Domenico approximation errs
(citation from memory). The Domenico approximation is not used anywhere here.

Problem. Semi-infinite medium x ≥ 0, unbounded in y and z, seepage velocity v along +x,
principal dispersion coefficients D_x, D_y, D_z, retardation R and a first-order loss::

    R ∂c/∂t = D_x ∂²c/∂x² + D_y ∂²c/∂y² + D_z ∂²c/∂z² − v ∂c/∂x − k c,

c = 0 at t = 0; on the plane x = 0, c = c0 inside the patch y1 < y < y2, z1 < z < z2 and
c = 0 outside it; c → 0 far away. ``decay_rate`` is k [1/s]: λR when both phases decay
(fe3d's default, theory.md T0 divided by θ), λ when only the dissolved phase decays.

Formula. Divide by R (v' = v/R, D' = D/R, λ' = k/R). Wexler's form is::

    c/c0 = x exp(v'x/(2D'_x)) / (8 √(π D'_x)) ∫_0^t τ^(-3/2)
           exp(−(v'²/(4D'_x) + λ') τ − x²/(4 D'_x τ)) F_y(τ) F_z(τ) dτ,

    F_y = erfc((y1 − y)/(2√(D'_y τ))) − erfc((y2 − y)/(2√(D'_y τ))),  F_z likewise.

It is Duhamel's principle: the first factor is the flux kernel of the 1D Dirichlet problem
(the Ogata–Banks solution is its integral with F_y = F_z = 2), and F_y F_z / 4 is the
patch's indicator after free transverse dispersion for a time τ. Wexler removes the τ^(-3/2)
behaviour at τ → 0 with τ = σ⁴. Here the substitution s = x / (2√(D'_x τ)) is used instead
(the one of the Ogata–Banks derivation): dτ τ^(-3/2) x/(2√(π D'_x)) = (2/√π) ds, and with
a = x √(v'²/(4D'_x) + λ') / (2√D'_x) and b = v'x/(2D'_x) the exponent becomes
−s² − a²/s² + b = −(s − a/s)² + (b − 2a), with b − 2a ≤ 0 (= 0 without decay)::

    c/c0 = (1/(2√π)) ∫_{s0}^∞ exp(−(s − a/s)² + b − 2a) F_y F_z ds,   s0 = x/(2√(D'_x t)),

    F_y = erfc((y1 − y) s / (x √(D_y/D_x))) − erfc((y2 − y) s / (x √(D_y/D_x))).

The integrand is bounded (no endpoint singularity, no overflow of exp(b) at large Péclet) and
is negligible outside s − a/s ∈ [−9, 9] (exp(−81) ≈ 7e-36), so the integral is taken over
that window, split at its peak s = √a, with ``scipy.integrate.quad`` (epsabs = ``atol``,
default 1e-14 in c/c0; epsrel = ``rtol``, default 1e-10). t = ∞ gives the steady state
(s0 = 0). At x = 0 the value is the boundary condition (½ on an edge).

Walls. A no-flux plane parallel to the flow is a mirror: the solution between walls is the
free one with the patch interval and its images (:func:`wall_images`); the patch interval
arguments therefore take lists of intervals, whose F factors add.

Mass. The integral of c over any plane x = const is Y Z times the 1D (Ogata–Banks) value,
because transverse dispersion keeps the transverse integral of the indicator. So the net
solute flux through the inflow plane is that of the 1D problem times the patch area, in
closed form (:func:`entered_mass`, derived in its docstring). Through the patch alone it is
not finite: next to the patch edge, where c jumps from c0 to 0 on the plane, the normal
gradient goes like c0 √(D_y/D_x)/(π d) at a distance d from the edge (the local solution is
dispersion-dominated, ½ − atan(ỹ/x̃)/π in stretched coordinates; checked in
``test_patch_source.py``), so the dispersive inflow through the patch and the dispersive
outflow through the plane just outside it both diverge logarithmically and cancel in the net.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy.integrate import quad
from scipy.optimize import brentq
from scipy.special import erf, erfc

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
from fe3d.case.schema import Case
from fe3d.post.probes import breakthrough
from fe3d.transport.run import run_transport

__all__ = ["PatchSite", "ReceptorResult", "SiteResult", "entered_mass", "first_time_above",
           "patch_concentration", "run_site", "wall_images"]

DAY = 86400.0
YEAR = 365.25 * DAY  # pint's year, as fe3d reads "yr"
Interval = tuple[float, float]
WINDOW = 9.0  # the integrand is below exp(−WINDOW²) ≈ 7e-36 outside |s − a/s| ≤ WINDOW


def wall_images(interval: Interval, *, walls: Interval, periods: int) -> list[Interval]:
    """The interval and its images in two no-flux planes ``walls`` = (w0, w1) [m].

    Reflection in w0 gives (2w0 − hi, 2w0 − lo); both repeat with period 2(w1 − w0), kept
    for |n| ≤ ``periods``. ``periods = 0`` keeps the interval and its reflection in w0 only
    (one wall, e.g. the symmetry plane through the patch centre).
    """
    lo, hi = interval
    w0, w1 = walls
    out = []
    for n in range(-periods, periods + 1):
        shift = 2.0 * n * (w1 - w0)
        out += [(lo + shift, hi + shift), (2 * w0 - hi + shift, 2 * w0 - lo + shift)]
    return out


def _factor(s: float, pos: float, intervals: Sequence[Interval], scale: float) -> float:
    """F = Σ erfc((lo − pos) s/scale) − erfc((hi − pos) s/scale) (a sum over intervals)."""
    return sum(math.erfc((lo - pos) * s / scale) - math.erfc((hi - pos) * s / scale)
               for lo, hi in intervals)


def _edge_value(pos: float, intervals: Sequence[Interval]) -> float:
    """F at s = ∞: 2 inside an interval, 1 on its edge, 0 outside."""
    return sum(float(np.sign(pos - lo) - np.sign(pos - hi)) for lo, hi in intervals)


def _one_point(x: float, y: float, z: float, t: float, *, v: float, d: tuple[float, ...],
               patch_y: Sequence[Interval], patch_z: Sequence[Interval], retardation: float,
               decay_rate: float, rtol: float, atol: float) -> float:
    if x == 0.0:
        return 0.25 * _edge_value(y, patch_y) * _edge_value(z, patch_z)
    if t <= 0.0:
        return 0.0
    dx, dy, dz = d
    vr, dxr, lam = v / retardation, dx / retardation, decay_rate / retardation
    a = x * math.sqrt(vr**2 / (4 * dxr) + lam) / (2 * math.sqrt(dxr))
    shift = vr * x / (2 * dxr) - 2 * a  # b − 2a ≤ 0
    s0 = 0.0 if math.isinf(t) else x / (2 * math.sqrt(dxr * t))
    lo = max(s0, 0.5 * (-WINDOW + math.sqrt(WINDOW**2 + 4 * a)))
    hi = 0.5 * (WINDOW + math.sqrt(WINDOW**2 + 4 * a))
    if lo >= hi:
        return 0.0
    sy, sz = x * math.sqrt(dy / dx), x * math.sqrt(dz / dx)

    def integrand(s: float) -> float:
        return math.exp(-((s - a / s) ** 2) + shift) * _factor(s, y, patch_y, sy) * _factor(
            s, z, patch_z, sz)

    peak = math.sqrt(a)
    pieces = [(lo, peak), (peak, hi)] if lo < peak < hi else [(lo, hi)]
    total = 0.0
    for p, q in pieces:
        value, _ = quad(integrand, p, q, epsabs=atol, epsrel=rtol, limit=200)
        total += value
    return total / (2.0 * math.sqrt(math.pi))


def patch_concentration(
    x: np.ndarray | float, y: np.ndarray | float, z: np.ndarray | float,
    t: np.ndarray | float, *, velocity: float, dispersion: tuple[float, float, float],
    patch_y: Sequence[Interval], patch_z: Sequence[Interval], retardation: float = 1.0,
    decay_rate: float = 0.0, rtol: float = 1e-10, atol: float = 1e-14,
) -> np.ndarray:
    """c/c0 [-] of the continuous patch source held since t = 0 (module docstring).

    Parameters
    ----------
    x, y, z, t
        Positions [m] (x ≥ 0 downstream of the source plane) and times [s] (``np.inf`` for
        the steady state); broadcast against each other.
    velocity
        Seepage velocity v [m/s] along +x.
    dispersion
        (D_x, D_y, D_z) [m²/s], all positive.
    patch_y, patch_z
        The patch as lists of (lo, hi) intervals [m] on the plane x = 0 (one interval, or the
        patch and its wall images from :func:`wall_images`).
    retardation
        R [-].
    decay_rate
        k [1/s] in R c_t = ... − k c.
    rtol, atol
        Relative and absolute tolerance of the quadrature (atol in units of c/c0).

    Returns
    -------
    np.ndarray
        c/c0, the broadcast shape of the inputs.
    """
    xb, yb, zb, tb = np.broadcast_arrays(*(np.asarray(u, dtype=float) for u in (x, y, z, t)))
    if np.any(xb < 0):
        msg = "the patch solution is defined for x >= 0 only"
        raise ValueError(msg)
    out = np.empty(xb.shape)
    flat = out.reshape(-1)
    for i, (xi, yi, zi, ti) in enumerate(zip(xb.ravel(), yb.ravel(), zb.ravel(), tb.ravel(),
                                             strict=True)):
        flat[i] = _one_point(float(xi), float(yi), float(zi), float(ti), v=velocity,
                             d=dispersion, patch_y=patch_y, patch_z=patch_z,
                             retardation=retardation, decay_rate=decay_rate, rtol=rtol,
                             atol=atol)
    return out


def first_time_above(ratio: float, x: float, y: float, z: float, *, t_max: float,
                     xtol: float = 1.0, **params: object) -> float | None:
    """First time [s] at which c/c0 at (x, y, z) exceeds ``ratio`` (None if not by
    ``t_max``): Brent's root of c/c0 − ratio, which is increasing in time for a continuous
    source without decay (comparison principle), to ``xtol`` [s]."""
    def gap(t: float) -> float:
        return float(patch_concentration(x, y, z, t, **params)) - ratio  # type: ignore[arg-type]

    if gap(t_max) <= 0.0:
        return None
    return float(brentq(gap, 1e-6 * t_max, t_max, xtol=xtol, rtol=1e-12))


def entered_mass(t: float, *, c0: float, area: float, porosity: float, velocity: float,
                 dispersion_x: float, retardation: float) -> tuple[float, float]:
    r"""Net solute mass [kg] that has crossed the source plane by time ``t``, without decay:
    (advective part, dispersive part).

    The transverse integral of c is the patch area A times the 1D Ogata–Banks value u(x, t)
    (module docstring), so the net flux is A θ c0 (v − D_x ∂u/∂x at x = 0). From
    u = ½ erfc((Rx − vt)/(2√(D R t))) + ½ exp(vx/D) erfc((Rx + vt)/(2√(D R t)))::

        −D ∂u/∂x(0, t) = √(D R/(π t)) exp(−β t) − (v/2) erfc(√(β t)),   β = v²/(4 D R),

    and its time integral (∫√(DR/(πτ)) e^(−βτ) dτ = (2DR/v) erf(√(βt)); ∫ erfc(√(βτ)) dτ by
    parts) is::

        (D R/v) erf(√(βt)) − (v t/2) erfc(√(βt)) + √(D R t/π) exp(−βt),

    which starts as 2√(D R t/π) and tends to D R/v = α_L R. The advective part is
    c0 θ v A t = c0 q A t. Their sum equals the stored mass θ R A c0 ∫_0^∞ u dx (checked in
    ``test_patch_source.py``).
    """
    d, v, r = dispersion_x, velocity, retardation
    bt = v * v * t / (4.0 * d * r)
    dispersive = (d * r / v) * erf(math.sqrt(bt)) - 0.5 * v * t * erfc(math.sqrt(bt)) + (
        math.sqrt(d * r * t / math.pi) * math.exp(-bt))
    scale = c0 * porosity * area
    return scale * v * t, scale * float(dispersive)


# ------------------------------------------------------------------ the site-scale check


@dataclass(frozen=True)
class PatchSite:
    """The site-scale check of issue 11 (an invented site), in the units named per field.

    Half of a 600 m × 200 m sand 20 m thick (the south face y = 0 is the plume's symmetry
    plane), with the 40 m × 10 m patch at the top of the inflow (west) face: the model holds
    y ∈ [0, 20] m, z ∈ [−10, 0] m of it. The no-flux top and the south face are mirrors, so the
    exact reference is the patch y ∈ [−20, 20] m, z ∈ [−10, 10] m (height 2Z) in an unbounded
    medium; the north face (y = 100 m) and the base (z = −20 m) are mirrors too, and their
    images are added to show that they do not matter (:func:`wall_effect`).
    """

    length: float = 600.0  # [m]
    half_width: float = 100.0  # [m]
    thickness: float = 20.0  # [m]
    patch_half_width: float = 20.0  # [m]
    patch_height: float = 10.0  # [m]
    conductivity: float = 20.0  # [m/d]
    head_drop: float = 3.0  # [m] west − east: gradient 0.005, q = 0.1 m/d
    porosity: float = 0.25
    bulk_density: float = 1600.0  # [kg/m³]
    kd: float = 0.09375  # [L/kg] → R = 1 + 1600 · 9.375e-5 / 0.25 = 1.6
    alpha_l: float = 0.5  # [m]: grid Péclet 10 at 5 m cells
    alpha_t: float = 0.05  # [m], horizontal and vertical
    c0: float = 20.0  # [mg/L]
    limit_ratio: float = 1.0 / 4000.0  # limit = c0/4000 = 5 µg/L
    receptors: tuple[float, ...] = (100.0, 200.0, 300.0)  # [m] downgradient, y = 0
    receptor_z: float = -5.0  # [m], mid-height of the real patch
    fine_cell: float = 5.0  # [m] in the corridor
    cell: float = 20.0  # [m] elsewhere
    corridor_length: float = 340.0  # [m] along y = 0 from the west face
    corridor_radius: float = 40.0  # [m]
    dz: float = 1.0  # [m] cell layers
    end: float = 4.0  # [yr]

    @property
    def velocity(self) -> float:
        """Seepage velocity v [m/s]."""
        return self.conductivity * self.head_drop / self.length / self.porosity / DAY

    @property
    def retardation(self) -> float:
        """R [-]."""
        return 1.0 + self.bulk_density * self.kd * 1e-3 / self.porosity

    @property
    def dispersion(self) -> tuple[float, float, float]:
        """(D_x, D_y, D_z) [m²/s] (no molecular diffusion)."""
        v = self.velocity
        return self.alpha_l * v, self.alpha_t * v, self.alpha_t * v

    def reference(self, *, walls: bool = False) -> dict[str, object]:
        """Keyword arguments of :func:`patch_concentration` for this site; with ``walls``,
        the images of the patch in the north face and the base (one period each side)."""
        y_patch, z_patch = (0.0, self.patch_half_width), (-self.patch_height, 0.0)
        if walls:
            py = wall_images(y_patch, walls=(0.0, self.half_width), periods=1)
            pz = wall_images(z_patch, walls=(0.0, -self.thickness), periods=1)
        else:
            py = wall_images(y_patch, walls=(0.0, 0.0), periods=0)
            pz = wall_images(z_patch, walls=(0.0, 0.0), periods=0)
        return {"velocity": self.velocity, "dispersion": self.dispersion, "patch_y": py,
                "patch_z": pz, "retardation": self.retardation}

    def case(self, *, step: float, solver: Solver | None = None, scheme: str | None = None,
             fine_cell: float | None = None) -> Case:
        """The fe3d case: ``step`` [yr], ``solver`` options and time ``scheme`` (default:
        fe3d's defaults) and the corridor cell size [m] (default ``fine_cell``)."""
        h = self.fine_cell if fine_cell is None else fine_cell
        sand = Material(self.conductivity, self.conductivity, porosity=self.porosity,
                        bulk_density=self.bulk_density, longitudinal_dispersivity=self.alpha_l,
                        transverse_dispersivity=self.alpha_t)
        c_limit = self.c0 * self.limit_ratio
        corridor = {"name": "plume_corridor", "cell_size": f"{h} m",
                    "radius": f"{self.corridor_radius} m",
                    "points": [["0 m", "0 m"], [f"{self.corridor_length} m", "0 m"]]}
        return box_case(
            length=self.length, width=self.half_width, cell=self.cell, dz=self.dz,
            heads={"west": self.head_drop, "east": 0.0},
            layers=[Layer("sand", -self.thickness, sand)],
            species=[Species("solvent", limit=c_limit, kd=self.kd)],
            sources=[Source("spill_patch", species="solvent", shape="face_patch", face="west",
                            concentration=self.c0, y=(0.0, self.patch_half_width),
                            z=(-self.patch_height, 0.0))],
            observation_points=[ObservationPoint(f"R{x:.0f}", x, 0.0, self.receptor_z,
                                                 kind="receptor") for x in self.receptors],
            time=Time(f"{self.end} yr", f"{step} yr", scheme=scheme), solver=solver,
            sections={"refinement_lines": [corridor]}, title="patch source site check")

    def exact_first_times(self, *, walls: bool = False) -> list[float | None]:
        """Exact first time [s] above the limit at each receptor (Brent, to 1e-4 d)."""
        return [first_time_above(self.limit_ratio, x, 0.0, self.receptor_z,
                                 t_max=self.end * YEAR, xtol=1e-4 * DAY,
                                 **self.reference(walls=walls)) for x in self.receptors]

    def exact_entered(self) -> tuple[float, float]:
        """Exact net mass [kg] through the model's quarter of the mirrored patch by the end:
        (advective c0 q A t, dispersive part), :func:`entered_mass`."""
        return entered_mass(self.end * YEAR, c0=self.c0 * 1e-3,
                            area=self.patch_half_width * self.patch_height,
                            porosity=self.porosity, velocity=self.velocity,
                            dispersion_x=self.dispersion[0], retardation=self.retardation)


@dataclass(frozen=True)
class ReceptorResult:
    """fe3d against the exact solution at one receptor [s, kg/m³]."""

    x: float
    first_fe3d: float | None
    first_exact: float | None
    end_fe3d: float
    end_exact: float

    @property
    def first_error(self) -> float | None:
        """(fe3d − exact)/exact of the first time above the limit [-] (negative: early)."""
        if self.first_fe3d is None or self.first_exact is None:
            return None
        return (self.first_fe3d - self.first_exact) / self.first_exact


@dataclass(frozen=True)
class SiteResult:
    """One fe3d run of the site against the exact solution."""

    receptors: list[ReceptorResult]
    most_negative: float  # [kg/m³], the smallest nodal value over the run
    entered: float  # [kg], fe3d's source input
    entered_exact: tuple[float, float]  # [kg], (advective, dispersive)
    outflow: float  # [kg], through every boundary
    budget_error: float  # relative closure error of fe3d's mass budget (theory.md T9)
    corridor_edge: float  # [m], median plan edge length along y = 0 up to the last receptor
    max_courant: float
    max_grid_peclet: float
    n_nodes: int
    seconds: float


def _corridor_edge(mesh: object, site: PatchSite) -> float:
    """Median length [m] of the plan triangle edges within 10 m of the centreline between
    the source and the last receptor."""
    xy, tri = mesh.report.plan.xy, mesh.report.plan.tri  # type: ignore[attr-defined]
    centre = xy[:, tri].mean(axis=1)
    near = (centre[1] < 10.0) & (centre[0] < max(site.receptors))
    lengths = [np.linalg.norm(xy[:, tri[i, near]] - xy[:, tri[(i + 1) % 3, near]], axis=0)
               for i in range(3)]
    return float(np.median(np.concatenate(lengths)))


def run_site(site: PatchSite, case: Case, mesh_flow: tuple[object, object],
             exact_first: list[float | None]) -> SiteResult:
    """Run fe3d's transport for ``case`` on the mesh and flow ``mesh_flow`` and compare the
    receptors with the exact solution (``exact_first`` from :meth:`PatchSite.exact_first_times`).
    """
    import time

    mesh, flow = mesh_flow
    t0 = time.perf_counter()
    *_, last = run_transport(mesh, flow, TransportInputs.of(case))  # type: ignore[arg-type]
    seconds = time.perf_counter() - t0
    name = "solvent"
    hist = last.history[name]
    limit = site.c0 * 1e-3 * site.limit_ratio
    c0 = site.c0 * 1e-3
    ref = site.reference()
    rows = []
    for k, x in enumerate(site.receptors):
        b = breakthrough(last.history_times, hist[:, k], limit)
        end_exact = c0 * float(patch_concentration(x, 0.0, site.receptor_z, last.time, **ref))
        rows.append(ReceptorResult(x=x, first_fe3d=b.first_above_limit,
                                   first_exact=exact_first[k], end_fe3d=float(hist[-1, k]),
                                   end_exact=end_exact))
    budget = last.budgets[name]
    diag = last.diagnostics
    return SiteResult(receptors=rows, most_negative=float(diag.min_concentration[name][0]),
                      entered=budget.source_input, entered_exact=site.exact_entered(),
                      outflow=budget.total_outflow, budget_error=budget.relative_error,
                      corridor_edge=_corridor_edge(mesh, site), max_courant=diag.max_courant[name],
                      max_grid_peclet=diag.max_grid_peclet[name],
                      n_nodes=int(mesh.n_nodes), seconds=seconds)  # type: ignore[attr-defined]
