"""The report to hand over: ``report.md`` and a self-contained ``report.html`` (figures
embedded as data URIs, one inline stylesheet, no outside assets) written from a run
folder's own files (:func:`write_handover`).

Every number is read from the run's files (:func:`fe3d.post.run_folder.read_run`): the
receptor and observation statistics are recomputed from ``receptors.csv`` and
``histories.csv``, the plume measures from ``plume.csv``, the budgets from
``mass_budget.csv`` and ``flow_budget.csv``, the inputs from ``inputs.json``, the numerical
checks from ``summary.json``. Nothing is recomputed from fields or physics.
"""

from __future__ import annotations

import base64
import html
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from fe3d._typing import FloatArray
from fe3d.case.schema import Case
from fe3d.errors import CaseError
from fe3d.post.case_tables import write_inputs
from fe3d.post.files import write_text_atomic
from fe3d.post.probes import breakthrough
from fe3d.post.report import CAUTION
from fe3d.post.run_folder import RunResult, read_run
from fe3d.units import from_si

__all__ = ["Figure", "Items", "Section", "Table", "Text", "file_table", "handover_sections",
           "markdown", "receptor_table", "standalone_html", "write_handover"]

#: The limits of a screening model, said at the end of every handover report.
LIMITS = (
    "The aquifer, its conductivity, the sources and the parameters are what the case says; "
    "the results are only as good as those inputs and the site investigation behind them.",
    "The flow is steady: seasonal and pumping changes of the flow are not followed.",
    "Concentrations below the mesh and time resolution (thin layers, short pulses) are "
    "smoothed; the quality checks above say where this may matter.",
    "Crossing times are interpolated between stored times (every time step, or the output "
    "times where a table says so, and then a peak between two output times is missed).",
    "Compare every value with the limits and procedures that apply at the site; local "
    "regulations and licensed professional practice decide.",
)


@dataclass(frozen=True)
class Text:
    """A paragraph (``code`` in backticks)."""

    text: str


@dataclass(frozen=True)
class Table:
    """A table: ``header`` (units in brackets) and ``rows`` of display text."""

    header: tuple[str, ...]
    rows: tuple[tuple[str, ...], ...]


@dataclass(frozen=True)
class Items:
    """A bulleted list (``code`` in backticks)."""

    items: tuple[str, ...]


@dataclass(frozen=True)
class Figure:
    """A PNG file of the run folder and its caption."""

    file: str
    caption: str


Block = Text | Items | Table | Figure


@dataclass(frozen=True)
class Section:
    """A titled part of the report."""

    title: str
    blocks: tuple[Block, ...]


def _q(x: float | None, digits: int = 4) -> str:
    return "–" if x is None or not np.isfinite(x) else f"{x:.{digits}g}"


def _time(t: float | None, unit: str) -> str:
    return "not reached" if t is None else f"{from_si(t, unit):.4g}"


def _last(t: float | None, times: FloatArray, unit: str) -> str:
    """The last time above the limit, or "still above at the end" when it is the last
    stored time."""
    return ("still above at the end" if t is not None and t >= times[-1] else
            _time(t, unit))


def receptor_table(run: RunResult) -> Table:
    """Per receptor and species, recomputed from ``receptors.csv``: water out [m³/d], peak
    flux-averaged concentration and its time, first and last time above the limit ("not
    reached"; "still above" at the end), total time above it, mass carried out [kg] and its
    share of all the mass that left the model through receptors [%]."""
    tu, cu = run.time_unit, run.concentration_unit
    rows = []
    for r, res in zip(run.receptors, run.receptor_results(), strict=True):
        rows.append((r.name, r.kind, r.species, _q(res.water_rate * 86400.0),
                     _q(from_si(res.peak, cu)), _time(res.peak_time, tu),
                     _time(res.first_above_limit, tu),
                     _last(res.last_above_limit, r.times, tu),
                     _q(from_si(res.time_above_limit, tu)), _q(res.mass_out),
                     _q(100.0 * run.mass_out_share(res))))
    return Table(("receptor", "kind", "species", "water out [m³/d]", f"peak [{cu}]",
                  f"time of peak [{tu}]", f"first above limit [{tu}]",
                  f"last above limit [{tu}]", f"time above limit [{tu}]", "mass out [kg]",
                  "share of mass out [%]"), tuple(rows))


def _observation_table(run: RunResult) -> Table:
    tu, cu = run.time_unit, run.concentration_unit
    rows = []
    for h in run.histories:
        b = breakthrough(h.times, h.concentration, run.limit(h.species))
        rows.append((h.point, h.species, _q(from_si(b.peak, cu)), _time(b.peak_time, tu),
                     _time(b.first_above_limit, tu), _last(b.last_above_limit, h.times, tu)))
    return Table(("point", "species", f"peak [{cu}]", f"time of peak [{tu}]",
                  f"first above limit [{tu}]", f"last above limit [{tu}]"), tuple(rows))


def _plume_table(run: RunResult) -> Table:
    tu, cu = run.time_unit, run.concentration_unit
    rows = []
    for p in run.plume:
        mass = p.dissolved_mass + p.sorbed_mass
        k = int(np.argmax(p.extent))
        rows.append((p.species, _q(from_si(p.limit, cu)), _q(float(p.volume.max())),
                     _q(float(mass.max())), _q(float(p.extent[k])), _time(p.times[k], tu),
                     _q(float(p.downstream.max())), _q(float(p.volume[-1])),
                     _q(float(p.extent[-1]))))
    return Table(("species", f"limit [{cu}]", "largest volume above limit [m³]",
                  "largest mass above limit [kg]", "largest extent from source [m]",
                  f"at [{tu}]", "farthest downstream [m]", "volume at the end [m³]",
                  "extent at the end [m]"), tuple(rows))


def _production(run: RunResult, species: str, terms: dict[str, Any]) -> tuple[str, str]:
    """(source input, produced from the parent) as text, kg: the budget's own column when
    it has one; for a daughter without a source of its own, its whole input is production;
    otherwise the two are lumped and said so."""
    source = float(terms["source input"][-1])
    inputs = run.inputs or {}
    has_parent = species in inputs.get("parents", {})
    if "produced from parent" in terms:
        made = _q(float(terms["produced from parent"][-1]))
        return _q(source), made if has_parent or run.inputs is None else "none"
    if not has_parent:
        return _q(source), "none" if run.inputs is not None else "not known"
    if species not in inputs.get("species_with_sources", []):
        return "0", _q(source)
    return _q(source), "included in source input"


def _budget_table(run: RunResult) -> Table:
    tu = run.time_unit
    rows = []
    for b in run.mass_budget:
        terms = dict(b.terms)
        source, produced = _production(run, b.species, terms)
        out = sum(float(v[-1]) for k, v in terms.items() if k.startswith("outflow"))
        rows.append((b.species, _time(b.times[-1], tu), _q(float(terms["initial"][-1])),
                     source, produced, _q(out), _q(float(terms["decayed"][-1])),
                     _q(float(terms["stored"][-1])), _q(float(terms["imbalance"][-1]), 2),
                     _q(float(b.relative_error.max()), 2)))
    return Table(("species", f"at [{tu}]", "initial [kg]", "source input [kg]",
                  "produced from parent [kg]", "out through boundaries and wells [kg]",
                  "decayed [kg]", "stored at the end [kg]", "imbalance [kg]",
                  "largest relative error [-]"), tuple(rows))


def _quality_table(run: RunResult) -> Table:
    """Per species: the run's lowest and highest values against the limit (summary.json
    ``extremes``), the mass-balance error and the step measures, and a verdict."""
    s = run.summary
    warned = list(s.get("warnings", []))
    rows = []
    for sp in run.species:
        x = s.get("extremes", {}).get(sp, {})
        below = float(x.get("below_zero_in_limits") or 0.0)
        over = float(x.get("overshoot_in_limits") or 0.0)
        mine = [w for w in warned if w.startswith(f"{sp}:")]
        verdict = ("no concern found" if not mine and below <= 0.01 and over <= 0.01 else
                   f"review: {len(mine)} warning{'s' * (len(mine) != 1)} below")
        rows.append((sp, f"{below:.3g}", "no bound (daughter or mass loading)"
                     if x.get("upper_bound") is None else f"{over:.3g}",
                     _q(s["mass_balance_error"][sp], 2),
                     _q(s.get("max_grid_peclet", {}).get(sp), 3),
                     _q(s.get("max_plume_courant", {}).get(sp), 3), verdict))
    return Table(("species", "most negative value [× limit]", "overshoot of the sources "
                  "[× limit]", "mass-balance error [-]", "largest grid Péclet [-]",
                  "largest Courant in the plume [-]", "verdict"), tuple(rows))


def _inputs_section(run: RunResult) -> Section:
    if run.inputs is None:
        return Section("Inputs", (Text(
            "This run folder has no `inputs.json` (written by runs of this version on): the "
            "inputs are in the case file the run was made from."),))
    blocks: list[Block] = []
    for t in run.inputs["tables"]:
        blocks += [Text(f"**{t['title']}**"),
                   Table(tuple(t["header"]), tuple(tuple(r) for r in t["rows"]))]
    return Section("Inputs (display units)", tuple(blocks))


def _flow_section(run: RunResult) -> Section:
    s = run.summary
    day = 86400.0
    rows = [(f.name, f.kind, _q(f.inflow * day), _q(f.outflow * day))
            for f in run.flow_budget]
    rows.append(("total", "", _q(sum(f.inflow for f in run.flow_budget) * day),
                 _q(sum(f.outflow for f in run.flow_budget) * day)))
    heads = "".join(f" Head in well {w}: {h:.4g} m." for w, h in run.well_heads.items())
    return Section("Mesh and water budget", (
        Text(f"The mesh has {s['n_nodes']} nodes and {s['n_cells']} tetrahedra. The steady "
             f"water budget closes to a relative discrepancy of {run.flow_discrepancy:.1e}."
             f"{heads}"),
        Table(("item", "kind", "water in [m³/d]", "water out [m³/d]"), tuple(rows))))


def _travel_table(run: RunResult) -> Table:
    tu = run.time_unit
    return Table(("from source", "to receptor", f"water travel time [{tu}]",
                  "closest approach [m]"),
                 tuple((str(a["source"]), str(a["receptor"]), _time(a["time"], tu),
                        _q(a["closest"], 3)) for a in run.summary.get("travel_times", [])))


_CAPTIONS = (
    ("head_map.png", "Head in the pumped unit, pathlines and capture zones"),
    ("heads_plan.png", "Head on the top face and pathlines"),
    (r"plan_(.+)_run\.png", "{}: largest concentration over depth during the run"),
    (r"section_(.+)_run\.png", "{}: section along the flow, largest over the run"),
    (r"surface_(.+)_run\.png", "{}: surface at the limit, largest over the run"),
    ("breakthrough.png", "Breakthrough at the observation points"),
    ("plume_size.png", "Volume and mass above the limit over time"),
)


def _figures(run: RunResult) -> tuple[Figure, ...]:
    """The figures of the whole run (per-output-time maps are listed under Files), in the
    order of :data:`_CAPTIONS`."""
    out = []
    for pattern, caption in _CAPTIONS:
        for f in run.files:
            m = re.fullmatch(pattern, f)
            if m:
                out.append(Figure(f, caption.format(*m.groups())))
    return tuple(out)


_KINDS = (("mesh cache", ("mesh.npz", "mesh.json")), ("tables (CSV)", (".csv",)),
          ("figures (PNG)", (".png",)),
          ("fields over time (VTKHDF)", (".vtkhdf",)),
          ("meshes and fields (VTK, gmsh)", (".vtu", ".pvd", ".msh")),
          ("surfaces and pathlines (VTK)", (".vtp",)),
          ("summary, inputs and report", (".json", ".md", ".html")),
          ("log", (".log",)))


def file_table(files: tuple[str, ...]) -> Table:
    """The files as a short grouped table: kind, count, names (a numbered series shortened
    to its first and last file)."""
    rows = []
    taken: set[str] = set()
    for kind, ends in (*_KINDS, ("other", ("",))):
        names = [f for f in files if f.endswith(ends) and f not in taken]
        if not names:
            continue
        taken.update(names)
        rows.append((kind, str(len(names)), ", ".join(_shortened(names))))
    return Table(("kind", "files", "names"), tuple(rows))


def _shortened(names: list[str]) -> list[str]:
    """Names with every numbered series ``stem_0000.ext`` … given as ``stem_0000–0012.ext``."""
    series: dict[tuple[str, str], list[str]] = {}
    order: list[str | tuple[str, str]] = []
    for n in names:
        m = re.fullmatch(r"(.+)_(\d{4})\.(\w+)", n)
        if m is None:
            order.append(n)
            continue
        if (m[1], m[3]) not in series:
            order.append((m[1], m[3]))
        series.setdefault((m[1], m[3]), []).append(m[2])
    return [f"`{x}`" if isinstance(x, str) else
            f"`{x[0]}_{min(series[x])}–{max(series[x])}.{x[1]}`" if len(series[x]) > 1 else
            f"`{x[0]}_{series[x][0]}.{x[1]}`" for x in order]


def handover_sections(run: RunResult) -> tuple[Section, ...]:
    """The report's sections, every number from the run's files (module docstring)."""
    s = run.summary
    tu = run.time_unit
    files = tuple(sorted({*run.files, "report.md", "report.html"}))
    return (
        _inputs_section(run),
        _flow_section(run),
        Section("What leaves the model: extraction wells and outflow boundaries", (
            receptor_table(run),
            Text("The concentration is that of the water leaving, weighted by the flow at "
                 "each node: for a well, what it pumps. Values are taken at "
                 + ("every time step" if run.receptors_every_step else "the output times")
                 + ", recomputed here from `receptors.csv`."))),
        Section("Observation points", (
            _observation_table(run),
            Text("Every time step, recomputed here from `histories.csv`."))),
        Section("The plume above the limit", (
            _plume_table(run),
            Text("Measured on the computed field, each tetrahedron cut where the field "
                 "crosses the limit; the mass is dissolved plus sorbed (`plume.csv`)."))),
        Section("Mass budget", (
            _budget_table(run),
            Text("Cumulative from the start, from `mass_budget.csv`. The budget reads: "
                 "stored − initial = source input + produced from parent − out − decayed. "
                 "The relative error is the imbalance over the largest mass involved."))),
        Section("Numerical quality against the limit", (
            _quality_table(run),
            Text("A value more than 1 % of the limit below zero or above the largest "
                 "source is flagged (common practice, no source); so are Courant numbers "
                 "above 1 in the plume and grid Péclet numbers above 2."),
            Text("Warnings:"), Items(tuple(s.get("warnings") or ["none"])))),
        Section("Method", (
            Text("Steady groundwater flow, then the transport of each dissolved species "
                 "(advection, dispersion, sorption, decay), solved by finite elements on "
                 "tetrahedra with linear shape functions."),
            Items((f"simulated period: {from_si(s['end_time'], tu):.4g} {tu} in "
                   f"{s['n_steps']} steps of {_time(s['step_range'][0], tu)} to "
                   f"{_time(s['step_range'][1], tu)} {tu}",
                   f"transport method: {s.get('method') or 'see solver.log'}")),
            _travel_table(run),
            Text("Water travel times come from particle tracking and ignore sorption: a "
                 "sorbing solute's front moves about R times slower."))),
        Section("Figures", _figures(run)),
        Section("Files", (file_table(files),
                          Text("`solver.log` is in SI units; every other file uses the "
                               "case's display units."))),
        Section("Cautions", (Text(CAUTION), Items(LIMITS))),
    )


def _md_cell(text: str) -> str:
    return text.replace("|", "\\|")


def markdown(run: RunResult, sections: tuple[Section, ...]) -> str:
    """The report as Markdown; figures linked by their file names."""
    site = run.summary.get("site", "")
    lines = [f"# {run.title}", "", *([f"Site: {site}", ""] if site else []),
             f"> **{CAUTION}**", ""]
    for sec in sections:
        lines += [f"## {sec.title}", ""]
        for b in sec.blocks:
            if isinstance(b, Table):
                lines += ["| " + " | ".join(map(_md_cell, b.header)) + " |",
                          "|" + "---|" * len(b.header),
                          *("| " + " | ".join(map(_md_cell, r)) + " |" for r in b.rows)]
            elif isinstance(b, Figure):
                lines.append(f"![{b.caption}]({b.file})")
            elif isinstance(b, Items):
                lines += [f"- {x}" for x in b.items]
            else:
                lines.append(b.text)
            lines.append("")
    return "\n".join(lines)


_STYLE = """
body{font-family:sans-serif;max-width:70em;margin:1em auto;padding:0 1em;color:#222}
h1{font-size:1.5em}h2{font-size:1.2em;border-bottom:1px solid #999;margin-top:1.6em}
.caution{border:2px solid #a00;background:#fff4f0;padding:.6em 1em;font-weight:bold}
table{border-collapse:collapse;margin:.5em 0;font-size:.85em}
th,td{border:1px solid #bbb;padding:.2em .5em;text-align:left;vertical-align:top}
th{background:#eee}figure{margin:1em 0}img{max-width:100%}
figcaption{font-size:.9em;color:#444}code{background:#f2f2f2}
""".strip()


def _inline(text: str) -> str:
    """Escaped text with `code` and **bold** marked up."""
    out = html.escape(text)
    out = re.sub(r"`([^`]+)`", r"<code>\1</code>", out)
    return re.sub(r"\*\*([^*]+)\*\*", r"<strong>\1</strong>", out)


def _html_block(b: Block, folder: Path) -> list[str]:
    if isinstance(b, Table):
        return ["<table>", "<tr>" + "".join(f"<th>{_inline(h)}</th>" for h in b.header)
                + "</tr>", *("<tr>" + "".join(f"<td>{_inline(c)}</td>" for c in r) + "</tr>"
                             for r in b.rows), "</table>"]
    if isinstance(b, Figure):
        data = base64.b64encode((folder / b.file).read_bytes()).decode("ascii")
        return [f'<figure><img src="data:image/png;base64,{data}" '
                f'alt="{html.escape(b.caption)}"><figcaption>{html.escape(b.caption)} '
                f"(<code>{html.escape(b.file)}</code>)</figcaption></figure>"]
    if isinstance(b, Items):
        return ["<ul>", *(f"<li>{_inline(x)}</li>" for x in b.items), "</ul>"]
    return [f"<p>{_inline(b.text)}</p>"]


def standalone_html(run: RunResult, sections: tuple[Section, ...]) -> str:
    """The report as one HTML page: figures embedded, stylesheet inline, no outside file."""
    site = run.summary.get("site", "")
    out = ["<!DOCTYPE html>", '<html lang="en">', "<head>", '<meta charset="utf-8">',
           f"<title>{html.escape(run.title)}</title>", f"<style>{_STYLE}</style>", "</head>",
           "<body>", f"<h1>{html.escape(run.title)}</h1>",
           *([f"<p>Site: {html.escape(site)}</p>"] if site else []),
           f'<p class="caution">{html.escape(CAUTION)}</p>']
    for sec in sections:
        out.append(f"<h2>{html.escape(sec.title)}</h2>")
        for b in sec.blocks:
            out += _html_block(b, run.folder)
    out += [f'<p class="caution">{html.escape(CAUTION)}</p>', "</body>", "</html>", ""]
    return "\n".join(out)


def write_handover(folder: Path, *, case: Case | None = None) -> tuple[Path, Path]:
    """Write ``report.md`` and ``report.html`` into the run folder ``folder`` from its own
    files; returns their paths. With ``case`` (the case the run was made from), its inputs
    are first written to the folder's ``inputs.json``
    (:func:`fe3d.post.case_tables.write_inputs`), for a run written without one.

    Raises
    ------
    CaseError
        When the folder is not a finished run (a file is missing or unreadable).
    """
    if case is not None:
        if not Path(folder).is_dir():
            key = "RUN_DIR"
            raise CaseError(key, str(folder), "a folder written by `fe3d run`")
        write_inputs(Path(folder), case)
    run = read_run(Path(folder))
    sections = handover_sections(run)
    md, page = run.folder / "report.md", run.folder / "report.html"
    write_text_atomic(md, markdown(run, sections))
    write_text_atomic(page, standalone_html(run, sections))
    return md, page
