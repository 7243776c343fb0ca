"""The parts of a case that each stage reads.

The mesh is built from the whole :class:`~fe3d.case.schema.Case` (its geology and the
position of every feature). The later stages take only what they use, so that a reader sees a
stage's inputs in its signature and a study can change one part without the rest:

- :class:`Ground` — the materials and which material fills each unit of the mesh;
- :class:`FlowInputs` — what the steady flow reads;
- :class:`TravelInputs` — what the advective particle tracking reads;
- :class:`TransportInputs` — what the transport reads.

Each is built from a validated case by its ``of`` class method; every number is in SI units.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

from fe3d.case.schema import (
    Case,
    FixedHead,
    HeadDependent,
    Material,
    ObservationPoint,
    Recharge,
    SolverControl,
    Source,
    Species,
    SpecifiedFlux,
    TimeControl,
    UserReactions,
    Well,
)

__all__ = ["FlowInputs", "Ground", "TransportInputs", "TravelInputs"]


@dataclass(frozen=True)
class Ground:
    """The materials by name, and the name of the material that fills every unit of the
    mesh (a layer or a lens, by its name)."""

    materials: Mapping[str, Material]
    unit_material: Mapping[str, str]

    @classmethod
    def of(cls, case: Case) -> Ground:
        units = {layer.name: layer.material for layer in case.layers}
        units.update({lens.name: lens.material for lens in case.lenses})
        return cls(materials=dict(case.materials), unit_material=units)


@dataclass(frozen=True)
class FlowInputs:
    """What the steady flow reads: the ground, the boundary conditions, the wells, and the
    spacing [m] of the points that sample a well screen (``mesh.sample_spacing``)."""

    ground: Ground
    fixed_heads: tuple[FixedHead, ...]
    specified_fluxes: tuple[SpecifiedFlux, ...]
    recharge: tuple[Recharge, ...]
    head_dependent: tuple[HeadDependent, ...]
    wells: tuple[Well, ...]
    sample_spacing: float

    @classmethod
    def of(cls, case: Case) -> FlowInputs:
        return cls(ground=Ground.of(case), fixed_heads=tuple(case.fixed_heads),
                   specified_fluxes=tuple(case.specified_fluxes),
                   recharge=tuple(case.recharge), head_dependent=tuple(case.head_dependent),
                   wells=tuple(case.wells), sample_spacing=case.mesh.sample_spacing)


@dataclass(frozen=True)
class TravelInputs:
    """What the advective particle tracking reads: the sources it starts from, the wells
    and observation points it arrives at, the plan outline (counter-clockwise vertices [m]
    and one name per edge) and elevation range [m] that bound a source given by open
    ranges, the capture distance ``reach`` [m] (twice the smallest target cell size) and the
    end time [s] of backward tracking. The porosity comes with the flow field."""

    sources: tuple[Source, ...]
    wells: tuple[Well, ...]
    observation_points: tuple[ObservationPoint, ...]
    outline: tuple[tuple[float, float], ...]
    edge_names: tuple[str, ...]
    elevation_range: tuple[float, float]
    reach: float
    end: float

    @classmethod
    def of(cls, case: Case) -> TravelInputs:
        vertices, names = case.outline()
        return cls(sources=tuple(case.sources),
                   wells=tuple(case.wells), observation_points=tuple(case.observation_points),
                   outline=tuple(vertices), edge_names=tuple(names),
                   elevation_range=(case.z_bottom_min, case.z_top),
                   reach=2.0 * (case.mesh.fine_cell_size or case.mesh.cell_size),
                   end=case.time.end)


@dataclass(frozen=True)
class TransportInputs:
    """What the transport reads: the ground, the species, sources, wells (their injected
    concentrations), observation points, the user's reaction law, the time and solver
    controls, and the spacing [m] of the points that sample a screen or a line source."""

    ground: Ground
    species: Mapping[str, Species]
    sources: tuple[Source, ...]
    wells: tuple[Well, ...]
    observation_points: tuple[ObservationPoint, ...]
    user_reactions: UserReactions | None
    time: TimeControl
    solver: SolverControl
    sample_spacing: float

    @classmethod
    def of(cls, case: Case) -> TransportInputs:
        return cls(ground=Ground.of(case), species=dict(case.species),
                   sources=tuple(case.sources), wells=tuple(case.wells),
                   observation_points=tuple(case.observation_points),
                   user_reactions=case.user_reactions, time=case.time, solver=case.solver,
                   sample_spacing=case.mesh.sample_spacing)

    def output_schedule(self) -> list[float]:
        """Sorted output times [s], always ending with the end time."""
        return self.time.output_schedule()
