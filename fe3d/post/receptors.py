"""Receptors: where water leaves the model, and what it carries out.

Every budget item that takes water out is a receptor: an extraction well, a fixed-head face
where water leaves (a stream bank, an outflow face, a property line drawn as a model face),
a stream or drain zone, a flux face with outflow. Each one's water leaves at its nodes at
the rates the transport's outflow term uses (theory.md T3b, O3): the outward Darcy flux
lumped on the face's nodes, ∫(q·n)⁺ φ_j dS, or the item's nodal outflow from the flow
solve. At any time its mass flux is Σ_j Q_j c_j [kg/s] (for a face, the exact boundary
integral ∫(q·n)⁺ c dS of the P1 field) and its flux-averaged concentration Σ_j Q_j c_j /
Σ_j Q_j, for a well the concentration of the water it pumps.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp

from fe3d._typing import FloatArray
from fe3d.flow.solve import FlowField
from fe3d.mesh.site_mesh import SiteMesh
from fe3d.p1 import BoundaryFacets
from fe3d.post.probes import breakthrough, crossing_time

__all__ = ["Receptor", "ReceptorResult", "ReceptorRow", "receptor_operator", "receptor_result",
           "receptors_of", "time_above"]


@dataclass(frozen=True)
class Receptor:
    """A budget item that takes water out: its name, kind (``well``, ``fixed head``,
    ``stream``, ``drain``, ``specified flux``) and the water leaving at each node [m³/s]
    ``(n_nodes,)``, ≥ 0."""

    name: str
    kind: str
    water_out: FloatArray

    @property
    def water_rate(self) -> float:
        """Water leaving through the item [m³/s]."""
        return float(self.water_out.sum())

    def mass_flux(self, conc: FloatArray) -> float:
        """Mass leaving per second [kg/s] with the nodal concentration ``conc`` [kg/m³]."""
        return float(self.water_out @ conc)

    def flux_averaged(self, conc: FloatArray) -> float:
        """Concentration of the water leaving [kg/m³]: for a well, of the water pumped."""
        return self.mass_flux(conc) / self.water_rate


def receptors_of(site: SiteMesh, flow: FlowField) -> tuple[Receptor, ...]:
    """Every budget item of ``flow`` where water leaves, with its nodal outflow: on a
    fixed-head face the outward Darcy flux lumped on the nodes, ∫(q·n)⁺ φ_j dS (theory.md
    T3b); elsewhere the item's nodal outflow from the flow solve (F5–F7)."""
    n = site.n_nodes
    kinds = {b.name: b.kind for b in flow.budget}
    out: list[Receptor] = []
    for name in flow.fixed_head_nodes:
        facets = BoundaryFacets.of(site.points, site.cells, site.faces[name])
        water = facets.load(np.clip(facets.normal_flux(flow.darcy_flux), 0.0, None), n)
        out.append(Receptor(name, kinds.get(name, "fixed head"), water))
    out += [Receptor(name, kinds.get(name, ""), np.clip(-f, 0.0, None))
            for name, f in flow.exchange.items()]
    return tuple(r for r in out if r.water_rate > 0.0)


def receptor_operator(receptors: tuple[Receptor, ...], n_nodes: int) -> sp.csr_matrix:
    """Rows that give each receptor's flux-averaged concentration [kg/m³] from a nodal
    concentration: row k is ``water_out / water_rate`` of receptor k, shape
    ``(len(receptors), n_nodes)``. Stacked under the observation rows of the transport, it
    samples every receptor at every time step (theory.md O3)."""
    if not receptors:
        return sp.csr_matrix((0, n_nodes))
    return sp.csr_matrix(np.vstack([r.water_out / r.water_rate for r in receptors]))


@dataclass(frozen=True)
class ReceptorRow:
    """One receptor and species at one time (SI units): water leaving [m³/s], its
    flux-averaged concentration [kg/m³], the mass flux [kg/s] and the mass carried out since
    the start [kg] (the transport's own cumulative outflow term, T9; NaN at a time step
    between output times, where the budget is not taken)."""

    receptor: str
    kind: str
    species: str
    time: float
    water_rate: float
    concentration: float
    mass_flux: float
    mass_out: float


@dataclass(frozen=True)
class ReceptorResult:
    """What one receptor received of one species over the run (SI units).

    ``peak`` [kg/m³] and ``peak_time`` [s] of the flux-averaged concentration; the first and
    last times above the ``limit`` [s] (None: not reached) and the total time above it [s],
    crossing times interpolated linearly between the stored times (every time step when the
    transport sampled the receptors, else the output times); ``water_rate`` [m³/s];
    ``mass_out`` [kg] carried out by the end; ``peak_mass_flux`` [kg/s]."""

    name: str
    kind: str
    species: str
    limit: float
    water_rate: float
    peak: float
    peak_time: float
    first_above_limit: float | None
    last_above_limit: float | None
    time_above_limit: float
    mass_out: float
    peak_mass_flux: float


def time_above(times: FloatArray, values: FloatArray, limit: float) -> float:
    """Total time [s] the series ``values`` (at ``times``) spends above ``limit``: every
    interval counted in full, in part (from or to the crossing, interpolated as
    :func:`~fe3d.post.probes.crossing_time` does, so a single excursion lasts exactly from
    the first to the last time above the limit) or not at all."""
    t, c = np.asarray(times, dtype=float), np.asarray(values, dtype=float)
    above = c > limit
    total = float(np.sum(np.diff(t) * (above[:-1] & above[1:])))
    for i in np.nonzero(above[:-1] != above[1:])[0]:
        cross = crossing_time(t, c, int(i), limit)
        total += (t[i + 1] - cross) if above[i + 1] else (cross - t[i])
    return total


def receptor_result(rows: list[ReceptorRow], limit: float) -> ReceptorResult:
    """Peak, crossing times, time above ``limit`` and mass out (the last row's) from one
    receptor's rows for one species, in time order."""
    times = np.array([r.time for r in rows])
    conc = np.array([r.concentration for r in rows])
    b = breakthrough(times, conc, limit)
    last = rows[-1]
    return ReceptorResult(
        name=last.receptor, kind=last.kind, species=last.species, limit=limit,
        water_rate=last.water_rate, peak=b.peak, peak_time=b.peak_time,
        first_above_limit=b.first_above_limit, last_above_limit=b.last_above_limit,
        time_above_limit=time_above(times, conc, limit), mass_out=last.mass_out,
        peak_mass_flux=max(r.mass_flux for r in rows))
