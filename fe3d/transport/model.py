"""What each species needs for its steps, built once from the mesh, the flow and the
transport inputs of the case.

:class:`SpeciesModel` holds the per-cell coefficients of T0–T8 (:class:`Coefficients`) and
the nodal weights of the lumped terms (T9, T10); :func:`build_species` makes one per species,
parents before daughters. Pure data and pointwise laws: no operators, no time stepping.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from dataclasses import dataclass, replace

import numpy as np
import scipy.sparse as sp

from fe3d._typing import FloatArray, IndexArray
from fe3d.case.parts import Ground, TransportInputs
from fe3d.case.schema import Species
from fe3d.flow.solve import FlowField
from fe3d.mesh.materials import cell_values, unit_materials, unit_values
from fe3d.mesh.site_mesh import SiteMesh
from fe3d.p1 import CELL_BLOCK, BoundaryFacets, length_along, sum_at_corners, volumes
from fe3d.reactions import kinetics, sorption
from fe3d.transport.dispersion import dispersion_tensor

__all__ = ["Coefficients", "Dispersion", "Isotherm", "MediumFields", "SpeciesModel",
           "build_medium", "build_species", "lumped"]

RATE_LAWS = {"second_order": kinetics.second_order, "monod": kinetics.monod}
ISOTHERMS = {"linear": sorption.linear, "freundlich": sorption.freundlich,
             "langmuir": sorption.langmuir}

RateLaw = Callable[[FloatArray], tuple[FloatArray, FloatArray]]


def lumped(site: SiteMesh, per_cell_volume_weighted: FloatArray) -> FloatArray:
    """Σ over cells of the value/4 at each of their nodes (∫φ_j = V/4 for P1); the value is
    per cell already multiplied by the cell volume, shape ``(n_cells,)``."""
    return sum_at_corners(site.cells, per_cell_volume_weighted / 4.0, site.n_nodes)


@dataclass(frozen=True)
class Dispersion:
    """What θD (T4) is formed from, block by block where it is needed and never held for
    every cell (``(3, 3, n_cells)`` float64 is 72 bytes per cell, 407 MiB at 1 M nodes):
    the Darcy flux q [m/s] ``(3, n_cells)`` and the porosity θ [-] per cell (the flow
    field's own arrays, not copies), the unit of each cell, and per unit α_L, α_TH, α_TV
    [m] and D* = D_m τ [m²/s]."""

    darcy_flux: FloatArray
    porosity: FloatArray
    cell_unit: IndexArray
    longitudinal: FloatArray
    transverse_horizontal: FloatArray
    transverse_vertical: FloatArray
    effective_diffusion: FloatArray

    @property
    def n_cells(self) -> int:
        """Number of cells."""
        return int(self.porosity.size)

    def of_cells(self, start: int, stop: int) -> FloatArray:
        """θD [m²/s] of the cells ``start:stop``, shape ``(3, 3, stop − start)``: the same
        values, bit for bit, as the tensor of the seepage velocity q/θ over every cell."""
        u = self.cell_unit[start:stop]
        theta = self.porosity[start:stop]
        d = dispersion_tensor(self.darcy_flux[:, start:stop] / theta,
                              alpha_l=self.longitudinal[u],
                              alpha_th=self.transverse_horizontal[u],
                              alpha_tv=self.transverse_vertical[u],
                              d_eff=self.effective_diffusion[u])
        return np.multiply(d, theta, out=d)

    def blocks(self) -> Iterator[tuple[int, int]]:
        """(start, stop) of consecutive blocks of at most :data:`fe3d.p1.CELL_BLOCK` cells."""
        n = self.n_cells
        for start in range(0, n, CELL_BLOCK):
            yield start, min(start + CELL_BLOCK, n)

    def along(self, a: FloatArray) -> FloatArray:
        """aᵀ(θD)a [m⁴/s³] per cell for a velocity ``a`` ``(3, n_cells)``."""
        out = np.empty(self.n_cells)
        for start, stop in self.blocks():
            part = np.ascontiguousarray(a[:, start:stop])
            out[start:stop] = np.einsum("ie,ije,je->e", part, self.of_cells(start, stop),
                                        part)
        return out


@dataclass(frozen=True)
class MediumFields:
    """Fields shared by every species: porosity θ [-], bulk density ρ_b [kg/m³], signed cell
    volume [m³] per cell, what θD [m²/s] is formed from (:class:`Dispersion`), and the
    outflow of water on the fixed-head faces and at the budget items that take water out
    (T3b): nodal weights [m³/s] per item and their sum as a diagonal-plus-face matrix.
    (The seepage velocity is the flow field's, formed where it is needed: not held through
    the run.)"""

    porosity: FloatArray
    bulk_density: FloatArray
    cell_volume: FloatArray
    dispersion: Dispersion
    material_names: list[str]
    outflow_weights: dict[str, FloatArray]
    outflow_matrix: sp.csr_matrix


def build_medium(site: SiteMesh, flow: FlowField, ground: Ground) -> MediumFields:
    """Porosity, bulk density, θD's parts and the outflow terms per cell and node (T3b, T4)."""
    n = site.n_nodes
    mats, mat_names = unit_materials(ground, site)
    theta = flow.porosity
    q = flow.darcy_flux
    dispersion = Dispersion(
        darcy_flux=q, porosity=theta, cell_unit=site.cell_layer,
        longitudinal=unit_values(mats, "longitudinal_dispersivity"),
        transverse_horizontal=unit_values(mats, "transverse_dispersivity"),
        transverse_vertical=unit_values(mats, "alpha_vertical"),
        effective_diffusion=unit_values(mats, "effective_diffusion"))
    facets = {name: BoundaryFacets.of(site.points, site.cells, site.faces[name])
              for name in flow.fixed_head_nodes}
    qn_out = {name: np.clip(fb.normal_flux(q), 0.0, None) for name, fb in facets.items()}
    weights = {f: fb.load(qn_out[f], n) for f, fb in facets.items()}
    matrix = sum((fb.mass(qn_out[f], n) for f, fb in facets.items()), sp.csr_matrix((n, n)))
    for item, f in flow.exchange.items():
        out_rate = np.clip(-f, 0.0, None)  # water leaving [m³/s] per node
        if np.any(out_rate > 0):
            weights[item] = out_rate
            matrix = matrix + sp.diags(out_rate)
    return MediumFields(
        porosity=theta, bulk_density=cell_values(mats, site, "bulk_density"),
        cell_volume=volumes(site.points, site.cells), dispersion=dispersion,
        material_names=mat_names, outflow_weights=weights,
        outflow_matrix=sp.csr_matrix(matrix))


@dataclass(frozen=True)
class Isotherm:
    """A nonlinear isotherm in one unit: lumped nodal bulk mass ρ_b V of the unit [kg]
    (T10), the law's name and its parameters."""

    bulk_mass: FloatArray
    law: str
    parameters: dict[str, float]


@dataclass(frozen=True)
class Coefficients:
    """Per-cell coefficients of one species (theory.md symbol table).

    ``storage`` m = θR [-], ``decay`` k [1/s] (λm, or λθ when only the dissolved phase
    decays), ``darcy_flux`` q [m/s] shape ``(3, n_cells)`` (the flow field's, not a copy;
    :attr:`velocity` a = q/m is formed from it where needed), ``along_flow_diffusivity``
    κ = aᵀθDa/(|a|² m) [m²/s], :attr:`reaction_rate` σ = k/m [1/s] (τ, T8, formed where
    needed), ``element_length`` h along a [m]."""

    storage: FloatArray
    decay: FloatArray
    darcy_flux: FloatArray
    along_flow_diffusivity: FloatArray
    element_length: FloatArray

    @property
    def reaction_rate(self) -> FloatArray:
        """σ = k/m [1/s] per cell: a new array (not held through the run)."""
        return self.decay / self.storage

    @property
    def velocity(self) -> FloatArray:
        """a = q/m [m/s], shape ``(3, n_cells)``: a new array (not held through the run)."""
        return self.darcy_flux / self.storage


@dataclass(frozen=True)
class SpeciesModel:
    """Everything one species' steps need that does not change in time.

    ``isotherms`` is empty for linear sorption (then K_d is in ``storage``);
    ``reaction`` is a nonlinear rate law (name, parameters) or None; ``in_user_law`` tells
    whether a user rate law includes the species (T11b); ``sorbed_decay`` [1/s] is λ when
    the sorbed phase decays. Nodal weights [m³ or kg, lumped, T9]: ``dissolved_volume``
    ∫θφ, ``sorbed_capacity`` ∫ρ_b K_d φ, ``decay_weight`` ∫kφ. ``courant_rate`` max |a|/h
    [1/s] over the cells (Courant number per second of step).

    ``coefficients`` holds the per-cell values the operators are built from (32 bytes per
    cell); it is None in a run whose steps no longer read them
    (:meth:`without_cell_coefficients`)."""

    name: str
    spec: Species
    coefficients: Coefficients | None
    courant_rate: float
    isotherms: tuple[Isotherm, ...]
    reaction: tuple[str, dict[str, float]] | None
    in_user_law: bool
    sorbed_decay: float
    dissolved_volume: FloatArray
    sorbed_capacity: FloatArray
    decay_weight: FloatArray
    outflow_weights: dict[str, FloatArray]

    def without_cell_coefficients(self) -> SpeciesModel:
        """The same species without its per-cell coefficients (about 0.17 KiB per node):
        for the steps of a run whose operators are built once and not rebuilt
        (:meth:`fe3d.transport.step.StepContext.set_up`)."""
        return replace(self, coefficients=None)

    @property
    def nonlinear(self) -> bool:
        """Solved by Newton: nonlinear sorption, a nonlinear or a user reaction."""
        return bool(self.isotherms or self.reaction or self.in_user_law)

    def sorbed(self, c: FloatArray) -> tuple[FloatArray, FloatArray]:
        """Nodal sorbed mass [kg] and its derivative [m³] (lumped, T10); linear: W_ρ K_d c."""
        if not self.isotherms:
            return self.sorbed_capacity * c, self.sorbed_capacity.copy()
        total, slope = np.zeros_like(c), np.zeros_like(c)
        for iso in self.isotherms:
            s_u, ds_u = ISOTHERMS[iso.law](c, **iso.parameters)
            total += iso.bulk_mass * s_u
            slope += iso.bulk_mass * ds_u
        return total, slope

    def reaction_loss(self, c: FloatArray, user_rate: RateLaw | None = None,
                      ) -> tuple[FloatArray, FloatArray]:
        """Nodal mass loss rate [kg/s] of the nonlinear reaction and of ``user_rate`` (T11,
        T11b; negative: production) and its derivative [m³/s]; zero without either."""
        r, dr = np.zeros_like(c), np.zeros_like(c)
        if self.reaction:
            kind, par = self.reaction
            r, dr = RATE_LAWS[kind](c, **par)
        if user_rate is not None:
            ru, dru = user_rate(c)
            r, dr = r + ru, dr + dru
        return -self.dissolved_volume * r, -self.dissolved_volume * dr

    def sorbed_mass(self, c: FloatArray) -> float:
        """Sorbed mass in the model [kg]."""
        return float(self.sorbed(c)[0].sum())

    def mass(self, c: FloatArray) -> float:
        """Dissolved plus sorbed mass [kg] of the field ``c``."""
        return float(self.dissolved_volume @ c) + self.sorbed_mass(c)


def _reference_concentration(name: str, spec: Species, inputs: TransportInputs) -> float:
    """Concentration [kg/m³] at which a nonlinear isotherm is linearised for the retarded
    velocity, τ and the SUPG storage: ``linearisation_concentration`` when the case gives
    it, else the largest source, injected or initial value; the limit only for a species
    with none of these (a daughter), where it is the scale that matters."""
    if spec.linearisation_concentration is not None:
        return spec.linearisation_concentration
    values = [src.peak_concentration for src in inputs.sources
              if src.species == name and src.peak_concentration is not None]
    values += [w.injection_concentration[name] for w in inputs.wells
               if name in w.injection_concentration]
    largest = max([*values, spec.initial_concentration])
    return largest if largest > 0.0 else spec.limit


def build_species(site: SiteMesh, flow: FlowField, inputs: TransportInputs,
                  medium: MediumFields) -> list[SpeciesModel]:
    """One :class:`SpeciesModel` per species, parents before daughters (T12)."""
    lay = site.cell_layer
    theta, rho_b, vol = medium.porosity, medium.bulk_density, medium.cell_volume
    q = flow.darcy_flux
    user = inputs.user_reactions

    def depth(name: str) -> int:
        parent = inputs.species[name].parent
        return 0 if parent is None else 1 + depth(parent)

    out = []
    for name, spec in sorted(inputs.species.items(), key=lambda item: depth(item[0])):
        isotherms: list[Isotherm] = []
        if spec.sorption != "linear":
            c_ref = _reference_concentration(name, spec, inputs)
            kd = np.zeros(site.n_cells)
            for u, mn in enumerate(medium.material_names):
                law, par = spec.isotherm_of(mn)
                _, ds = ISOTHERMS[law](np.array([c_ref]), **par)
                kd[lay == u] = ds[0]
                isotherms.append(Isotherm(
                    bulk_mass=lumped(site, np.where(lay == u, rho_b * vol, 0.0)),
                    law=law, parameters=par))
        else:
            kd = np.array([spec.kd_of(mn) for mn in medium.material_names])[lay]
        m = theta + rho_b * kd
        lam = spec.decay_rate
        k = lam * (m if spec.decay_in_sorbed_phase and not isotherms else theta)
        a = q / m
        speed2 = np.sum(a * a, axis=0)
        along = medium.dispersion.along(a)
        kappa = np.divide(along, speed2 * m, out=np.zeros_like(m), where=speed2 > 0)
        h = length_along(site.points, site.cells, a)
        out.append(SpeciesModel(
            name=name, spec=spec,
            coefficients=Coefficients(
                storage=m, decay=k, darcy_flux=q, along_flow_diffusivity=kappa,
                element_length=h),
            courant_rate=float(np.max(np.sqrt(speed2) / h)),
            isotherms=tuple(isotherms), reaction=spec.nonlinear_reaction,
            in_user_law=user is not None and name in user.species,
            sorbed_decay=lam if spec.decay_in_sorbed_phase else 0.0,
            dissolved_volume=lumped(site, theta * vol),
            sorbed_capacity=lumped(site, rho_b * kd * vol),
            decay_weight=lumped(site, k * vol),
            outflow_weights=dict(medium.outflow_weights)))
    return out
