"""The long-term plume of a case: how far its plume can ever reach (theory.md T17).

:func:`long_term_plume` meshes the site and solves its flow (:func:`fe3d.pipeline.mesh_and_flow`),
solves the steady transport for the sources that never stop
(:func:`fe3d.transport.steady.solve_steady_transport`), measures each species above its limit
and writes ``steady_plume.vtu`` and ``steady_plume.csv`` (:mod:`fe3d.post.steady_outputs`).
The results are screening estimates that depend on the inputs (``fe3d.post.report.CAUTION``).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from fe3d.case.parts import TransportInputs
from fe3d.case.schema import Case
from fe3d.pipeline import mesh_and_flow
from fe3d.post.steady_outputs import measure_steady_plume, write_steady_plume
from fe3d.transport.steady import solve_steady_transport
from fe3d.units import from_si

__all__ = ["LongTermExtent", "LongTermPlume", "long_term_plume"]


@dataclass(frozen=True)
class LongTermExtent:
    """One species' long-term plume above its limit (SI units): ``extent`` [m] the farthest
    plan distance from its source (from the face for a face source), ``downstream`` [m]
    along the mean flow, ``volume`` [m³] of aquifer above the limit, ``peak`` [kg/m³] the
    largest steady value, ``limit`` [kg/m³]; ``counted_sources`` are the sources that never
    stop (an empty tuple: no long-term plume); ``operator`` the spatial operator of the solve
    (``"flux_corrected"``, the default, and ``"low_order"`` are bounded, the latter more
    diffusive; ``"supg"`` and ``"galerkin"`` are sharper and may undershoot; theory.md T17)."""

    species: str
    limit: float
    extent: float
    downstream: float
    volume: float
    peak: float
    counted_sources: tuple[str, ...]
    operator: str

    @property
    def above_limit(self) -> bool:
        """Some of the aquifer stays above the limit for ever."""
        return self.volume > 0.0


@dataclass(frozen=True)
class LongTermPlume:
    """Every species' long-term plume and the files written."""

    species: tuple[LongTermExtent, ...]
    files: tuple[Path, ...]

    def lines(self, case: Case) -> list[str]:
        """One line per species in the case's display units."""
        cu = case.output.concentration_unit
        out = []
        for s in self.species:
            if not s.counted_sources:
                out.append(f"{s.species}: no long-term plume (no source of it runs for ever)")
            elif not s.above_limit:
                out.append(f"{s.species}: nowhere above the limit "
                           f"{from_si(s.limit, cu):.4g} {cu} in the long term (largest "
                           f"{from_si(s.peak, cu):.4g} {cu}; {s.operator} operator)")
            else:
                out.append(f"{s.species}: above the limit {from_si(s.limit, cu):.4g} {cu} "
                           f"up to {s.extent:.4g} m from its source ({s.downstream:.4g} m "
                           f"downstream), {s.volume:.4g} m³ of aquifer, largest "
                           f"{from_si(s.peak, cu):.4g} {cu} ({s.operator} operator; sources "
                           f"{', '.join(s.counted_sources)})")
        return out


def long_term_plume(case: Case, out_dir: Path, *, base_dir: Path | None = None) -> LongTermPlume:
    """Solve and write the long-term plume of ``case`` into ``out_dir``.

    ``base_dir`` is the case file's folder (relative data files, user code). Raises
    :class:`~fe3d.errors.CaseError` for what the steady solve refuses (species coupled by a
    user reaction law; a continuous source with nothing to remove its mass)."""
    site, flow = mesh_and_flow(case, base_dir=base_dir)
    steady = solve_steady_transport(site, flow, TransportInputs.of(case), base_dir=base_dir)
    rows = measure_steady_plume(case, site, flow, steady)
    files = write_steady_plume(out_dir, case, site, rows)
    return LongTermPlume(
        species=tuple(LongTermExtent(
            species=r.steady.name, limit=r.limit, extent=r.measures.extent,
            downstream=r.measures.downstream, volume=r.measures.volume, peak=r.peak,
            counted_sources=r.steady.counted_sources, operator=r.steady.operator)
        for r in rows), files=files)
