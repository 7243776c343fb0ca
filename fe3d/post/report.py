"""Summary JSON and Markdown report with the key numbers and the cautions."""

from __future__ import annotations

import json
from dataclasses import asdict, dataclass, field
from pathlib import Path

from fe3d.post.files import write_text_atomic
from fe3d.units import from_si

__all__ = [
    "CAUTION",
    "ObservationResult",
    "RunSummary",
    "quality_warnings",
    "write_report",
    "write_summary_json",
]

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
    limiting_blocked: dict[str, float] = field(default_factory=dict)  # T16b, fraction


def quality_warnings(s: RunSummary) -> list[str]:
    """Plain-language warnings when the discretisation may distort the answer.

    Thresholds are common practice, no source: Courant ≤ 1 keeps implicit steps from
    smearing fronts ahead of the flow; grid Péclet ≤ 2 is where Galerkin needs no
    stabilisation; undershoots above 1 % of the source are visible against typical limits.
    """
    out: list[str] = []
    cu = s.concentration_unit
    for sp in s.mass_balance_error:
        if s.max_courant[sp] > 1.0:
            out.append(f"{sp}: largest Courant number {s.max_courant[sp]:.2g} > 1; first "
                       "arrival times at low concentrations may come too early (numerical "
                       "spreading): shorten time.step and compare")
        if s.max_grid_peclet[sp] > 2.0:
            out.append(f"{sp}: largest grid Péclet number {s.max_grid_peclet[sp]:.2g} > 2; "
                       "the mesh is coarse against the dispersivities: refine and compare")
        if s.limiting_blocked.get(sp, 0.0) > 0.0:
            out.append(f"{sp}: flux limiting left up to {s.limiting_blocked[sp]:.0%} of the "
                       "nodes at the low-order value in a step (the step is long against "
                       "their exchange with their neighbours, theory.md T16b): shorten "
                       "time.step and compare")
        c_min, c_src = s.min_concentration[sp], s.source_max.get(sp, 0.0)
        if c_src > 0 and c_min < -0.01 * c_src:
            at = s.min_concentration_at.get(sp)
            where = "" if at is None else (
                f" near x={at[0]:.1f} m, y={at[1]:.1f} m, z={at[2]:.1f} m")
            advice = ("solver.monotone keeps values nonnegative with backward Euler "
                      "only: use time.scheme = 'backward_euler'" if s.monotone else
                      "or set solver.monotone = true (no negative values, more numerical "
                      "spreading; add flux_limiting = true with backward Euler to sharpen "
                      "it again) and compare")
            out.append(f"{sp}: most negative concentration {from_si(c_min, cu):.3g} {cu} "
                       f"({-c_min / c_src:.1%} of the source){where}: refine the mesh "
                       f"there, {advice}")
    return out


def write_summary_json(path: Path, s: RunSummary) -> Path:
    """Everything in :class:`RunSummary`, SI units, keys naming their units."""
    d = asdict(s)
    d["units"] = {"time": "s", "concentration": "kg/m^3", "flow": "m^3/s", "length": "m"}
    d["caution"] = CAUTION
    d["warnings"] = quality_warnings(s)
    write_text_atomic(path, json.dumps(d, indent=2, allow_nan=False, default=str) + "\n")
    return path


def _t(x: float | None, unit: str) -> str:
    return "not reached" if x is None else f"{from_si(x, unit):.3g} {unit}"


def write_report(path: Path, s: RunSummary) -> Path:
    """A short Markdown report for a reviewer."""
    tu, cu = s.time_unit, s.concentration_unit
    lines = [
        f"# {s.title}", "", f"Site: {s.site}", "", f"> {CAUTION}", "",
        "## Model", "",
        f"- mesh: {s.n_nodes} nodes, {s.n_cells} tetrahedra",
        f"- simulated period: {from_si(s.end_time, tu):.4g} {tu} in {s.n_steps} steps of "
        f"{_t(s.step_range[0], tu)} to {_t(s.step_range[1], tu)} ({s.step_cuts} step cuts "
        f"after a failed solve, {s.rejected_steps} steps rejected by the error control)",
        *([f"- transport method: {s.method}"] if s.method else []),
        f"- groundwater through the model: {s.flow_inflow * 86400:.4g} m³/d, "
        f"budget discrepancy {s.flow_discrepancy:.1e}",
        "", "## Extent of the plume above the limit (at output times)", "",
        "| species | largest extent from the source [m] | at | largest volume above the "
        "limit [m³] | extent at the end [m] |", "|---|---|---|---|---|",
        *[f"| {sp} | {p['largest_extent']:.4g} | {_t(p['time_of_largest_extent'], tu)} | "
          f"{p['largest_volume']:.4g} | {p['final_extent']:.4g} |" for sp, p in s.plume.items()],
        "", "The extent is the farthest plan distance from the species' first source of a mesh "
        "node above the limit; `plume.csv` has every output time and `plume_*.vtp` the "
        "surfaces at the limit.", "",
        "## Advective travel times of water (particle tracking)", "",
        "| from source | to receptor | travel time | closest approach [m] |",
        "|---|---|---|---|",
        *[f"| {a['source']} | {a['receptor']} | {_t(a['time'], tu)} | "  # type: ignore[arg-type]
          f"{a['closest']:.3g} |" for a in s.travel_times],
        "", "Water travel times ignore sorption: a sorbing solute's front moves about R times "
        "slower.", "",
        "## Breakthrough at observation points", "",
        f"| point | kind | species | peak [{cu}] | peak time | first above limit | limit [{cu}] |",
        "|---|---|---|---|---|---|---|",
    ]
    sc = from_si(1.0, cu)
    for o in s.observations:
        lines.append(f"| {o.name} | {o.kind} | {o.species} | {o.peak * sc:.4g} | "
                     f"{_t(o.peak_time, tu)} | {_t(o.first_above_limit, tu)} | "
                     f"{o.limit * sc:.4g} |")
    lines += ["", "## Numerical quality", "",
              "| species | mass-balance error [-] | max grid Péclet [-] | max Courant [-] | "
              f"most negative c [{cu}] |", "|---|---|---|---|---|"]
    for sp, err in s.mass_balance_error.items():
        lines.append(f"| {sp} | {err:.2e} | {s.max_grid_peclet[sp]:.3g} | "
                     f"{s.max_courant[sp]:.3g} | {s.min_concentration[sp] * sc:.3g} |")
    warnings = quality_warnings(s)
    lines += ["", "Negative concentrations are a discretisation artefact near steep fronts; "
              "where they are large against the limit, refine the mesh near the plume, or "
              "compare with a run with `solver.monotone = true` (never negative, more "
              "numerical spreading).", "",
              "### Warnings", "", *([f"- {w}" for w in warnings] or ["- none"]), "",
              "## Files", "", *[f"- `{f}`" for f in s.files], ""]
    write_text_atomic(path, "\n".join(lines))
    return path
