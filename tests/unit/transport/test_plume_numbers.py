"""The grid Péclet number measured where the plume is (issue 11 part 5, theory.md T14b).

The grid Péclet number |v| h / D_L of a cell (h its length along the flow, D_L the
longitudinal dispersion coefficient; with D_L = α_L |v| it is h/α_L) says whether the cell
resolves the dispersion (≤ 2: common practice, no source). Cells the plume never reaches do
not matter to its numbers: fe3d reports the largest value over the nodes the plume has
reached (above 1e-3 × the limit, or inside an active source).
"""

from __future__ import annotations

import numpy as np
import pytest

from fe3d.case.builder import Layer, Material, Source, Species, Time, box_case
from fe3d.case.parts import TransportInputs
from fe3d.pipeline import mesh_and_flow
from fe3d.transport.courant import PlumeCourant
from fe3d.transport.run import step_context


def _every_cell_peclet(s, seepage_velocity: np.ndarray, porosity: np.ndarray) -> float:
    """The largest grid Péclet number |v| h / D_L of the species over every cell: what fe3d
    reported before it measured the plume's cells (kept here as the reference)."""
    speed = np.sqrt(np.sum(seepage_velocity * seepage_velocity, axis=0))
    c = s.coefficients
    d_l = c.along_flow_diffusivity * c.storage / porosity
    return float(np.max(np.divide(speed * c.element_length, d_l,
                                  out=np.full_like(d_l, np.inf), where=d_l > 0)))


def _two_sands():
    """A 60 m × 20 m box, 4 m cells, a sand with α_L = 4 m over one with α_L = 0.5 m."""
    coarse = Material(10.0, 10.0, porosity=0.3, longitudinal_dispersivity=4.0,
                      transverse_dispersivity=0.4)
    fine = Material(10.0, 10.0, porosity=0.3, longitudinal_dispersivity=0.5,
                    transverse_dispersivity=0.05)
    case = box_case(length=60.0, width=20.0, cell=4.0, dz=1.0, heads={"west": 0.3, "east": 0.0},
                    layers=[Layer("upper", -3.0, coarse), Layer("lower", -6.0, fine)],
                    species=[Species("tracer", limit=0.01)],
                    sources=[Source("spill", species="tracer", concentration=1.0,
                                    x=(8.0, 16.0), y=(6.0, 14.0), z=(-2.0, -1.0),
                                    stop=0.5)],
                    time=Time("1 d", "1 d"))
    site, flow = mesh_and_flow(case)
    ctx = step_context(site, flow, TransportInputs.of(case), None)
    return site, flow, ctx


def test_plume_peclet_counts_the_cells_the_plume_reached() -> None:
    """A plume only in the upper sand (α_L = 4 m) reads that sand's Péclet numbers, not the
    lower sand's (α_L = 0.5 m: 8× larger with the same cells); a plume everywhere reads the
    largest over every cell, which is what fe3d reported before. Exact: the
    same per-cell numbers, maxima over sets of them."""
    site, flow, ctx = _two_sands()
    (s,) = ctx.species
    numbers = PlumeCourant(site, ctx.species, ctx.sources)
    everywhere = _every_cell_peclet(s, flow.seepage_velocity, ctx.systems.porosity)
    upper = site.points[2] > -2.9
    numbers.rates({"tracer": np.where(upper, 1.0, 0.0)}, t=86400.0)  # source stopped
    in_upper = numbers.largest_peclet["tracer"]
    assert in_upper == pytest.approx(float(numbers.node_peclet["tracer"][upper].max()), rel=0)
    assert in_upper < everywhere / 4
    numbers.rates({"tracer": np.ones(site.n_nodes)}, t=86400.0)
    assert numbers.largest_peclet["tracer"] == pytest.approx(everywhere, rel=1e-12)
    numbers.rates({"tracer": np.zeros(site.n_nodes)}, t=86400.0)  # a running maximum
    assert numbers.largest_peclet["tracer"] == pytest.approx(everywhere, rel=1e-12)


def test_plume_courant_names_the_node_where_it_is_largest() -> None:
    """The plume's largest Courant rate comes with its node (reported in summary.json and
    the report's warning): the node of the largest per-node rate among the plume's nodes,
    −1 without a plume. Exact: an argmax over the same numbers."""
    site, _, ctx = _two_sands()
    numbers = PlumeCourant(site, ctx.species, ctx.sources)
    upper = site.points[2] > -2.9
    largest = numbers.rates({"tracer": np.where(upper, 1.0, 0.0)}, t=86400.0)["tracer"]
    assert upper[largest.node]
    assert numbers.node_rate["tracer"][largest.node] == largest.rate
    assert largest.rate == float(numbers.node_rate["tracer"][upper].max())
    none = numbers.rates({"tracer": np.zeros(site.n_nodes)}, t=86400.0)["tracer"]
    assert (none.rate, none.node) == (0.0, -1)
