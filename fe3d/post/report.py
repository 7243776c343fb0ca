"""Summary JSON and Markdown report with the key numbers and the cautions."""

from __future__ import annotations

import json
import math
import re
from dataclasses import asdict, dataclass, field
from pathlib import Path

from fe3d.post.files import write_text_atomic
from fe3d.post.limit_checks import BoundaryContact, SpeciesExtremes
from fe3d.post.receptors import ReceptorResult
from fe3d.units import from_si

__all__ = [
    "CAUTION",
    "SIGNIFICANT_DIGITS",
    "ObservationResult",
    "RunSummary",
    "file_groups",
    "quality_warnings",
    "rounded",
    "write_report",
    "write_summary_json",
]

#: Significant digits of the numbers in summary.json: enough for every value a run
#: computes (the linear solver's tolerance is 1e-8 or coarser), few enough to drop the
#: binary round-off of unit conversions (4.999999999999999e-06 → 5e-06).
SIGNIFICANT_DIGITS = 10

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
    max_plume_courant: dict[str, float] = field(default_factory=dict)  # plume cells, T14b
    extremes: dict[str, SpeciesExtremes] = field(default_factory=dict)
    boundary_contacts: list[BoundaryContact] = field(default_factory=list)
    solver_tolerance: float = 0.0  # relative tolerance of the linear solver [-]
    receptors: list[ReceptorResult] = field(default_factory=list)  # wells, outflow items
    output_step: float = 0.0  # longest interval between output times [s]


def quality_warnings(s: RunSummary) -> list[str]:
    """Plain-language warnings when the discretisation may distort the answer.

    Thresholds are common practice, no source: Courant ≤ 1 keeps implicit steps from
    smearing fronts ahead of the flow; grid Péclet ≤ 2 is where Galerkin needs no
    stabilisation; undershoots above 1 % of the source are visible against typical limits.
    """
    out: list[str] = []
    for sp in s.mass_balance_error:
        if s.max_plume_courant.get(sp, 0.0) > 1.0:
            out.append(f"{sp}: largest Courant number in the plume "
                       f"{s.max_plume_courant[sp]:.2g} > 1; first arrival times at low "
                       "concentrations may come too early (numerical spreading): shorten "
                       "time.step (or leave it out: the steps then follow the plume) and "
                       "compare")
        if s.max_grid_peclet[sp] > 2.0:
            out.append(f"{sp}: largest grid Péclet number {s.max_grid_peclet[sp]:.2g} > 2; "
                       "the mesh is coarse against the dispersivities: refine and compare")
        if s.limiting_blocked.get(sp, 0.0) >= 0.005:
            out.append(f"{sp}: flux limiting left up to {s.limiting_blocked[sp]:.0%} of the "
                       "nodes at the low-order value in a step (the step is long against "
                       "their exchange with their neighbours, theory.md T16b): shorten "
                       "time.step and compare")
        if sp in s.extremes:
            out += _limit_warnings(s.extremes[sp], s)
    # the top and bottom faces are the aquifer's own limits (water table, base), not a model
    # boundary drawn too close: only the side faces can cut a plume short
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


def _span(window: tuple[float, float] | None, unit: str) -> str:
    return "–" if window is None else (f"{from_si(window[0], unit):.3g}–"
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


def file_groups(files: list[str]) -> list[str]:
    """The files of a run as a few lines: numbered series counted (``16 concentration
    fields `concentration_0000–0015.vtu```), the rest grouped by kind, in order of first
    appearance."""
    series: dict[tuple[str, str], list[str]] = {}
    kinds: dict[str, list[str]] = {}
    for f in files:
        m = _NUMBERED.match(f)
        if m:
            series.setdefault((m["stem"], m["ext"]), []).append(m["index"])
        else:
            kinds.setdefault(_KINDS.get(f.rsplit(".", 1)[-1], "other"), []).append(f)
    lines = []
    for (stem, ext), idx in series.items():
        label = ("concentration fields" if stem == "concentration" else
                 f"surfaces at the limit of {stem[6:]}" if stem.startswith("plume_") else
                 "files")
        span = idx[0] if len(idx) == 1 else f"{min(idx)}–{max(idx)}"
        lines.append(f"{len(idx)} {label} `{stem}_{span}.{ext}`")
    lines += [f"{kind}: " + ", ".join(f"`{f}`" for f in names) for kind, names in kinds.items()]
    return lines


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


def _limit_section(s: RunSummary) -> list[str]:
    """The lowest and highest value of each species over the run against its limit."""
    if not s.extremes:
        return []
    tu, cu = s.time_unit, s.concentration_unit
    sc = from_si(1.0, cu)
    lines = ["### Concentrations against the limit (over every time step)", "",
             f"| species | limit [{cu}] | most negative [{cu}] | × limit | reached | "
             f"largest [{cu}] | upper bound [{cu}] | overshoot × limit | reached |",
             "|---|---|---|---|---|---|---|---|---|"]
    for sp, x in s.extremes.items():
        bound, over = (("none (daughter or mass loading)", "–") if x.upper_bound is None else
                       (f"{x.upper_bound * sc:.4g}", f"{x.overshoot_in_limits:.3g}"))
        lines.append(f"| {sp} | {x.limit * sc:.3g} | {min(x.lowest, 0.0) * sc:.3g} | "
                     f"{x.below_zero_in_limits:.3g} | {_span(x.lowest_between, tu)} "
                     f"| {x.highest * sc:.4g} | {bound} | {over} | "
                     f"{_span(x.highest_between, tu)} |")
    lines += ["", "\"Reached\" gives the output times between which the value was "
              "reached. The upper bound is the largest source, initial or injected "
              "concentration: without decay chains or mass loadings, transport creates no "
              "new maximum. A daughter's bound depends on how much parent mass (dissolved "
              "and sorbed) decays near it, so only its largest value is given. Warnings "
              "follow when a value lies more than 1 % of the limit below zero or above the "
              "bound (common practice, no source).", ""]
    if s.boundary_contacts:
        lines += ["Faces where the part above the limit touches nodes that let no water out "
                  "(the model may be too small):", "",
                  *[f"- {b.species}: {b.face} face, first at {_t(b.first_time, tu)}"
                    for b in s.boundary_contacts], ""]
    return lines


def _receptor_section(s: RunSummary) -> list[str]:
    """The table of extraction wells and boundaries where water leaves (theory.md O3)."""
    if not s.receptors:
        return []
    tu, cu = s.time_unit, s.concentration_unit
    sc = from_si(1.0, cu)
    lines = ["## What leaves the model: extraction wells and outflow boundaries", "",
             f"| receptor | kind | species | water out [m³/d] | peak [{cu}] | peak time | "
             "first above limit | last above limit | time above limit | mass out [kg] |",
             "|---|---|---|---|---|---|---|---|---|---|"]
    for r in s.receptors:
        last = ("still above at the end" if r.last_above_limit is not None
                and r.last_above_limit >= s.end_time else _t(r.last_above_limit, tu))
        lines.append(f"| {r.name} | {r.kind} | {r.species} | {r.water_rate * 86400:.4g} | "
                     f"{r.peak * sc:.4g} | {_t(r.peak_time, tu)} | "
                     f"{_t(r.first_above_limit, tu)} | {last} | "
                     f"{from_si(r.time_above_limit, tu):.3g} {tu} | {r.mass_out:.4g} |")
    lines += ["", "The concentration is that of the water leaving, weighted by the flow at each "
              "node (for a well, what it pumps; for a face or stream, the flux-averaged "
              f"value). It is taken at the output times (every {_t(s.output_step, tu)} at "
              "most): a peak between them is missed and crossing times are interpolated. The "
              "mass out is the transport's own balance, over every step. `receptors.csv` "
              "has every output time.", ""]
    return lines


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
        "| species | largest extent from the source [m] | at | farthest downstream [m] | "
        "largest volume above the limit [m³] | largest mass above the limit [kg] | "
        "extent at the end [m] |", "|---|---|---|---|---|---|---|",
        *[f"| {sp} | {p['largest_extent']:.4g} | {_t(p['time_of_largest_extent'], tu)} | "
          f"{p.get('largest_downstream', 0.0):.4g} | {p['largest_volume']:.4g} | "
          f"{p.get('largest_mass', 0.0):.4g} | {p['final_extent']:.4g} |"
          for sp, p in s.plume.items()],
        "", "Measured exactly on the computed (piecewise-linear) field, each tetrahedron cut "
        "where the field crosses the limit: the extent is the farthest plan distance from the "
        "species' first source (for a source on a face, the distance downstream of the face), "
        "\"downstream\" is measured along the mean flow, the mass is dissolved plus sorbed. "
        "`plume.csv` has every output time, with the extents across the flow and in "
        "elevation and the centroid; `plume_*.vtp` the surfaces at the limit.", "",
        *_receptor_section(s),
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
              "| species | mass-balance error [-] | max grid Péclet [-] | max Courant, "
              "plume [-] | max Courant, all cells [-] |",
              "|---|---|---|---|---|"]
    for sp, err in s.mass_balance_error.items():
        lines.append(f"| {sp} | {err:.2e} | {s.max_grid_peclet[sp]:.3g} | "
                     f"{s.max_plume_courant.get(sp, 0.0):.3g} | {s.max_courant[sp]:.3g} |")
    warnings = quality_warnings(s)
    lines += ["", "With the default scheme (`solver.monotone` and `solver.flux_limiting`, "
              "theory.md T16b) no value falls below zero or rises above the sources beyond the "
              "solver tolerance; with SUPG (`solver.monotone = false`) negative values near "
              "steep fronts are a discretisation artefact.", "", *_limit_section(s),
              "### Warnings", "", *([f"- {w}" for w in warnings] or ["- none"]), "",
              "## Files", "", *[f"- {g}" for g in file_groups(s.files)], "",
              "`solver.log` is in SI units (times in seconds, concentrations in kg/m³ = 1000 "
              "mg/L, lengths in m); every other file uses the case's display units.", ""]
    write_text_atomic(path, "\n".join(lines))
    return path
