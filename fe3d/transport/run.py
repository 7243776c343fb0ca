"""run_transport: implicit SUPG time stepping of every species; yields snapshots, writes nothing.

Equation (theory.md T0), per species, with m = θR = θ + ρ_b K_d:

    m ∂c/∂t + ∇·(q c − θD∇c) + k c = 0,   k = λ m (or λ θ when only the dissolved phase decays)

discretised with P1 elements, the advective term in conservative form with an outflow term
on the fixed-head faces, SUPG on the residual of the whole equation, and the θ-scheme in time
(backward Euler θ = 1, Crank–Nicolson θ = 1/2). Operators are assembled once per distinct
step length and their factor or preconditioner reused for every step of that length.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import scipy.sparse as sp
from skfem import ElementTetP1, FacetBasis, asm

from fe3d._typing import FloatArray, IndexArray
from fe3d.case.schema import Case, Source, Species
from fe3d.errors import MeshError
from fe3d.flow.solve import FlowField, unit_materials
from fe3d.linalg import LinearSolver, scatter_element_matrices
from fe3d.mesh.geometry import p1_gradients
from fe3d.mesh.locate import sample_operator, screen_points
from fe3d.mesh.site_mesh import SiteMesh
from fe3d.reactions import kinetics, sorption
from fe3d.transport import forms
from fe3d.transport.assembly import P1_MASS, transport_operators
from fe3d.transport.budget import MassBudget
from fe3d.transport.dispersion import dispersion_tensor
from fe3d.transport.newton import newton
from fe3d.transport.stabilization import element_length_along_flow, supg_tau

__all__ = ["Snapshot", "TransportDiagnostics", "run_transport", "time_steps"]

logger = logging.getLogger(__name__)

_SCHEME_THETA = {"backward_euler": 1.0, "crank_nicolson": 0.5}


@dataclass(frozen=True)
class TransportDiagnostics:
    """Numbers that tell whether the discretisation was adequate."""

    n_steps: int
    max_grid_peclet: dict[str, float]
    max_courant: dict[str, float]
    min_concentration: dict[str, tuple[float, tuple[float, ...] | None]]
    solver: str


@dataclass(frozen=True)
class Snapshot:
    """State at one output time.

    ``concentration`` maps species → nodal concentration [kg/m³]; ``history_times`` [s] and
    ``history`` (species → array ``(n_times, n_observations)`` [kg/m³]) hold every step so far.
    """

    time: float
    concentration: dict[str, FloatArray]
    budgets: dict[str, MassBudget]
    history_times: FloatArray
    history: dict[str, FloatArray]
    diagnostics: TransportDiagnostics


def time_steps(breakpoints: list[float], step: float) -> list[tuple[float, float, float]]:
    """Steps (t0, t1, dt) [s] that land exactly on every breakpoint.

    Each interval between breakpoints is cut into the fewest equal steps no longer than
    ``step``. ``dt`` is rounded to 12 significant digits so that intervals of equal length
    share one step length (and one assembled operator); t1 of an interval's last step is the
    breakpoint itself.
    """
    out: list[tuple[float, float, float]] = []
    t = 0.0
    for b in breakpoints:
        if b <= t:
            continue
        n = max(1, math.ceil((b - t) / step - 1e-9))
        dt = float(f"{(b - t) / n:.12g}")
        for i in range(n):
            t1 = b if i == n - 1 else t + (i + 1) * dt
            out.append((t + i * dt, t1, dt))
        t = b
    return out


def _nodal(cells: IndexArray, per_cell: FloatArray, n: int) -> FloatArray:
    """Σ over cells of per_cell/4 at each of their nodes (∫φ_j = V/4 for P1)."""
    return np.bincount(cells.ravel(), weights=np.tile(per_cell / 4.0, 4), minlength=n)


@dataclass
class _Species:
    """Assembled coefficients and operators of one species (private, mutable caches)."""

    name: str
    spec: Species
    coef: dict[str, Any]
    w_dissolved: FloatArray
    w_sorbed: FloatArray
    w_decay: FloatArray
    outflow_weights: dict[str, FloatArray]
    outflow_matrix: sp.csr_matrix
    h: FloatArray
    operators: dict[float, tuple[sp.csr_matrix, sp.csr_matrix]] = field(default_factory=dict)
    solvers: dict[tuple[float, tuple[str, ...]],
                  tuple[LinearSolver | None, IndexArray, Any]] = field(default_factory=dict)

    def sorbed(self, c: FloatArray) -> tuple[FloatArray, FloatArray]:
        """Nodal sorbed mass [kg] and its derivative [m³] (lumped, T10); linear: W_ρ K_d c."""
        if not self.coef["sorbers"]:
            return self.w_sorbed * c, self.w_sorbed.copy()
        total, slope = np.zeros_like(c), np.zeros_like(c)
        for w_u, kind, par in self.coef["sorbers"]:
            s_u, ds_u = _ISOTHERMS[kind](c, **par)
            total += w_u * s_u
            slope += w_u * ds_u
        return total, slope

    def reaction_loss(self, c: FloatArray) -> tuple[FloatArray, FloatArray]:
        """Nodal mass loss rate [kg/s] of a nonlinear reaction (lumped, T11) and its
        derivative [m³/s]; zero without one."""
        if not self.coef["reaction"]:
            return np.zeros_like(c), np.zeros_like(c)
        kind, par = self.coef["reaction"]
        r, dr = _RATE_LAWS[kind](c, **par)
        return -self.w_dissolved * r, -self.w_dissolved * dr

    def sorbed_mass(self, c: FloatArray) -> float:
        """Sorbed mass in the model [kg]."""
        return float(self.sorbed(c)[0].sum())


def run_transport(
    site: SiteMesh, flow: FlowField, case: Case, *,
    on_step: Callable[[float, float], None] | None = None,
) -> Iterator[Snapshot]:
    """Step every species from 0 to ``case.time.end``; yield a :class:`Snapshot` at t = 0 and
    at every output time.

    Parameters
    ----------
    site, flow
        Mesh and steady flow field.
    case
        Materials, species, sources, observation points, time and solver controls.
    on_step
        Called after every step with (time reached, end time) [s], for progress display.
    """
    mesh = site.skfem_mesh()
    n = site.n_nodes
    mats, mat_names = unit_materials(case, site)
    lay = site.cell_layer
    theta = np.array([m.porosity for m in mats])[lay]
    rho_b = np.array([m.bulk_density for m in mats])[lay]
    grads, vol = p1_gradients(site.points, site.cells)
    q = flow.darcy_flux
    v = q / theta
    D = dispersion_tensor(
        v,
        alpha_l=np.array([m.longitudinal_dispersivity for m in mats])[lay],
        alpha_th=np.array([m.transverse_dispersivity for m in mats])[lay],
        alpha_tv=np.array([m.alpha_vertical for m in mats])[lay],
        d_eff=np.array([m.diffusion_coefficient * m.tortuosity for m in mats])[lay],
    )
    thetaD = theta * D
    outflow_faces = list(flow.fixed_head_nodes)
    facet_bases = {name: FacetBasis(mesh, ElementTetP1(), facets=mesh.boundaries[name])
                   for name in outflow_faces}
    qn_out = {}
    for name, fb in facet_bases.items():
        qn = np.einsum("ke,keq->eq", q[:, fb.tind], fb.normals)
        qn_out[name] = np.clip(qn, 0.0, None)
    theta_t = _SCHEME_THETA[case.time.scheme]
    supg_on = case.solver.supg

    species: list[_Species] = []

    def depth(name: str) -> int:  # parents before daughters in every step
        parent = case.species[name].parent
        return 0 if parent is None else 1 + depth(parent)

    for name, spec in sorted(case.species.items(), key=lambda item: depth(item[0])):
        nonlinear = spec.sorption != "linear"
        sorbers: list[tuple[FloatArray, str, dict[str, float]]] = []
        if nonlinear:
            # lumped sorbed storage per unit (T10); R at a reference concentration sets the
            # advective velocity, τ and the SUPG storage coefficient
            c_ref = max([src.concentration for src in case.sources
                         if src.species == name and src.concentration is not None]
                        + [spec.initial_concentration, spec.limit])
            kd = np.zeros(site.n_cells)
            for u, mn in enumerate(mat_names):
                kind, par = spec.isotherm_of(mn)
                _, ds = _ISOTHERMS[kind](np.array([c_ref]), **par)
                kd[lay == u] = ds[0]
                w_u = _nodal(site.cells, np.where(lay == u, rho_b * vol, 0.0), n)
                sorbers.append((w_u, kind, par))
        else:
            kd = np.array([spec.kd_of(mn) for mn in mat_names])[lay]
        m = theta + rho_b * kd
        lam = spec.decay_rate
        k = lam * (m if spec.decay_in_sorbed_phase and not nonlinear else theta)
        a = q / m
        speed2 = np.sum(a * a, axis=0)
        along = np.einsum("ie,ije,je->e", a, thetaD, a)
        kappa = np.divide(along, speed2 * m, out=np.zeros_like(m), where=speed2 > 0)
        h = element_length_along_flow(a, grads)
        ow = {f: asm(forms.outflow_weight, fb, qn=qn_out[f]) for f, fb in facet_bases.items()}
        om = sum((asm(forms.outflow, fb, qn=qn_out[f]) for f, fb in facet_bases.items()),
                 sp.csr_matrix((n, n)))
        for item, f in flow.exchange.items():
            out_rate = np.clip(-f, 0.0, None)  # water leaving [m³/s] per node
            if np.any(out_rate > 0):
                ow[item] = out_rate
                om = om + sp.diags(out_rate)
        species.append(_Species(
            name=name, spec=spec,
            coef={"m": m, "k": k, "a": a, "kappa": kappa, "sigma": k / m,
                  "courant_rate": float(np.max(np.sqrt(speed2) / h)),
                  "sorbers": sorbers, "reaction": spec.nonlinear_reaction,
                  "sorbed_decay": lam if spec.decay_in_sorbed_phase else 0.0},
            w_dissolved=_nodal(site.cells, theta * vol, n),
            w_sorbed=_nodal(site.cells, rho_b * kd * vol, n),
            w_decay=_nodal(site.cells, k * vol, n),
            outflow_weights=ow, outflow_matrix=sp.csr_matrix(om), h=h))

    parents = {spec.parent for spec in case.species.values() if spec.parent is not None}
    decay_matrix = {s.name: scatter_element_matrices(
        site.cells, (s.coef["k"] * np.abs(vol))[:, None, None] * P1_MASS, n)
        for s in species if s.name in parents}
    decay_loss: dict[str, FloatArray] = {}  # parent → decay mass rate per node in this step

    def operators(s: _Species, dt: float) -> tuple[sp.csr_matrix, sp.csr_matrix]:
        if dt not in s.operators:
            c = s.coef
            tau = supg_tau(c["a"], c["kappa"], c["sigma"], s.h, dt) if supg_on \
                else np.zeros_like(c["m"])
            nonlin = bool(c["sorbers"])
            M, K = transport_operators(site.cells, grads, vol,
                                       m=theta if nonlin else c["m"], k=c["k"], q=q,
                                       a=c["a"], tau=tau, theta_d=thetaD, n=n,
                                       m_supg=c["m"] if nonlin else None)
            K = (K + s.outflow_matrix).tocsr()
            S = (M / dt + theta_t * K).tocsr()
            T = (M / dt - (1.0 - theta_t) * K).tocsr()
            s.operators = {dt: (S, T)}  # keep only the current step length's operators
        return s.operators[dt]

    # source nodes
    source_nodes = {src.name: _source_nodes(site, src) for src in case.sources}
    inflow_weights = {}
    for src in case.sources:
        if src.kind == "inflow_concentration":
            assert src.face is not None
            facets = mesh.boundaries[src.face]
            mid = mesh.p[:, mesh.facets[:, facets]].mean(axis=1)
            keep = np.ones(facets.size, dtype=bool)
            for axis, rng in enumerate((src.x, src.y, src.z)):
                if rng is not None:
                    keep &= (mid[axis] >= rng[0]) & (mid[axis] <= rng[1])
            if not keep.any():
                msg = f"source {src.name!r}: no face triangle of {src.face!r} in its ranges"
                raise MeshError(msg)
            fb = FacetBasis(mesh, ElementTetP1(), facets=facets[keep])
            qn = np.einsum("ke,keq->eq", q[:, fb.tind], fb.normals)
            inflow_weights[src.name] = asm(forms.inflow_weight, fb,
                                           qn_in=np.clip(-qn, 0.0, None))
    node_volume = _nodal(site.cells, np.abs(vol), n)
    loading_weights = {}
    for src in case.sources:
        if src.kind == "mass_loading":
            w = np.zeros(n)
            w[source_nodes[src.name]] = node_volume[source_nodes[src.name]]
            loading_weights[src.name] = w / w.sum()

    # observation operators
    obs = case.observation_points
    kh_cell = flow.conductivity[0]
    spacing = max(case.mesh.layer_cell_thickness / 4.0, 0.05)
    rows = []
    for o in obs:
        if o.screen is not None:
            pts = screen_points(o.x, o.y, o.screen[0], o.screen[1], spacing=spacing)
            op, _ = sample_operator(site.points, site.cells, pts, weights_per_cell=kh_cell)
        else:
            op, _ = sample_operator(site.points, site.cells, np.array([[o.x], [o.y], [o.z]]))
        rows.append(op)
    probe = sp.vstack(rows).tocsr() if rows else sp.csr_matrix((0, n))

    schedule = case.output_schedule()
    breaks = sorted({*schedule, *[s.start for s in case.sources if 0 < s.start < case.time.end],
                     *[s.stop for s in case.sources if s.stop and s.stop < case.time.end]})
    steps = time_steps(breaks, case.time.step)
    out_set = set(schedule)

    conc = {s.name: np.full(n, s.spec.initial_concentration) for s in species}
    was_fixed = {s.name: np.zeros(n, dtype=bool) for s in species}
    for src in case.sources:
        if src.kind == "initial_plume":
            assert src.concentration is not None
            nodes = source_nodes[src.name]
            conc[src.species][nodes] = np.maximum(conc[src.species][nodes], src.concentration)
    acc = {s.name: {"input": 0.0, "decayed": 0.0,
                    "outflow": dict.fromkeys(s.outflow_weights, 0.0)} for s in species}
    initial = {s.name: float(s.w_dissolved @ conc[s.name]) + s.sorbed_mass(conc[s.name])
               for s in species}
    hist_t = [0.0]
    hist = {s.name: [probe @ conc[s.name]] for s in species}
    cmin: dict[str, tuple[float, tuple[float, ...] | None]] = {
        s.name: (0.0, None) for s in species}
    courant = {s.name: 0.0 for s in species}
    peclet = {}
    for s in species:
        speed_v = np.sqrt(np.sum(v * v, axis=0))
        dl = s.coef["kappa"] * s.coef["m"] / theta
        peclet[s.name] = float(np.max(np.divide(speed_v * s.h, dl, out=np.full_like(dl, np.inf),
                                                where=dl > 0))) if np.any(speed_v > 0) else 0.0
    solver_used = "none"

    def snapshot(t: float, n_steps: int) -> Snapshot:
        budgets = {s.name: MassBudget(
            species=s.name, time=t, dissolved=float(s.w_dissolved @ conc[s.name]),
            sorbed=s.sorbed_mass(conc[s.name]), initial=initial[s.name],
            source_input=acc[s.name]["input"], outflow=dict(acc[s.name]["outflow"]),
            decayed=acc[s.name]["decayed"]) for s in species}
        diag = TransportDiagnostics(n_steps=n_steps, max_grid_peclet=dict(peclet),
                                    max_courant=dict(courant), min_concentration=dict(cmin),
                                    solver=solver_used)
        return Snapshot(time=t, concentration={k: c.copy() for k, c in conc.items()},
                        budgets=budgets, history_times=np.array(hist_t),
                        history={k: np.array(vv) for k, vv in hist.items()}, diagnostics=diag)

    yield snapshot(0.0, 0)
    for i, (t0, t1, dt) in enumerate(steps):
        tmid = 0.5 * (t0 + t1)
        for s in species:
            active = tuple(src.name for src in case.sources if src.species == s.name
                           and src.kind == "fixed_concentration"
                           and src.start <= tmid and (src.stop is None or tmid <= src.stop))
            S, T = operators(s, dt)
            key = (dt, active)
            if key not in s.solvers:
                is_fixed = np.zeros(n, dtype=bool)
                for name in active:
                    is_fixed[source_nodes[name]] = True
                free = np.nonzero(~is_fixed)[0]
                fixed = np.nonzero(is_fixed)[0]
                solver = None if (s.coef["sorbers"] or s.coef["reaction"]) else LinearSolver(
                    S[free][:, free], method=case.solver.linear_solver,
                    tol=case.solver.tolerance)  # Newton builds its own (T10, T11)
                s.solvers = {key: (solver, free, (fixed, S[free][:, fixed]))}
                solver_used = "newton" if solver is None else solver.method
            solver, free, (fixed, S_fD) = s.solvers[key]
            start_vals, end_vals = np.zeros(n), np.zeros(n)
            for src in case.sources:
                if src.name in active:
                    assert src.concentration is not None
                    nodes = source_nodes[src.name]
                    start_vals[nodes] = np.maximum(start_vals[nodes],
                                                   src.concentration * _depletion(src, t0))
                    end_vals[nodes] = np.maximum(end_vals[nodes],
                                                 src.concentration * _depletion(src, t1))
            gvals = end_vals[fixed]
            load = np.zeros(n)
            for src in case.sources:
                if src.species != s.name or not (src.start <= tmid and (
                        src.stop is None or tmid <= src.stop)):
                    continue
                if src.kind == "mass_loading":
                    assert src.mass_rate is not None
                    load += src.mass_rate * loading_weights[src.name]
                elif src.kind == "inflow_concentration":  # (−q·n)⁺ c_in on the patch (T3b)
                    assert src.concentration is not None
                    load += src.concentration * _depletion(src, tmid) * \
                        inflow_weights[src.name]
            if s.spec.parent is not None:  # first-order decay of the parent feeds it (T12)
                load = load + s.spec.yield_from_parent * decay_loss[s.spec.parent]
            old = conc[s.name]
            switched_on = fixed[~was_fixed[s.name][fixed]]
            if switched_on.size:
                # a source switching on holds its nodes at the source value from t0, so the
                # θ-scheme does not see a ramp; the mass placed there is counted as input
                jump = np.zeros(n)
                jump[switched_on] = start_vals[switched_on] - old[switched_on]
                acc[s.name]["input"] += float(s.w_dissolved @ jump) + \
                    s.sorbed_mass(old + jump) - s.sorbed_mass(old)
                old = old + jump
            was_fixed[s.name][:] = False
            was_fixed[s.name][fixed] = True
            rhs = T @ old + load
            new = old.copy()
            new[fixed] = gvals
            if s.coef["sorbers"] or s.coef["reaction"]:
                new, r, other_loss = _nonlinear_step(
                    s, S, rhs, old, new, free, dt, theta_t, method=case.solver.linear_solver,
                    tol=case.solver.tolerance)
            else:
                assert solver is not None
                b = rhs[free] - S_fD @ gvals
                new[free] = solver.solve(b, x0=old[free])
                # budget from the consistent residual of the full (unreduced) system (T9)
                r = S @ new - rhs
                other_loss = 0.0
            c_mid = theta_t * new + (1.0 - theta_t) * old
            if s.name in decay_matrix:
                decay_loss[s.name] = decay_matrix[s.name] @ c_mid + (
                    _sorbed_decay_rate(s, new, old, theta_t) if s.coef["sorbers"] else 0.0)
            a_ = acc[s.name]
            a_["input"] += dt * (float(r[fixed].sum()) + float(load.sum()))
            a_["decayed"] += dt * float(s.w_decay @ c_mid) + other_loss
            for f, w in s.outflow_weights.items():
                a_["outflow"][f] += dt * float(w @ c_mid)
            conc[s.name] = new
            j = int(np.argmin(new))
            if new[j] < cmin[s.name][0]:
                cmin[s.name] = (float(new[j]), tuple(float(x) for x in site.points[:, j]))
            courant[s.name] = max(courant[s.name], dt * s.coef["courant_rate"])
        hist_t.append(t1)
        for s in species:
            hist[s.name].append(probe @ conc[s.name])
        if on_step is not None:
            on_step(t1, case.time.end)
        if any(abs(t1 - t) <= 1e-9 * max(1.0, t) for t in out_set):
            yield snapshot(t1, i + 1)


def _source_nodes(site: SiteMesh, src: Source) -> IndexArray:
    """Mesh nodes held at the source concentration."""
    p = site.points
    if src.shape == "face_patch":
        assert src.face is not None
        cand = site.face_nodes(src.face)
    else:
        cand = np.arange(site.n_nodes)
    keep = np.ones(cand.size, dtype=bool)
    for axis, rng in enumerate((src.x, src.y, src.z)):
        if rng is not None:
            tol = 1e-9 * max(1.0, abs(rng[1] - rng[0]))
            keep &= (p[axis, cand] >= rng[0] - tol) & (p[axis, cand] <= rng[1] + tol)
    nodes = cand[keep]
    if nodes.size == 0:
        msg = (f"source {src.name!r} contains no mesh node; enlarge it or set a smaller "
               "mesh.fine_cell_size / mesh.layer_cell_thickness")
        raise MeshError(msg)
    return nodes


_RATE_LAWS = {"second_order": kinetics.second_order, "monod": kinetics.monod}

_ISOTHERMS = {"linear": sorption.linear, "freundlich": sorption.freundlich,
              "langmuir": sorption.langmuir}


def _nonlinear_step(
    s: _Species, S: sp.csr_matrix, rhs: FloatArray, old: FloatArray, new: FloatArray,
    free: IndexArray, dt: float, theta_t: float, *, method: str, tol: float,
) -> tuple[FloatArray, FloatArray, float]:
    """One θ-scheme step with nonlinear sorption and/or reaction, by Newton (T10, T11).

    R(c) = S c − T c_old + [Σ(c) − Σ(c_old)]/dt + λ_s [θ Σ(c) + (1 − θ) Σ(c_old)], with Σ the
    lumped nodal sorbed mass; J = S + diag(Σ'(c)) (1/dt + θ λ_s). Returns the new field, the
    full residual (for the budget) and the mass lost in the step [kg] by sorbed-phase decay
    and by the nonlinear reaction.
    """
    lam_s = float(s.coef["sorbed_decay"])
    sig_old, _ = s.sorbed(old)
    loss_old, _ = s.reaction_loss(old)
    S_ff = S[free][:, free]

    def full_residual(c: FloatArray) -> FloatArray:
        sig, _ = s.sorbed(c)
        loss, _ = s.reaction_loss(c)
        return (S @ c - rhs + (sig - sig_old) / dt
                + lam_s * (theta_t * sig + (1 - theta_t) * sig_old)
                + theta_t * loss + (1 - theta_t) * loss_old)

    def residual(x: FloatArray) -> FloatArray:
        c = new.copy()
        c[free] = x
        return full_residual(c)[free]

    def jacobian_solve(x: FloatArray, r: FloatArray) -> FloatArray:
        c = new.copy()
        c[free] = x
        _, dsig = s.sorbed(c)
        _, dloss = s.reaction_loss(c)
        J = (S_ff + sp.diags(dsig[free] * (1.0 / dt + theta_t * lam_s)
                             + theta_t * dloss[free])).tocsr()
        return LinearSolver(J, method=method, tol=min(tol, 1e-12)).solve(r)

    result = newton(residual, jacobian_solve, old[free].copy(), rtol=tol, atol=0.0,
                    max_iter=30)
    logger.info("%s: Newton %d iterations, residual norms %s", s.name, result.iterations,
                ", ".join(f"{r:.2e}" for r in result.residual_norms))
    c = new.copy()
    c[free] = result.x
    sig_new, _ = s.sorbed(c)
    loss_new, _ = s.reaction_loss(c)
    decayed = dt * (lam_s * float((theta_t * sig_new + (1 - theta_t) * sig_old).sum())
                    + float((theta_t * loss_new + (1 - theta_t) * loss_old).sum()))
    return c, full_residual(c), decayed


def _depletion(src: Source, t: float) -> float:
    """Strength factor of a depleting source at time t: exp(−ln 2 (t − start)/half-life)."""
    if src.depletion_half_life is None:
        return 1.0
    return math.exp(-math.log(2.0) * max(t - src.start, 0.0) / src.depletion_half_life)


def _sorbed_decay_rate(s: _Species, new: FloatArray, old: FloatArray,
                       theta_t: float) -> FloatArray:
    """Nodal decay rate of the lumped sorbed phase [kg/s] over a step (T10, T12)."""
    lam_s = float(s.coef["sorbed_decay"])
    return lam_s * (theta_t * s.sorbed(new)[0] + (1 - theta_t) * s.sorbed(old)[0])
