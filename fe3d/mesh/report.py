"""Typed, frozen records of what the mesher reports about a mesh: its quality, the plan layout
it was extruded from, where surface rules applied and where lenses were moved.

A mesh built fresh and the same mesh loaded from the cache carry equal records (the cache
stores every field; :func:`fe3d.mesh.io.save_cached`).
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field
from typing import Any, Literal

from fe3d._typing import FloatArray, IndexArray
from fe3d.mesh.corridor import Corridor
from fe3d.mesh.stratigraphy import RuleApplied

__all__ = ["LensFit", "MeshQuality", "MeshReport", "PlanLayout"]


@dataclass(frozen=True)
class MeshQuality:
    """Cell and node counts, volume per unit and the shape measures of the worst cells
    (definitions in :mod:`fe3d.mesh.quality`)."""

    cells: int
    nodes: int
    volume_per_unit_m3: dict[str, float]
    min_dihedral_deg: float
    p01_dihedral_deg: float
    max_dihedral_deg: float
    worst_aspect_ratio: float
    worst_aspect_ratio_at_m: tuple[float, float, float]
    min_volume_m3: float

    def as_dict(self) -> dict[str, Any]:
        """JSON-ready form (the keys of ``mesh.json``'s ``quality``)."""
        out = asdict(self)
        out["worst_aspect_ratio_at_m"] = list(self.worst_aspect_ratio_at_m)
        return out

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> MeshQuality:
        """Inverse of :meth:`as_dict`."""
        return cls(**{**data, "volume_per_unit_m3": dict(data["volume_per_unit_m3"]),
                      "worst_aspect_ratio_at_m": tuple(data["worst_aspect_ratio_at_m"])})


@dataclass(frozen=True)
class LensFit:
    """One lens side that does not lie where the case puts it (clipped to the host unit,
    snapped to the host's top or base, or absent where the host is absent)."""

    lens: str
    host: str
    side: Literal["top", "bottom"]
    n_clipped: int
    n_snapped: int
    n_host_absent: int
    n_lens_nodes: int
    max_shift_m: float
    area_m2: float
    line: str

    def as_dict(self) -> dict[str, Any]:
        """JSON-ready form."""
        return asdict(self)

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> LensFit:
        """Inverse of :meth:`as_dict`."""
        return cls(**data)


@dataclass(frozen=True)
class PlanLayout:
    """The plan triangulation a mesh was extruded from and the unit surfaces on it.

    Attributes
    ----------
    xy
        Plan nodes [m], shape ``(2, n_plan)``.
    tri
        Plan triangles, shape ``(3, n_triangles)``.
    surfaces
        Elevation [m] of the ground and of every unit bottom at the plan nodes, top down,
        shape ``(n_layers + 1, n_plan)``.
    borehole_nodes, well_nodes
        Plan node of every borehole and every well, by name.
    """

    xy: FloatArray
    tri: IndexArray
    surfaces: FloatArray
    borehole_nodes: dict[str, int] = field(default_factory=dict)
    well_nodes: dict[str, int] = field(default_factory=dict)


@dataclass(frozen=True)
class MeshReport:
    """What the mesher says about a mesh.

    Attributes
    ----------
    quality
        Counts, volumes per unit and shape measures.
    origin
        ``"built"`` (by :func:`~fe3d.mesh.build.build_mesh`), ``"imported"`` (from a mesh
        file) or ``"cached"`` (loaded from a mesh cache).
    origin_path
        The mesh file or cache folder ('' for a mesh built in this process).
    sublayers
        Number of cell layers per unit (empty for an imported mesh).
    surface_rules
        Where the crossing and pinch-out rules changed the interpolated surfaces.
    lens_fits
        Lens sides moved from where the case puts them.
    plan
        The plan layout (``None`` for an imported mesh).
    corridor
        The plume corridor the mesh was refined along (``None`` when there is none).
    """

    quality: MeshQuality
    origin: Literal["built", "imported", "cached"] = "built"
    origin_path: str = ""
    sublayers: dict[str, int] = field(default_factory=dict)
    surface_rules: tuple[RuleApplied, ...] = ()
    lens_fits: tuple[LensFit, ...] = ()
    plan: PlanLayout | None = None
    corridor: Corridor | None = None
