"""Summary JSON and Markdown report with the key numbers and the cautions."""

from __future__ import annotations

import json
import math
import re
from dataclasses import asdict, dataclass, field
from pathlib import Path

from fe3d.mesh.corridor import ReceptorSpread
from fe3d.post.files import write_text_atomic
from fe3d.post.limit_checks import BoundaryContact, SpeciesExtremes
from fe3d.post.receptors import ReceptorResult
from fe3d.units import from_si

__all__ = [
    "CAUTION",
    "SIGNIFICANT_DIGITS",
    "ObservationResult",
    "RunSummary",
    "quality_warnings",
    "rounded",
    "write_summary_json",
]

#: Significant digits of the numbers in summary.json: enough for every value a run
#: computes (the linear solver's tolerance is 1e-8 or coarser), few enough to drop the
#: binary round-off of unit conversions (4.999999999999999e-06 → 5e-06).
SIGNIFICANT_DIGITS = 10

GRID_PECLET_ADVICE = 2.0
"""Largest grid Péclet number in the plume before the report warns (common practice, no
source; the plume corridor's default target, theory.md M1)."""

CAUTION = ("CAUTION: fe3d results are screening estimates that depend entirely on the inputs "
           "(geology, conductivity, sources, parameters). They do not replace site "
           "investigation, local regulations or the judgement of a licensed professional.")


@dataclass(frozen=True)
class ObservationResult:
    """Breakthrough at one observation point for one species (SI units)."""

    name: str
    kind: str
    species: str
    peak: float
    peak_time: float
    first_above_limit: float | None
    limit: float


@dataclass(frozen=True)
class RunSummary:
    """What a run produced, in SI units, plus the display units chosen in the case."""

    title: str
    site: str
    n_nodes: int
    n_cells: int
    end_time: float
    n_steps: int
    observations: list[ObservationResult]
    mass_balance_error: dict[str, float]
    flow_inflow: float
    flow_discrepancy: float
    max_grid_peclet: dict[str, float]
    max_courant: dict[str, float]
    min_concentration: dict[str, float]
    min_concentration_at: dict[str, tuple[float, ...] | None]
    source_max: dict[str, float]
    plume: dict[str, dict[str, float]]
    travel_times: list[dict[str, object]]
    well_heads: dict[str, float]
    wall_time: float
    time_unit: str
    concentration_unit: str
    files: list[str] = field(default_factory=list)
    step_range: tuple[float, float] = (0.0, 0.0)
    step_cuts: int = 0
    rejected_steps: int = 0
    method: str = ""  # the time scheme and the spatial scheme, in words
    monotone: bool = False  # solver.monotone was on (T16)
    max_plume_courant: dict[str, float] = field(default_factory=dict)  # plume cells, T14b
    max_plume_courant_at: dict[str, tuple[float, ...] | None] = field(default_factory=dict)
    extremes: dict[str, SpeciesExtremes] = field(default_factory=dict)
    boundary_contacts: list[BoundaryContact] = field(default_factory=list)
    solver_tolerance: float = 0.0  # relative tolerance of the linear solver [-]
    receptors: list[ReceptorResult] = field(default_factory=list)  # wells, outflow items
    output_step: float = 0.0  # longest interval between output times [s]
    thin_plumes: list[ReceptorSpread] = field(default_factory=list)  # mesh.corridor M4


def quality_warnings(s: RunSummary) -> list[str]:
    """Plain-language warnings when the discretisation may distort the answer.

    Thresholds are common practice, no source: Courant ≤ 1 keeps implicit steps from
    smearing fronts ahead of the flow; grid Péclet ≤ 2 is where Galerkin needs no
    stabilisation; undershoots above 1 % of the source are visible against typical limits.
    """
    out: list[str] = []
    for sp in s.mass_balance_error:
        if s.max_plume_courant.get(sp, 0.0) > 1.0:
            at = s.max_plume_courant_at.get(sp)
            where = "" if at is None else " (at (" + ", ".join(f"{x:.0f}" for x in at) + ") m)"
            out.append(f"{sp}: largest Courant number in the plume "
                       f"{s.max_plume_courant[sp]:.2g} > 1{where}; first arrival times at low "
                       "concentrations may come too early (numerical spreading; in an "
                       "outside check of a site-scale column at grid Péclet 10, first times "
                       "above c0/4000 came 6 % early at a plume Courant number of 1.4, 9 % "
                       "at 1.9 and 40 % at 4.7; at grid Péclet 2, 1 % at 1.5 and 9 % at "
                       "5.5: docs/verification.md): shorten "
                       "time.step (or leave it out: the steps then follow the plume) and "
                       "compare")
        # compared as shown, to two digits: the advice 'at most 2' is no sharper (common
        # practice, no source), and the mesher's own target of 2 lands at 2.02-2.04
        if float(f"{s.max_grid_peclet[sp]:.2g}") > GRID_PECLET_ADVICE:
            out.append(f"{sp}: largest grid Péclet number in the plume "
                       f"{s.max_grid_peclet[sp]:.3g} > 2; the mesh is coarse against the "
                       "dispersivities where the plume went: refine and compare")
        if sp in s.extremes:
            out += _limit_warnings(s.extremes[sp], s)
    # the top and bottom faces are the aquifer's own limits (water table, base), not a model
    # boundary drawn too close: only the side faces can cut a plume short
    out += [r.thin_warning() for r in s.thin_plumes]
    out += [f"{b.species}: the part above the limit reaches the {b.face} face where no water "
            f"leaves the model, first at {_t(b.first_time, s.time_unit)}: the boundary cuts "
            "the plume; move it farther out and compare" for b in s.boundary_contacts
            if b.face not in ("top", "bottom")]
    return out


def _where(at: tuple[float, ...] | None) -> str:
    return "" if at is None else f" near x={at[0]:.1f} m, y={at[1]:.1f} m, z={at[2]:.1f} m"


def _between(window: tuple[float, float] | None, unit: str) -> str:
    return "" if window is None else (f" between {from_si(window[0], unit):.3g} and "
                                      f"{from_si(window[1], unit):.3g} {unit}")


def _limit_warnings(x: SpeciesExtremes, s: RunSummary) -> list[str]:
    """Negative values and overshoots beyond 1 % of the limit (limit_checks), in words.

    The rule is measured against the limit, not the source: a daughter has no source, and
    1 % of the limit is what could move the answer "above or below the limit"."""
    cu, tu, sp = s.concentration_unit, s.time_unit, x.species
    lim = f"the limit of {from_si(x.limit, cu):.3g} {cu}"
    advice = ("solver.monotone keeps values nonnegative with backward Euler only: use "
              "time.scheme = 'backward_euler'" if s.monotone else
              "or set solver.monotone = true (no negative values, more numerical spreading; "
              "add flux_limiting = true with backward Euler to sharpen it again) and compare")
    out = []
    if x.negative_is_significant:
        out.append(f"{sp}: most negative concentration {from_si(x.lowest, cu):.3g} {cu} "
                   f"({x.below_zero_in_limits:.3g} × {lim}){_where(x.lowest_at)}"
                   f"{_between(x.lowest_between, tu)}: refine the mesh there, {advice}")
    if x.overshoot_is_significant:
        assert x.upper_bound is not None and x.overshoot_in_limits is not None
        out.append(f"{sp}: largest concentration {from_si(x.highest, cu):.4g} {cu} exceeds "
                   f"the largest source, initial or injected concentration "
                   f"({from_si(x.upper_bound, cu):.4g} {cu}) by {x.overshoot_in_limits:.3g} × "
                   f"{lim}{_where(x.highest_at)}{_between(x.highest_between, tu)}: a "
                   f"discretisation overshoot; refine the mesh there, {advice}")
    return out


def rounded(value: object, digits: int = SIGNIFICANT_DIGITS) -> object:
    """``value`` with every float rounded to ``digits`` significant digits, recursively
    through dicts, lists and tuples (tuples become lists, as in JSON); a float that is not
    finite (a grid Péclet number without any dispersion) becomes None (JSON null)."""
    if isinstance(value, float):
        return float(f"{value:.{digits}g}") if math.isfinite(value) else None
    if isinstance(value, dict):
        return {k: rounded(v, digits) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [rounded(v, digits) for v in value]
    return value


_NUMBERED = re.compile(r"^(?P<stem>.+)_(?P<index>\d{4})\.(?P<ext>\w+)$")
_KINDS = {"msh": "mesh and fields", "vtu": "mesh and fields", "pvd": "mesh and fields",
          "vtp": "pathlines", "csv": "tables", "png": "figures", "json": "summary and report",
          "md": "summary and report", "log": "log"}


def write_summary_json(path: Path, s: RunSummary) -> Path:
    """Everything in :class:`RunSummary`, SI units, numbers to :data:`SIGNIFICANT_DIGITS`
    significant digits; README.md ("summary.json") describes every key."""
    d = rounded(asdict(s))
    assert isinstance(d, dict)
    d["units"] = {"time": "s", "concentration": "kg/m^3", "flow": "m^3/s", "length": "m"}
    d["caution"] = CAUTION
    d["warnings"] = quality_warnings(s)
    write_text_atomic(path, json.dumps(d, indent=2, allow_nan=False, default=str) + "\n")
    return path


def _t(x: float | None, unit: str) -> str:
    return "not reached" if x is None else f"{from_si(x, unit):.3g} {unit}"

