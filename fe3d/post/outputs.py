"""Everything a run writes after the flow and during and after the transport.

:func:`write_flow_outputs` writes the flow field, its budget, the pathlines and the head
map; :class:`SeriesWriter` writes each output time as the transport yields it (the
concentration series, plume surfaces and tables, the mass budget) and, at the end, the
histories, the breakthrough figure, ``summary.json`` and ``report.md``. Nothing here
recomputes physics: it reads the records of the earlier stages.
"""

from __future__ import annotations

import itertools
import logging
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from scipy.sparse import csr_matrix

from fe3d._typing import BoolArray, FloatArray, IndexArray
from fe3d.case.parts import Ground
from fe3d.case.schema import Case
from fe3d.flow.paths import TravelPaths
from fe3d.flow.solve import FlowField
from fe3d.mesh.corridor import ReceptorSpread
from fe3d.mesh.materials import unit_materials, unit_values
from fe3d.mesh.site_mesh import SiteMesh
from fe3d.post.figures import plot_breakthrough, plot_heads
from fe3d.post.limit_checks import (
    BoundaryContact,
    boundary_contacts,
    first_times_above,
    outflow_nodes,
    species_extremes,
    upper_bound,
    widen_window,
)
from fe3d.post.plume import (
    MeasuringFrame,
    PlumeMeasures,
    SorbedPhase,
    measure_plume,
    measuring_frames,
    write_isosurface,
)
from fe3d.post.probes import breakthrough
from fe3d.post.receptors import (
    Receptor,
    ReceptorResult,
    ReceptorRow,
    receptor_operator,
    receptor_result,
    receptors_of,
)
from fe3d.post.report import ObservationResult, RunSummary, write_summary_json
from fe3d.post.run_figures import PlumeFigures, write_head_figure
from fe3d.post.series import SERIES_FILE, SeriesFile
from fe3d.post.tables import (
    append_histories,
    write_flow_budget,
    write_histories,
    write_mass_budget,
    write_plume_table,
    write_receptor_table,
)
from fe3d.post.vtk import write_field, write_pathlines, write_pvd
from fe3d.transport.budget import MassBudget
from fe3d.transport.run import Snapshot
from fe3d.transport.run_wide import RunWideField
from fe3d.units import from_si, to_seconds

__all__ = ["RUN_FIELDS", "SERIES_FILE", "PlumeRow", "SeriesWriter", "flow_cell_data",
           "flow_point_data", "method_words", "write_flow_figures", "write_flow_files",
           "write_flow_outputs"]

logger = logging.getLogger(__name__)

#: The file of the fields over the whole run (theory.md O4).
RUN_FIELDS = "over_the_run.vtu"


def write_flow_outputs(out_dir: Path, case: Case, site: SiteMesh, flow: FlowField,
                       paths: TravelPaths, *, figures: bool = True,
                       drawdown: FloatArray | None = None) -> list[str]:
    """The flow's files (:func:`write_flow_files`) and, with ``figures``, its figures
    (:func:`write_flow_figures`); returns the names of the files written."""
    names = write_flow_files(out_dir, case, site, flow, paths, drawdown=drawdown)
    if figures:
        names += write_flow_figures(out_dir, case, site, flow, paths, drawdown=drawdown)
    return names


def write_flow_files(out_dir: Path, case: Case, site: SiteMesh, flow: FlowField,
                     paths: TravelPaths, *, drawdown: FloatArray | None = None) -> list[str]:
    """``flow_budget.csv``, the forward and backward pathlines and, with
    ``output.vtu_series``, ``flow.vtu`` (head and ``drawdown`` in m, Darcy flux, seepage
    velocity, conductivity in m/d; else they are in the series file); returns the names of
    the files written."""
    names = ["flow_budget.csv", "pathlines_forward.vtp", "pathlines_backward.vtp"]
    if case.output.vtu_series:
        write_field(site, out_dir / "flow.vtu", point_data=flow_point_data(flow, drawdown),
                    cell_data=flow_cell_data(flow))
        names.insert(0, "flow.vtu")
    write_flow_budget(out_dir / "flow_budget.csv", flow)
    tu = case.output.time_unit
    tsec = to_seconds(tu)
    for name, lines in (("pathlines_forward.vtp", paths.forward),
                        ("pathlines_backward.vtp", paths.backward)):
        write_pathlines(out_dir / name, [(p.points, p.times) for found in lines.values()
                                         for p in found], time_unit_seconds=tsec, time_unit=tu)
    return names


def write_flow_figures(out_dir: Path, case: Case, site: SiteMesh, flow: FlowField,
                       paths: TravelPaths, *, drawdown: FloatArray | None = None
                       ) -> list[str]:
    """The head on the top face (``heads_plan.png``) and the head map with capture zones
    and the contours of ``drawdown`` [m] per node when given (``head_map.png``); returns
    the names of the files written."""
    forward = [p.points for lines in paths.forward.values() for p in lines]
    backward = [p.points for lines in paths.backward.values() for p in lines]
    top = site.faces["top"]
    under_top = _cells_on_face(site, top)
    centres = site.points[:2, site.cells[:, under_top]].mean(axis=1)
    plot_heads(out_dir / "heads_plan.png", site.points, top, flow.head,
               (centres, flow.darcy_flux[:2, under_top]),
               markers={**{o.name: (o.x, o.y) for o in case.observation_points},
                        **{w.name: (w.x, w.y) for w in case.wells}},
               pathlines=forward, backward_pathlines=backward,
               title=f"{case.site or case.title}: head on the top face",
               corridor=None if site.report is None else site.report.corridor)
    return ["heads_plan.png", *write_head_figure(out_dir, case, site, flow, paths,
                                                 head_unit="m", drawdown=drawdown)]


def _cells_on_face(site: SiteMesh, triangles: IndexArray) -> BoolArray:
    """The cells with three corners on the face ``triangles`` ``(3, k)``, counted a corner
    at a time (two bytes per cell, beside the transport's set-up on a large mesh)."""
    on_face = np.zeros(site.n_nodes, dtype=bool)
    on_face[triangles.ravel()] = True
    corners = np.zeros(site.n_cells, dtype=np.uint8)
    for k in range(site.cells.shape[0]):
        corners += on_face[site.cells[k]]
    return corners >= 3


def flow_point_data(flow: FlowField, drawdown: FloatArray | None) -> dict[str, FloatArray]:
    """The flow's nodal arrays [m]: the head, and the drawdown of the wells when given."""
    return {"head [m]": flow.head, **({} if drawdown is None else {"drawdown [m]": drawdown})}


def flow_cell_data(flow: FlowField) -> dict[str, FloatArray]:
    """The flow's cell arrays in m/d, shape ``(n_cells, 3)``: Darcy flux, seepage velocity
    and principal conductivities."""
    per_day = to_seconds("d")
    return {"darcy_flux [m/d]": (flow.darcy_flux * per_day).T,
            "seepage_velocity [m/d]": (flow.seepage_velocity * per_day).T,
            "conductivity [m/d]": (flow.conductivity * per_day).T}


@dataclass(frozen=True)
class PlumeRow:
    """The part of one species' plume above its limit at one output time (SI units)."""

    species: str
    time: float
    limit: float
    measures: PlumeMeasures


class SeriesWriter:
    """Writes a run's transport outputs as the snapshots arrive, then the summary: the
    fields into one VTKHDF file (``results.vtkhdf``, with ``output.vtu_series`` also one
    ``.vtu`` per output time), the plume surfaces, tables and figures.

    ``porosity`` is per cell. The plume measures and the receptors need the flow (the mean
    flow direction, the water leaving each item): pass ``flow`` to measure each snapshot as
    it arrives; without it the snapshots are kept and measured in :meth:`finish`.
    ``drawdown`` [m] per node (:func:`fe3d.flow.drawdown.well_drawdown`) is stored with the
    head in the series file.

    With ``receptors_every_step`` (needs ``flow``) the transport samples the receptors at
    every time step: it was given :attr:`receptor_probe` under its observation rows, so
    each history has one column per observation point, then one per receptor (its
    flux-averaged concentration). ``receptors.csv`` and the receptor results then hold
    every step, not only the output times."""

    def __init__(self, out_dir: Path, case: Case, site: SiteMesh, porosity: FloatArray, *,
                 flow: FlowField | None = None, figures: bool = True,
                 drawdown: FloatArray | None = None, receptors_every_step: bool = False,
                 ) -> None:
        if receptors_every_step and flow is None:
            msg = "receptors_every_step needs the flow (the receptors come from it)"
            raise ValueError(msg)
        self.out_dir, self.case, self.site = out_dir, case, site
        self.receptors_every_step = receptors_every_step
        self.receptor_steps = 0  # history rows already turned into receptor rows
        self.receptor_rows_written = 0  # rows of receptors.csv written so far
        self.porosity = porosity
        materials, names = unit_materials(Ground.of(case), site)
        bulk_density = unit_values(materials, "bulk_density")
        self.sorbed = {sp: SorbedPhase(bulk_density, site.cell_layer,
                                       tuple(s.isotherm_of(m) for m in names))
                       for sp, s in case.species.items()}
        self.frames: dict[str, MeasuringFrame] = {}
        self.receptors: tuple[Receptor, ...] = ()
        self._flow_known = False
        self._waiting: list[Snapshot] = []
        self.plume_rows: list[PlumeRow] = []
        self.receptor_rows: list[ReceptorRow] = []
        self.series: list[tuple[float, str]] = []
        self.budgets: list[MassBudget] = []
        self.last: Snapshot | None = None
        self.over_run = {sp: RunWideField.start(site.n_nodes) for sp in case.species}
        self.history_rows = 0  # rows of histories.csv written so far
        self.series_file = SeriesFile(
            out_dir / SERIES_FILE, site.points, site.cells,
            static_point_data=None if flow is None else flow_point_data(flow, drawdown),
            static_cell_data={"unit_id": site.cell_layer.astype(np.int32),
                              **({} if flow is None else flow_cell_data(flow))},
            time_unit=case.output.time_unit)
        self.figures = None if flow is None or not figures else PlumeFigures(
            out_dir, case, site, flow, every_output_time=False)
        self.full_outputs = figures  # figures, plume surfaces and the report, or none
        # limit checks: first output time above the limit at each boundary node, and the
        # output times between which each species' lowest and highest values were reached
        self.boundary_nodes = np.unique(np.concatenate(
            [t.ravel() for t in site.faces.values()])) if site.faces else np.zeros(0, int)
        self.first_above = {sp: np.full(self.boundary_nodes.size, np.nan)
                            for sp in case.species}
        self.extreme_windows: dict[tuple[str, str], tuple[float, float] | None] = {}
        if flow is not None:
            self._know_flow(flow)

    def _know_flow(self, flow: FlowField) -> None:
        """The measuring frame of each species and the receptors, from the flow."""
        self.frames = measuring_frames(self.case, self.site, flow)
        self.receptors = receptors_of(self.site, flow)
        self._flow_known = True

    @property
    def receptor_probe(self) -> csr_matrix:
        """Rows that sample each receptor's flux-averaged concentration from a nodal
        field, shape ``(n_receptors, n_nodes)``, in the order of the receptor columns."""
        return receptor_operator(self.receptors, self.site.n_nodes)

    def add(self, snap: Snapshot) -> None:
        """Write one output time: the fields, the plume surfaces and the running tables."""
        out, case = self.out_dir, self.case
        tu, cu = case.output.time_unit, case.output.concentration_unit
        scale = from_si(1.0, cu)
        k = len(self.series)
        name = f"concentration_{k:04d}.vtu"
        fields = {f"{sp} [{cu}]": c * scale for sp, c in snap.concentration.items()}
        self.series_file.add(from_si(snap.time, tu), fields)
        if case.output.vtu_series:
            write_field(self.site, out / name, point_data=fields)
            write_pvd(out / "concentration.pvd", [*self.series, (from_si(snap.time, tu), name)],
                      time_unit=tu)
        self.series.append((from_si(snap.time, tu), name))
        for sp, c in snap.concentration.items():
            lim = case.species[sp].limit
            if self.full_outputs:
                write_isosurface(out / f"plume_{sp}_{k:04d}.vtp", self.site.points,
                                 self.site.cells, c * scale, lim * scale, name=f"{sp} [{cu}]")
            self.first_above[sp] = first_times_above(
                self.first_above[sp], c[self.boundary_nodes], lim, snap.time)
        self.over_run = snap.over_run  # folded in at every step by the transport
        self._follow_extremes(snap)
        self.budgets += list(snap.budgets.values())
        write_mass_budget(out / "mass_budget.csv", self.budgets, time_unit=tu)
        if self._flow_known:
            self._measure(snap)
        else:
            self._waiting.append(snap)
        if self.figures is not None:
            self.figures.add(k, snap.time, snap.concentration, {
                r.species: (r.measures.volume, r.measures.dissolved_mass)
                for r in self.plume_rows if r.time == snap.time})
        self._write_histories(snap)  # every step so far: a run that stops keeps them
        self.last = snap

    def _write_histories(self, snap: Snapshot) -> None:
        """``histories.csv`` up to ``snap``: begun at the first output time, then only the
        new steps appended (no rewriting of what is there)."""
        path, names = self.out_dir / "histories.csv", self.case.observation_points
        units = {"time_unit": self.case.output.time_unit,
                 "conc_unit": self.case.output.concentration_unit}
        if self.history_rows == 0:
            write_histories(path, snap.history_times, snap.history, [o.name for o in names],
                            **units)
        else:
            append_histories(path, snap.history_times, snap.history, len(names),
                             start=self.history_rows, **units)
        self.history_rows = len(snap.history_times)

    def close(self) -> None:
        """Close the series file with the output times added so far (a run that stops
        early keeps them readable)."""
        self.series_file.close()

    def _measure(self, snap: Snapshot) -> None:
        """The plume measures and the receptors at one output time, and their tables."""
        case, site = self.case, self.site
        for sp, c in snap.concentration.items():
            lim = case.species[sp].limit
            self.plume_rows.append(PlumeRow(sp, snap.time, lim, measure_plume(
                site.points, site.cells, site.cell_volumes(), self.porosity, self.sorbed[sp],
                c, lim, self.frames[sp])))
        new = self._receptor_rows(snap)
        self.receptor_rows += new
        tu, cu = case.output.time_unit, case.output.concentration_unit
        write_plume_table(self.out_dir / "plume.csv",
                          [(r.species, r.time, r.limit, r.measures) for r in self.plume_rows],
                          time_unit=tu, conc_unit=cu)
        if self.receptors:  # begun at the first output time, then only new rows appended
            write_receptor_table(self.out_dir / "receptors.csv", new, time_unit=tu,
                                 conc_unit=cu, append=self.receptor_rows_written > 0)
            self.receptor_rows_written += len(new)

    def _receptor_rows(self, snap: Snapshot) -> list[ReceptorRow]:
        """The receptors' rows that ``snap`` adds: every time step since the last snapshot
        (from the receptor columns of the histories) or, without them, the output time; the
        mass out since the start is the budget's, at the output time only (NaN between)."""
        n_obs = len(self.case.observation_points)
        every = self.receptors_every_step and self._has_receptor_columns(snap, n_obs)
        start = self.receptor_steps if every else 0
        times = snap.history_times[start:] if every else np.array([snap.time])
        self.receptor_steps = len(snap.history_times)
        rows = []
        for species, c in snap.concentration.items():
            outflow = snap.budgets[species].outflow
            for k, r in enumerate(self.receptors):
                values = snap.history[species][start:, n_obs + k] \
                    if every else [r.flux_averaged(c)]
                last = len(times) - 1
                rows += [ReceptorRow(
                    receptor=r.name, kind=r.kind, species=species, time=float(t),
                    water_rate=r.water_rate, concentration=float(v),
                    mass_flux=r.water_rate * float(v),
                    mass_out=outflow.get(r.name, np.nan) if i == last else np.nan)
                    for i, (t, v) in enumerate(zip(times, values, strict=True))]
        return rows

    def _has_receptor_columns(self, snap: Snapshot, n_obs: int) -> bool:
        """Whether the histories of ``snap`` carry one column per receptor after the
        observation points; when not (a transport not handed :attr:`receptor_probe`), the
        output time is used and this is logged."""
        width = {h.shape[1] for h in snap.history.values()}
        if width == {n_obs + len(self.receptors)} or not self.receptors:
            return True
        logger.warning("receptors at output times only: the histories have %s columns, "
                       "not %d observation points + %d receptors", sorted(width), n_obs,
                       len(self.receptors))
        return False

    def _follow_extremes(self, snap: Snapshot) -> None:
        """Note between which output times each running extreme was last reached."""
        if self.last is None:
            return
        before, now = self.last.diagnostics, snap.diagnostics
        for sp in self.case.species:
            for kind, old, new in (
                    ("lowest", before.min_concentration[sp][0],
                     now.min_concentration[sp][0]),
                    ("highest", before.max_concentration.get(sp, (-np.inf, None))[0],
                     now.max_concentration.get(sp, (-np.inf, None))[0])):
                self.extreme_windows[sp, kind] = widen_window(
                    self.extreme_windows.get((sp, kind)), old, new, self.last.time,
                    snap.time, lower=kind == "lowest")

    def finish(self, flow: FlowField, paths: TravelPaths, files: list[str],
               started: float) -> RunSummary:
        """Write the histories, the breakthrough figure, ``summary.json`` and ``report.md``
        after the last snapshot; ``files`` are those written before the transport and
        ``started`` the run's start (``time.perf_counter``). Returns the summary."""
        last, case, out = self.last, self.case, self.out_dir
        assert last is not None
        if not self._flow_known:
            self._know_flow(flow)
            for snap in self._waiting:
                self._measure(snap)
            self._waiting = []
        tu, cu = case.output.time_unit, case.output.concentration_unit
        self._write_run_fields()
        names = [o.name for o in case.observation_points]  # histories.csv: written by add
        limits = {sp: s.limit for sp, s in case.species.items()}
        files = list(files)
        if names and self.full_outputs:
            activity = {sp: [(s.start, case.time.end if s.stop is None else s.stop)
                             for s in case.sources if s.species == sp] for sp in case.species}
            plot_breakthrough(out / "breakthrough.png", last.history_times,
                              {sp: h[:, :len(names)] for sp, h in last.history.items()},
                              names, limits, time_unit=tu, conc_unit=cu,
                              title=case.site or case.title, source_activity=activity)
            files.append("breakthrough.png")
        if self.figures is not None:
            files += self.figures.finish()
        files += [f"plume_{sp}_{k:04d}.vtp" for k in range(len(self.series))
                  for sp in case.species if self.full_outputs]
        self.series_file.close()
        files.append(SERIES_FILE)
        if case.output.vtu_series:
            files += ["concentration.pvd", *[f for _, f in self.series], RUN_FIELDS]
        files += ["mass_budget.csv", "histories.csv", "plume.csv",
                  *(["receptors.csv"] if self.receptors else []), "summary.json",
                  *(["report.md", "report.html", "inputs.json"] if self.full_outputs else []),
                  "solver.log", "run.json"]
        summary = self._summary(last, flow, paths, files, started)
        write_summary_json(out / "summary.json", summary)  # report.md: post.handover
        return summary

    def _write_run_fields(self) -> None:
        """The largest value, when it was reached and the first time above the limit at
        every node over every step, one file (theory.md O4)."""
        tu, cu = self.case.output.time_unit, self.case.output.concentration_unit
        scale, per_unit = from_si(1.0, cu), from_si(1.0, tu)
        data = {}
        for sp, f in self.over_run.items():
            data[f"{sp} largest [{cu}]"] = f.largest * scale
            data[f"{sp} time of largest [{tu}]"] = f.time_of_largest * per_unit
            data[f"{sp} first above limit [{tu}]"] = f.first_above * per_unit
        self.series_file.add_static(point_data=data)
        if self.case.output.vtu_series:
            write_field(self.site, self.out_dir / RUN_FIELDS, point_data=data)

    def _receptor_results(self) -> list[ReceptorResult]:
        """Peak, crossing times, time above the limit and mass out of every receptor and
        species, from the output times."""
        out = []
        for r in self.receptors:
            for sp, spec in self.case.species.items():
                rows = [x for x in self.receptor_rows if x.receptor == r.name and x.species == sp]
                out.append(receptor_result(rows, spec.limit))
        return out

    def _summary(self, last: Snapshot, flow: FlowField, paths: TravelPaths,
                 files: list[str], started: float) -> RunSummary:
        case, site = self.case, self.site
        limits = {sp: s.limit for sp, s in case.species.items()}
        observations = []
        for sp, values in last.history.items():
            for j, o in enumerate(case.observation_points):
                b = breakthrough(last.history_times, values[:, j], limits[sp])
                observations.append(ObservationResult(
                    name=o.name, kind=o.kind, species=sp, peak=b.peak, peak_time=b.peak_time,
                    first_above_limit=b.first_above_limit, limit=limits[sp]))
        worst = {sp: max(b.relative_error for b in self.budgets if b.species == sp)
                 for sp in case.species}
        d = last.diagnostics
        source_max = {sp: max([src.peak_concentration for src in case.sources
                               if src.species == sp and src.peak_concentration is not None]
                              + [c for w in case.wells for name, c in
                                 w.injection_concentration.items() if name == sp],
                              default=0.0) for sp in case.species}
        plume = {}
        for sp in case.species:
            rows = [r.measures for r in self.plume_rows if r.species == sp]
            times = [r.time for r in self.plume_rows if r.species == sp]
            k = max(range(len(rows)), key=lambda i: rows[i].extent)
            plume[sp] = {"largest_extent": rows[k].extent, "time_of_largest_extent": times[k],
                         "largest_volume": max(m.volume for m in rows),
                         "final_extent": rows[-1].extent,
                         "largest_downstream": max(m.downstream for m in rows),
                         "largest_mass": max(m.dissolved_mass + m.sorbed_mass for m in rows),
                         "final_volume": rows[-1].volume,
                         "final_dissolved_mass": rows[-1].dissolved_mass,
                         "final_sorbed_mass": rows[-1].sorbed_mass}
        return RunSummary(
            title=case.title, site=case.site, n_nodes=site.n_nodes, n_cells=site.n_cells,
            end_time=case.time.end, n_steps=d.n_steps, observations=observations,
            step_range=(d.smallest_step, d.largest_step), step_cuts=d.step_cuts,
            rejected_steps=d.rejected_steps, method=method_words(case),
            monotone=case.solver.monotone, mass_balance_error=worst, flow_inflow=flow.total_inflow,
            flow_discrepancy=flow.discrepancy, max_grid_peclet=d.max_grid_peclet,
            max_courant=d.max_courant,
            max_plume_courant={k: v[0] for k, v in d.max_plume_courant.items()},
            max_plume_courant_at={k: v[1] for k, v in d.max_plume_courant.items()},
            min_concentration={k: v[0] for k, v in d.min_concentration.items()},
            min_concentration_at={k: v[1] for k, v in d.min_concentration.items()},
            source_max=source_max, plume=plume,
            travel_times=[{"source": a.source, "receptor": a.receptor, "time": a.time,
                           "closest": a.closest, "arrival_radius": a.reach}
                          for a in paths.arrivals],
            extremes={sp: species_extremes(
                sp, limits[sp], lowest=d.min_concentration[sp],
                highest=d.max_concentration.get(sp, (-np.inf, None)),
                lowest_between=self.extreme_windows.get((sp, "lowest")),
                highest_between=self.extreme_windows.get((sp, "highest")),
                bound=upper_bound(
                    [source_max[sp], case.species[sp].initial_concentration],
                    has_parent=case.species[sp].parent is not None,
                    has_mass_loading=any(src.species == sp and src.kind == "mass_loading"
                                         for src in case.sources)))
                for sp in case.species},
            boundary_contacts=self._boundary_contacts(),
            solver_tolerance=case.solver.tolerance,
            well_heads=dict(flow.well_heads),
            wall_time=time.perf_counter() - started, time_unit=case.output.time_unit,
            concentration_unit=case.output.concentration_unit, files=files,
            receptors=self._receptor_results(), output_step=self._output_step(),
            thin_plumes=self._thin_plumes())

    def _thin_plumes(self) -> list[ReceptorSpread]:
        """The receptors where the plume is narrower than a corridor cell (the mesher's
        record, theory.md M4)."""
        report = self.site.report
        corridor = None if report is None else report.corridor
        return [] if corridor is None else [r for r in corridor.receptors if r.thin]

    def _output_step(self) -> float:
        """The longest interval between output times [s] (receptor and run-wide values are
        taken at output times)."""
        times = sorted({r.time for r in self.plume_rows})
        return max((b - a for a, b in itertools.pairwise(times)), default=0.0)

    def _boundary_contacts(self) -> list[BoundaryContact]:
        """Faces where the part above a limit touched nodes that let no water out: not
        on a fixed-head face where water leaves (outward flux at an adjacent facet, as the
        transport's outflow term, theory.md T3b) nor at a budget item taking water out.
        A face that carries a source patch of the species is the source's own boundary
        (the patch is meant to sit on it), so it is not checked for that species."""
        site, n = self.site, self.site.n_nodes
        leaves = outflow_nodes(n, {r.name: r.water_out for r in self.receptors}, {})
        contacts = []
        for sp, first in self.first_above.items():
            everywhere = np.full(n, np.nan)
            everywhere[self.boundary_nodes] = first
            own = {src.face for src in self.case.sources
                   if src.species == sp and src.shape == "face_patch"}
            faces = {name: ids for name, ids in site.faces.items() if name not in own}
            contacts += boundary_contacts(sp, everywhere, faces, leaves)
        return contacts


def method_words(case: Case) -> str:
    """The transport method in words, for the report (theory.md T6, T13–T16b)."""
    sc = case.solver
    names = {"backward_euler": "backward Euler", "crank_nicolson": "Crank–Nicolson",
             "bdf2": "BDF2"}
    t = case.time
    steps = ("adaptive steps" if t.adaptive else "fixed steps" if t.step is not None
             else f"steps holding the plume's Courant number at or below {t.courant:g}")
    time_words = f"{names[t.scheme]}, {steps}"
    if sc.monotone and sc.flux_limiting:
        space = ("bounded: a low-order backward Euler step (lumped storage, discrete "
                 f"upwinding) corrected towards the Galerkin {names[t.scheme]} step within "
                 "local bounds")
    elif sc.monotone:
        space = "low-order backward Euler step (lumped storage, discrete upwinding)"
    elif sc.supg:
        space = "SUPG" + (" with shock capturing" if sc.shock_capturing else "")
    else:
        space = "Galerkin, no stabilisation" + (" with shock capturing"
                                                if sc.shock_capturing else "")
    return f"{time_words}; {space}; linear solver {sc.linear_solver}, " \
           f"relative tolerance {sc.tolerance:.0e}"
