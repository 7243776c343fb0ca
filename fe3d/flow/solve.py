"""solve_flow: steady confined Darcy flow with fixed heads, fluxes, recharge, head-dependent
boundaries and wells; Darcy flux per cell and an item-by-item water budget."""

from __future__ import annotations

import logging
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import scipy.sparse as sp

from fe3d._threads import limit_blas_threads
from fe3d._typing import FloatArray, IndexArray
from fe3d.case.parts import FlowInputs
from fe3d.errors import CaseError, SolverError
from fe3d.flow.assembly import conductance_matrix
from fe3d.flow.boundaries import lumped_face_weights
from fe3d.flow.conductivity import CellConductivity, cell_conductivity
from fe3d.flow.site_rules import (
    head_dependent_problems,
    recharge_mask,
    recharge_problems,
    screened_unit_problems,
    zone_mask,
)
from fe3d.linalg import FLOW_TOLERANCE, SpdPreconditioner, solve_spd
from fe3d.mesh.locate import sample_operator, screen_points
from fe3d.mesh.materials import cell_values, unit_materials
from fe3d.mesh.site_mesh import SiteMesh
from fe3d.p1 import split_rows, tensor_gradient
from fe3d.sgs import plus_diagonal

__all__ = ["BoundaryFlow", "FlowField", "solve_flow"]

logger = logging.getLogger(__name__)


@dataclass(frozen=True)
class BoundaryFlow:
    """Water entering and leaving through one budget item [m³/s] (both ≥ 0)."""

    name: str
    kind: str
    inflow: float
    outflow: float

    @property
    def net(self) -> float:
        """Inflow minus outflow [m³/s]."""
        return self.inflow - self.outflow


@dataclass(frozen=True)
class FlowField:
    """Steady flow solution.

    Attributes
    ----------
    head
        Hydraulic head at the nodes [m], shape ``(n_nodes,)``.
    darcy_flux
        Darcy flux q = −K∇h per cell [m/s], shape ``(3, n_cells)``.
    cell_conductivity
        Conductivity of every cell as solved (:class:`~fe3d.flow.conductivity.CellConductivity`:
        K_h per cell, the unit of each cell, K_v/K_h and the bedding normal per unit);
        ``conductivity`` forms the principal values per cell from it when read.
    porosity
        Porosity of each cell's material [-], shape ``(n_cells,)``: carried with the flow so
        that the seepage velocity, the tracking, the transport and the outputs share one
        array.
    budget
        Inflow and outflow per budget item (fixed-head face, flux face, recharge zone,
        head-dependent zone, well).
    fixed_head_nodes
        Face name → node ids where the head is fixed.
    exchange
        Budget item name → nodal inflow [m³/s] (negative: outflow) of every item other than
        the fixed heads (wells, recharge, fluxes, head-dependent zones), shape ``(n_nodes,)``.
    solver_iterations
        Conjugate-gradient iterations, summed over drain active-set passes (0 when direct).
    timings
        Solver set-up and solve times of the last pass [s].
    well_heads
        Well name → head in the well [m]: the conductivity-weighted mean of the nodal head
        along its screens (mesh-scale, not corrected to the well radius).
    """

    head: FloatArray
    darcy_flux: FloatArray
    cell_conductivity: CellConductivity
    porosity: FloatArray
    budget: tuple[BoundaryFlow, ...]
    fixed_head_nodes: dict[str, IndexArray]
    well_heads: dict[str, float] = field(default_factory=dict)
    exchange: dict[str, FloatArray] = field(default_factory=dict)
    solver_iterations: int = 0
    timings: dict[str, float] = field(default_factory=dict)

    @property
    def conductivity(self) -> FloatArray:
        """Principal conductivities (K_h, K_h, K_v) per cell [m/s], shape ``(3, n_cells)``,
        formed on each access (not held: 24 bytes per cell)."""
        return self.cell_conductivity.principal

    @property
    def seepage_velocity(self) -> FloatArray:
        """Seepage velocity v = q/θ per cell [m/s], shape ``(3, n_cells)`` (F8)."""
        return self.darcy_flux / self.porosity

    @property
    def total_inflow(self) -> float:
        """Sum of all inflows [m³/s]."""
        return sum(b.inflow for b in self.budget)

    @property
    def total_outflow(self) -> float:
        """Sum of all outflows [m³/s]."""
        return sum(b.outflow for b in self.budget)

    @property
    def discrepancy(self) -> float:
        """Relative budget discrepancy |in − out| / max(in, out) [-]."""
        scale = max(self.total_inflow, self.total_outflow)
        return abs(self.total_inflow - self.total_outflow) / scale if scale > 0 else 0.0


def _split(f: FloatArray) -> tuple[float, float]:
    return float(np.clip(f, 0, None).sum()), float(np.clip(-f, 0, None).sum())


def solve_flow(
    site: SiteMesh, inputs: FlowInputs, *, base_dir: Path | None = None,
    extra_fixed: dict[str, tuple[IndexArray, FloatArray]] | None = None,
    preconditioner: SpdPreconditioner | None = None,
) -> FlowField:
    """Solve ∇·(K∇h) + sources = 0 (theory.md F1–F7).

    Parameters
    ----------
    site
        The mesh.
    inputs
        Materials, fixed heads, specified fluxes, recharge, head-dependent zones and wells
        (:meth:`FlowInputs.of <fe3d.case.parts.FlowInputs.of>` a case).
    base_dir
        Folder against which relative file names in the case (conductivity fields) resolve.
    extra_fixed
        For scripting and verification: name → (node ids, heads [m]) fixed in addition to
        the case's fixed heads, and taking precedence over them where both apply.
    preconditioner
        An AMG hierarchy to build once and reuse (:class:`fe3d.linalg.SpdPreconditioner`):
        ensemble members on one mesh with the same fixed-head faces pass the same object to
        every call and pay the AMG set-up once, and so does the drawdown's second solve
        (:func:`fe3d.flow.drawdown.well_drawdown`). Without it each call (and each drain
        pass) builds its own.

    Raises
    ------
    CaseError
        When nothing fixes the head level (no fixed head and no head-dependent boundary).
    """
    limit_blas_threads()
    if not inputs.fixed_heads and not inputs.head_dependent and not extra_fixed:
        msg = ("at least one fixed head or head-dependent boundary is needed, otherwise the "
               "head is undetermined")
        raise CaseError("fixed_heads", "[]", msg)
    n = site.n_nodes
    p = site.points
    mats, mat_names = unit_materials(inputs.ground, site)
    conductivity = cell_conductivity(p, site.cells, site.cell_layer, mats,
                                     unit_keys=[f"materials.{m}" for m in mat_names],
                                     base_dir=base_dir)
    A = conductance_matrix(p, site.cells, conductivity, pattern=site.pattern)

    # Dirichlet: fixed heads; a node on two fixed-head faces takes the first listed
    head = np.zeros(n)
    is_fixed = np.zeros(n, dtype=bool)
    owner: dict[str, IndexArray] = {}
    for name, (nodes, values) in (extra_fixed or {}).items():  # scripted heads come first
        keep = ~is_fixed[nodes]
        head[nodes[keep]] = values[keep]
        is_fixed[nodes[keep]] = True
        owner[name] = nodes[keep]
    for fh in inputs.fixed_heads:
        nodes = site.face_nodes(fh.face)
        nodes = nodes[~is_fixed[nodes]]
        head[nodes] = fh.head_at(p[:, nodes])
        is_fixed[nodes] = True
        owner[fh.face] = nodes

    # fixed nodal inflows [m³/s]: specified fluxes, recharge, wells
    items: list[tuple[str, str, FloatArray]] = []
    for sf in inputs.specified_fluxes:
        w = lumped_face_weights(p, site.faces[sf.face], n)
        items.append((f"flux_{sf.face}", "specified flux", sf.flux * w))
    for rc in inputs.recharge:
        _raise_first(recharge_problems(site, rc))
        items.append((rc.name, "recharge", rc.rate * lumped_face_weights(
            p, site.faces["top"], n, recharge_mask(site, rc))))
    well_ops = {}
    for well in inputs.wells:
        pts = np.hstack([screen_points(well.x, well.y, t, b, spacing=inputs.sample_spacing)
                         for t, b in well.screens])
        op, in_cells = sample_operator(p, site.cells, pts,
                                       weights_per_cell=conductivity.horizontal)
        _raise_first(screened_unit_problems(site, well, in_cells))
        well_ops[well.name] = op
        sign = {"extraction": -1.0, "injection": 1.0, "observation": 0.0}[well.kind]
        items.append((well.name, "well", sign * well.rate * np.asarray(op.todense()).ravel()))
    b = sum((f for _, _, f in items), np.zeros(n))

    # head-dependent zones (lumped): inflow = L a_i (stage − h_i); drains only remove water
    robin = []
    for hd in inputs.head_dependent:
        _raise_first(head_dependent_problems(site, hd))
        la = hd.leakance * lumped_face_weights(p, site.faces[hd.face], n, zone_mask(site, hd))
        la[is_fixed] = 0.0
        robin.append((hd, la))

    active = [np.ones(n, dtype=bool) for _ in robin]
    fixed = np.nonzero(is_fixed)[0]
    free = np.nonzero(~is_fixed)[0]
    iterations = 0
    stats: dict[str, float] = {}
    for _ in range(50):
        diag = np.zeros(n)
        rhs = b.copy()
        for (hd, la), act in zip(robin, active, strict=True):
            diag += la * act
            rhs += la * act * hd.stage
        head = _solve_heads(plus_diagonal(A, diag) if robin else A, rhs, head, free, fixed,
                            stats=stats, preconditioner=preconditioner)
        iterations += int(stats.get("iterations", 0))
        new_active = [np.ones(n, dtype=bool) if hd.kind == "stream" else head > hd.stage
                      for hd, _ in robin]
        if all(np.array_equal(a1, a2) for a1, a2 in zip(active, new_active, strict=True)):
            break
        active = new_active
    else:
        msg = "drain activity did not settle in 50 iterations"
        raise SolverError(msg)

    for (hd, la), act in zip(robin, active, strict=True):
        items.append((hd.name, hd.kind, la * act * (hd.stage - head)))
    # q = −K∇h per cell (F8): K_h per cell times the unit's shape tensor, as assembled
    q = -tensor_gradient(p, site.cells, head, conductivity.unit_shape, conductivity.cell_unit,
                         conductivity.horizontal)
    # consistent fixed-head flux: what the fixed rows need beyond every other term (F4)
    other = sum((f for _, _, f in items), np.zeros(n))
    reaction = A @ head - other
    budget = [BoundaryFlow(name, "fixed head", *_split(reaction[nodes]))
              for name, nodes in owner.items()]
    budget += [BoundaryFlow(name, kind, *_split(f)) for name, kind, f in items]
    well_heads = {name: float((op @ head)[0]) for name, op in well_ops.items()}
    result = FlowField(head=head, darcy_flux=q, cell_conductivity=conductivity,
                       porosity=cell_values(mats, site, "porosity"), budget=tuple(budget),
                       fixed_head_nodes=owner, well_heads=well_heads,
                       exchange={name: f for name, _, f in items},
                       solver_iterations=iterations, timings=dict(stats))
    logger.info("flow: in %.4e m3/s, out %.4e m3/s, discrepancy %.2e",
                result.total_inflow, result.total_outflow, result.discrepancy)
    return result


def _solve_heads(M: sp.csr_matrix, rhs: FloatArray, head: FloatArray, free: IndexArray,
                 fixed: IndexArray, *, stats: dict[str, float],
                 preconditioner: SpdPreconditioner | None) -> FloatArray:
    """The heads of one pass: ``head`` at the ``fixed`` nodes, M h = rhs solved on the
    ``free`` ones (the reduced blocks are dropped on return)."""
    if not fixed.size:
        return solve_spd(M, rhs, tol=FLOW_TOLERANCE, stats=stats, preconditioner=preconditioner)
    M_ff, M_fD = split_rows(M, free, fixed)
    out = head.copy()
    out[free] = solve_spd(M_ff, rhs[free] - M_fD @ head[fixed], tol=FLOW_TOLERANCE, stats=stats,
                          preconditioner=preconditioner)
    return out


def _raise_first(problems: list[CaseError]) -> None:
    """Stop at the first broken mesh rule of an item (``fe3d check`` lists them all)."""
    if problems:
        raise problems[0]
