"""The drawdown's second flow solve reuses the first solve's AMG hierarchy
(fe3d.flow.drawdown.well_drawdown with ``preconditioner``)."""

from __future__ import annotations

import numpy as np

from fe3d.case.builder import Layer, Material, Time, box_case
from fe3d.case.parts import FlowInputs
from fe3d.flow.assembly import conductance_matrix
from fe3d.flow.conductivity import cell_conductivity
from fe3d.flow.drawdown import well_drawdown
from fe3d.flow.solve import solve_flow
from fe3d.linalg import DIRECT_LIMIT, FLOW_TOLERANCE, SpdPreconditioner
from fe3d.mesh.build import build_mesh
from fe3d.mesh.materials import unit_materials


def _case():
    """A 200 m × 200 m two-layer aquifer (sand over gravel), fixed heads west and east,
    recharge and one pumping well: enough nodes for the AMG branch of the solver."""
    well = {"name": "PW", "x": "120 m", "y": "100 m", "screens": [["-4 m", "-10 m"]],
            "rate": "300 m^3/d"}
    sand = Material(10.0, 1.0, porosity=0.3, bulk_density=1700.0)
    gravel = Material(50.0, porosity=0.25, bulk_density=1800.0)
    return box_case(title="drawdown reuse", length=200.0, width=200.0, cell=5.0, dz=1.0,
                    heads={"west": 20.0, "east": 19.0}, time=Time(1.0, 1.0),
                    layers=[Layer("sand", -4.0, sand), Layer("gravel", -10.0, gravel)],
                    sections={"recharge": [{"name": "rain", "rate": "300 mm/yr"}],
                              "wells": [well]})


def test_drawdown_with_the_kept_hierarchy_equals_its_own_solve() -> None:
    """Both second solves (kept hierarchy, own hierarchy) stop at a relative residual of
    FLOW_TOLERANCE, and the solver's check accepts at most 10× that (fe3d.linalg._check),
    so on the free nodes ‖A_ff (h_kept − h_own)‖ ≤ 2 · 10 · FLOW_TOLERANCE · ‖b_ff‖, with
    b_ff the reduced right-hand side of the flow without pumping (the triangle inequality
    on the two residuals; no other tolerance involved). The kept hierarchy must not be
    built again: one build, two uses."""
    case = _case()
    site = build_mesh(case)
    inputs = FlowInputs.of(case)
    kept = SpdPreconditioner()
    pumped = solve_flow(site, inputs, preconditioner=kept)
    fixed = np.unique(np.concatenate(list(pumped.fixed_head_nodes.values())))
    free = np.setdiff1d(np.arange(site.n_nodes), fixed)
    assert free.size > DIRECT_LIMIT  # the AMG branch, not the direct solve
    assert (kept.builds, kept.uses) == (1, 1)

    reused = well_drawdown(site, inputs, pumped, preconditioner=kept)
    assert (kept.builds, kept.uses) == (1, 2)  # no new set-up
    own = well_drawdown(site, inputs, pumped)
    assert (kept.builds, kept.uses) == (1, 2)

    mats, names = unit_materials(inputs.ground, site)
    k = cell_conductivity(site.points, site.cells, site.cell_layer, mats,
                          unit_keys=[f"materials.{n}" for n in names])
    A = conductance_matrix(site.points, site.cells, k, pattern=site.pattern).tocsr()
    # the flow without pumping: the recharge is its only nodal inflow besides fixed heads
    b = pumped.exchange["rain"]
    head_fixed = pumped.head[fixed]  # fixed heads do not depend on the wells
    b_ff = b[free] - A[free][:, fixed] @ head_fixed
    # h_natural = s + h_pumped, so h_kept − h_own = s_kept − s_own
    gap = A[free][:, free] @ (reused - own)[free]
    assert np.linalg.norm(gap) <= 20.0 * FLOW_TOLERANCE * np.linalg.norm(b_ff)
    assert np.all(reused[fixed] == 0.0)
    assert reused.max() > 0.01  # the well draws the head down by centimetres at least
