"""Courant numbers in the plume, and the step that holds them at a target (theory.md T14b).

The cell Courant number of a step Δt is Δt |a|/h (a = q/m the retarded velocity, h the cell
length along it, T7). :class:`PlumeCourant` keeps, per species, the largest |a|/h of the
cells around each node, and measures it over the nodes "in the plume": those above a small
fraction of the species' limit, and those of the sources active at the time. Pure numpy.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from fe3d._typing import BoolArray, FloatArray
from fe3d.mesh.site_mesh import SiteMesh
from fe3d.transport.model import SpeciesModel
from fe3d.transport.sources import SourceGeometry

__all__ = ["PLUME_THRESHOLD", "PlumeCourant", "PlumeRate"]

PLUME_THRESHOLD = 1e-3
"""A node is in a species' plume once its concentration exceeds this share of the limit
(common practice, no source: well below the limit, so the front that will reach the limit
is already inside)."""


@dataclass(frozen=True)
class PlumeRate:
    """The largest Courant rate |a|/h [1/s] over one species' plume and the node where it
    is reached (``rate`` 0 and ``node`` −1 while the species has no plume)."""

    rate: float
    node: int


class PlumeCourant:
    """Courant rate [1/s] of the plume of every species, from the current fields
    (:meth:`rates`), and the largest grid Péclet number |v| h / D_L of the cells the plume
    has reached so far (``largest_peclet``, a running maximum that :meth:`rates` raises)."""

    def __init__(self, site: SiteMesh, species: tuple[SpeciesModel, ...],
                 sources: SourceGeometry) -> None:
        self.node_rate, self.node_peclet = {}, {}
        for s in species:
            c = s.coefficients
            a = c.velocity  # formed from q/m on each access: once here
            speed = np.sqrt(np.sum(a * a, axis=0))
            self.node_rate[s.name] = _largest_around(site, speed / c.element_length)
            # grid Péclet |v| h / D_L of each cell (the retardation cancels: a = v/R, D/R)
            d_l = c.along_flow_diffusivity
            self.node_peclet[s.name] = _largest_around(site, np.divide(
                speed * c.element_length, d_l, out=np.where(speed > 0, np.inf, 0.0),
                where=d_l > 0))
        self.largest_peclet = {s.name: 0.0 for s in species}
        self.limits = {s.name: s.spec.limit for s in species}
        self.sources = sources
        self._source_nodes = {src.name: self._nodes_of(src.name, site.n_nodes)
                              for src in sources.sources}

    def _nodes_of(self, name: str, n: int) -> BoolArray:
        """Nodes a source acts on: held or filled, loaded, or fed by an inflow patch."""
        mask = np.zeros(n, dtype=bool)
        g = self.sources
        if name in g.held_nodes:
            mask[g.held_nodes[name]] = True
        for weights in (g.loading_weights, g.inflow_weights):
            if name in weights:
                mask |= weights[name] > 0.0
        return mask

    def rates(self, fields: dict[str, FloatArray], t: float) -> dict[str, PlumeRate]:
        """Largest |a|/h [1/s] over each species' plume at time ``t`` [s] and its node."""
        out = {}
        for name, c in fields.items():
            inside = c > PLUME_THRESHOLD * self.limits[name]
            for src in self.sources.sources:
                if src.species == name and src.start <= t and (src.stop is None
                                                               or t < src.stop):
                    inside |= self._source_nodes[src.name]
            inside |= self.sources.injection[name] > 0.0
            nodes = np.flatnonzero(inside)
            rate = self.node_rate[name][nodes]
            if rate.size == 0:
                out[name] = PlumeRate(rate=0.0, node=-1)
                continue
            largest = int(np.argmax(rate))
            out[name] = PlumeRate(rate=float(rate[largest]), node=int(nodes[largest]))
            self.largest_peclet[name] = max(self.largest_peclet[name],
                                            float(self.node_peclet[name][inside].max()))
        return out

    @staticmethod
    def step(rates: dict[str, PlumeRate], target: float, longest: float) -> float:
        """The longest step ``longest``/2^k [s] that keeps every plume's Courant number at
        or below ``target`` (steps of that form reuse their operators)."""
        rate = max((r.rate for r in rates.values()), default=0.0)
        if rate <= 0.0:
            return longest
        k = max(0, int(np.ceil(np.log2(longest * rate / target) - 1e-12)))
        return longest / 2.0**k


def _largest_around(site: SiteMesh, cell_value: FloatArray) -> FloatArray:
    """At every node, the largest value of the cells around it."""
    out = np.zeros(site.n_nodes)
    for k in range(site.cells.shape[0]):
        np.maximum.at(out, site.cells[k], cell_value)
    return out
