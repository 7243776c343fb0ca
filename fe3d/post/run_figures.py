"""The figures of a run, from the records of the earlier stages: the head map with capture
zones once the flow is known (:func:`write_head_figure`), then plan maps as the output times
arrive and, at the end, the whole run's plan map, the section along the flow, the plume's
size over time and the 3D view (:class:`PlumeFigures`). File names are in docs/outputs.md.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from fe3d._typing import FloatArray
from fe3d.case.schema import Case
from fe3d.flow.paths import TravelPaths
from fe3d.flow.solve import FlowField
from fe3d.mesh.site_mesh import SiteMesh
from fe3d.post.beside import Beside
from fe3d.post.figures import plot_plume_over_time
from fe3d.post.map_figures import plot_head_map, plot_plan_maximum, plot_section
from fe3d.post.maps import (
    PlanLayout,
    horizontal_section,
    mean_flow_direction,
    plan_layout,
    plan_maximum,
    section_marks,
    section_through,
    site_features,
    vertical_section,
)
from fe3d.post.render3d import load_renderer, render_limit_surface
from fe3d.units import from_si

__all__ = ["PlumeFigures", "head_map_elevation", "write_head_figure"]


def _quantity(value: float, unit: str) -> str:
    """An SI value in ``unit``, 4 significant digits, with the unit."""
    return f"{from_si(value, unit):.4g} {unit}"


def head_map_elevation(case: Case, site: SiteMesh) -> float:
    """Elevation [m] of the head map: the middle of the first extraction well's first
    screen (the pumped unit), else the middle of the model's top and bottom."""
    for w in case.wells:
        if w.kind == "extraction" and w.rate > 0:
            top, bottom = w.screens[0]
            return 0.5 * (top + bottom)
    return 0.5 * float(site.points[2].max() + site.points[2].min())


def write_head_figure(out_dir: Path, case: Case, site: SiteMesh, flow: FlowField,
                      paths: TravelPaths, *, head_unit: str = "m",
                      drawdown: FloatArray | None = None) -> list[str]:
    """``head_map.png``: the head at :func:`head_map_elevation` in ``head_unit``, forward
    and backward pathlines, each extraction well's capture zone within the run's end time,
    and the contours of ``drawdown`` [m] (per node, ``(n_nodes,)``, from
    :func:`fe3d.flow.drawdown.well_drawdown`) when it is given and a well pumps. Returns
    the names of the files written."""
    elevation = head_map_elevation(case, site)
    plan = horizontal_section(site.points, site.cells, flow.head, elevation)
    pumping = any(w.kind != "observation" and w.rate > 0 for w in case.wells)
    drawn = None
    if drawdown is not None and pumping:
        drawn = horizontal_section(site.points, site.cells, drawdown, elevation)
    tu = case.output.time_unit
    plot_head_map(out_dir / "head_map.png", plan, features=site_features(case),
                  elevation=elevation, head_unit=head_unit,
                  forward=[p.points for lines in paths.forward.values() for p in lines],
                  backward={w: [p.points for p in lines] for w, lines in paths.backward.items()},
                  wells={w.name: (w.x, w.y) for w in case.wells},
                  capture_time=_quantity(case.time.end, tu),
                  drawdown=drawn, pumping=pumping)
    return ["head_map.png"]


class PlumeFigures:
    """Plan maps of each output time (when ``every_output_time``) and, from :meth:`finish`,
    the figures of the whole run. ``flow`` gives the mean flow direction of the sections."""

    def __init__(self, out_dir: Path, case: Case, site: SiteMesh, flow: FlowField, *,
                 every_output_time: bool = True) -> None:
        self.out_dir, self.case, self.site = out_dir, case, site
        self.features = site_features(case)
        self.every_output_time = every_output_time
        self.direction = mean_flow_direction(flow.darcy_flux, site.cell_volumes())
        self.largest: dict[str, FloatArray] = {}
        self.sizes: dict[str, list[tuple[float, float, float]]] = {sp: [] for sp in
                                                                   case.species}
        self.files: list[str] = []
        self.layout: PlanLayout | None = None  # made by prepare() or the first plan map

    def prepare(self) -> None:
        """Make what the figures at the end need and the run's records already fix: the
        plan layout of the mesh's columns, and the 3D renderer loaded. Meant to run beside
        the transport; the figures make what is missing themselves."""
        self._plan_layout()
        load_renderer()

    def _plan_layout(self) -> PlanLayout:
        """The plan layout of the mesh's columns, made on first use and kept."""
        if self.layout is None:
            self.layout = plan_layout(self.site.points, self.features.outline.xy)
        return self.layout

    def section_trace(self, species: str) -> tuple[FloatArray, FloatArray]:
        """Plan end points [m] of the section along the mean flow through the species'
        first source with a plan centre (else the site's centre)."""
        centre = next((s.plan_centre for s in self.case.sources
                       if s.species == species and s.plan_centre is not None), None)
        if centre is None:
            centre = tuple(self.features.outline.xy.mean(axis=1))
        return section_through(centre, self.direction, self.features.outline.xy)

    def add(self, index: int, time: float, concentration: dict[str, FloatArray],
            plume_sizes: dict[str, tuple[float, float]] | None = None) -> list[str]:
        """One output time (number ``index``, ``time`` [s], nodal concentrations
        [kg/m³]); ``plume_sizes`` (species → volume [m³], dissolved mass [kg] above the
        limit) feed the plume-size figure. Returns the names of the files written."""
        written = []
        for sp, c in concentration.items():
            self.largest[sp] = np.maximum(self.largest[sp], c) if sp in self.largest else c
            if plume_sizes is not None and sp in plume_sizes:
                self.sizes[sp].append((time, *plume_sizes[sp]))
            if self.every_output_time:
                name = f"plan_{sp}_{index:04d}.png"
                self._plan(name, c, sp, _quantity(time, self.case.output.time_unit))
                written.append(name)
        self.files += written
        return written

    def _plan(self, name: str, c: FloatArray, species: str, when: str) -> None:
        """One plan map; the colour scale tops at the species' largest source or initial
        concentration when there is one, the same at every output time."""
        top = max([s.peak_concentration for s in self.case.sources
                   if s.species == species and s.peak_concentration is not None]
                  + [self.case.species[species].initial_concentration], default=0.0)
        plot_plan_maximum(self.out_dir / name,
                          plan_maximum(self.site.points, c, self.features.outline.xy,
                                       layout=self._plan_layout()),
                          limit=self.case.species[species].limit, features=self.features,
                          conc_unit=self.case.output.concentration_unit, species=species,
                          when=when, section=self.section_trace(species),
                          scale_top=top if top > 0 else None)

    def finish(self) -> list[str]:
        """The whole run's plan map, section and 3D view per species, and the plume sizes
        over time; returns the names of all figures written by this object. The 3D views
        are rendered on a second thread while the maps are drawn (:class:`Beside`)."""
        cu, tu = self.case.output.concentration_unit, self.case.output.time_unit
        views = Beside(self._views, name="3D views")
        try:
            maps = {sp: self._run_maps(sp, c) for sp, c in self.largest.items()}
        finally:
            views.wait()
        drawn = views.result()
        for sp, names in maps.items():
            self.files += [*names, *([drawn[sp]] if sp in drawn else [])]
        sizes = {sp: tuple(np.array(col) for col in zip(*rows, strict=True))
                 for sp, rows in self.sizes.items() if rows}
        if sizes:
            plot_plume_over_time(self.out_dir / "plume_size.png", sizes,
                                 limits={sp: s.limit for sp, s in self.case.species.items()},
                                 time_unit=tu, conc_unit=cu, site=self.features.site)
            self.files.append("plume_size.png")
        return list(self.files)

    def _run_maps(self, species: str, c: FloatArray) -> list[str]:
        """The plan map and the section of the largest value over the run (``c``
        [kg/m³] per node); returns their names."""
        cu = self.case.output.concentration_unit
        self._plan(f"plan_{species}_run.png", c, species, "largest over the whole run")
        start, end = self.section_trace(species)
        reach = 2.0 * (self.case.mesh.fine_cell_size or self.case.mesh.cell_size)
        plot_section(self.out_dir / f"section_{species}_run.png",
                     vertical_section(self.site.points, self.site.cells, c, start, end),
                     limit=self.case.species[species].limit, conc_unit=cu, species=species,
                     when="largest over the whole run", site=self.features.site,
                     marks=section_marks(self.case, start, end, within=reach))
        return [f"plan_{species}_run.png", f"section_{species}_run.png"]

    def _views(self) -> dict[str, str]:
        """The 3D view of each species' surface at its limit, largest over the run; returns
        species → file name, for the species that have one."""
        drawn = {}
        for sp, c in self.largest.items():
            limit = self.case.species[sp].limit
            level = _quantity(limit, self.case.output.concentration_unit)
            if render_limit_surface(self.out_dir / f"surface_{sp}_run.png", self.site.points,
                                    self.site.cells, c, limit, features=self.features,
                                    label=f"{sp}: largest over the run, surface at the "
                                          f"limit {level}") is not None:
                drawn[sp] = f"surface_{sp}_run.png"
        return drawn
