"""solve_flow: steady confined Darcy flow, Darcy flux per cell and the boundary budget."""

from __future__ import annotations

import logging
from dataclasses import dataclass

import numpy as np
from skfem import Basis, ElementTetP1, asm, condense

from fe3d._typing import FloatArray, IndexArray
from fe3d.case.schema import FixedHead, Material
from fe3d.errors import CaseError
from fe3d.flow.forms import conductance
from fe3d.linalg import solve_spd
from fe3d.mesh.geometry import p1_gradients
from fe3d.mesh.site_mesh import SiteMesh

__all__ = ["BoundaryFlow", "FlowField", "conductivity_per_cell", "solve_flow"]

logger = logging.getLogger(__name__)


@dataclass(frozen=True)
class BoundaryFlow:
    """Water entering and leaving through one boundary [m³/s] (both ≥ 0)."""

    name: str
    inflow: float
    outflow: float


@dataclass(frozen=True)
class FlowField:
    """Steady flow solution.

    Attributes
    ----------
    head
        Hydraulic head at the nodes [m], shape ``(n_nodes,)``.
    darcy_flux
        Darcy flux q = −K∇h per cell [m/s], shape ``(3, n_cells)``.
    conductivity
        Principal conductivities (K_x, K_y, K_z) per cell [m/s], shape ``(3, n_cells)``.
    budget
        Inflow and outflow per boundary.
    fixed_head_nodes
        Boundary name → node ids where the head is fixed.
    """

    head: FloatArray
    darcy_flux: FloatArray
    conductivity: FloatArray
    budget: tuple[BoundaryFlow, ...]
    fixed_head_nodes: dict[str, IndexArray]

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


def conductivity_per_cell(site: SiteMesh, layer_materials: list[Material]) -> FloatArray:
    """(K_h, K_h, K_v) of every cell from its unit's material [m/s], shape ``(3, n_cells)``."""
    kh = np.array([m.horizontal_conductivity for m in layer_materials])[site.cell_layer]
    kv = np.array([m.k_vertical for m in layer_materials])[site.cell_layer]
    return np.vstack([kh, kh, kv])


def solve_flow(site: SiteMesh, layer_materials: list[Material],
               fixed_heads: list[FixedHead]) -> FlowField:
    """Solve ∇·(K∇h) = 0 with fixed heads on named faces; no-flow elsewhere (theory.md F1–F3).

    Parameters
    ----------
    site
        The mesh.
    layer_materials
        Material of each unit, in the order of ``site.layer_names``.
    fixed_heads
        Fixed heads; a node on two fixed-head faces takes the first one listed.

    Raises
    ------
    CaseError
        When no fixed head is given (the problem would be singular).
    """
    if not fixed_heads:
        msg = "at least one fixed head is needed, otherwise the head is undetermined"
        msg_0 = "fixed_heads"
        raise CaseError(msg_0, "[]", msg)
    mesh = site.skfem_mesh()
    basis = Basis(mesh, ElementTetP1())
    kcell = conductivity_per_cell(site, layer_materials)
    nqp = basis.X.shape[1]
    K = np.zeros((3, 3, site.n_cells, nqp))
    for i in range(3):
        K[i, i] = kcell[i][:, None]
    A = asm(conductance, basis, K=K).tocsr()
    head = np.zeros(site.n_nodes)
    is_fixed = np.zeros(site.n_nodes, dtype=bool)
    owner: dict[str, IndexArray] = {}
    for fh in fixed_heads:
        nodes = site.face_nodes(fh.face)
        nodes = nodes[~is_fixed[nodes]]
        head[nodes] = fh.head
        is_fixed[nodes] = True
        owner[fh.face] = nodes
    fixed = np.nonzero(is_fixed)[0]
    A_ff, b_f, _, free = condense(A, np.zeros(site.n_nodes), x=head, D=fixed)
    head[free] = solve_spd(A_ff.tocsr(), b_f)
    grads, _ = p1_gradients(site.points, site.cells)
    grad_h = np.einsum("eik,ie->ke", grads, head[site.cells])
    q = -kcell * grad_h
    # consistent boundary flux: the residual of the fixed-head rows (theory.md F4)
    reaction = A @ head
    budget = tuple(BoundaryFlow(name, float(np.clip(reaction[n], 0, None).sum()),
                                float(np.clip(-reaction[n], 0, None).sum()))
                   for name, n in owner.items())
    field = FlowField(head=head, darcy_flux=q, conductivity=kcell, budget=budget,
                      fixed_head_nodes=owner)
    logger.info("flow: in %.4e m3/s, out %.4e m3/s, discrepancy %.2e",
                field.total_inflow, field.total_outflow, field.discrepancy)
    return field
