"""The inputs of a case as short tables in display units (:func:`input_tables`), written to
a run folder as ``inputs.json`` (:func:`write_inputs`) so that the handover report
(:mod:`fe3d.post.handover`) reads the inputs from the run's own files.

Lengths and elevations in m, conductivities in m/d, bulk density in kg/m³, Kd in L/kg,
water rates in m³/d, mass rates in g/d, times and concentrations in the case's
``output.time_unit`` and ``output.concentration_unit``.
"""

from __future__ import annotations

import json
from dataclasses import asdict, dataclass
from pathlib import Path

from fe3d.case.schema import Case
from fe3d.post.files import write_text_atomic
from fe3d.post.run_folder import INPUTS_FILE
from fe3d.units import from_si

__all__ = ["InputTable", "input_tables", "write_inputs"]

_DAY = 86400.0


@dataclass(frozen=True)
class InputTable:
    """One group of inputs: a ``title``, the column ``header`` (units in brackets) and the
    ``rows`` as display text."""

    title: str
    header: tuple[str, ...]
    rows: tuple[tuple[str, ...], ...]


def _g(x: float | None, scale: float = 1.0) -> str:
    return "–" if x is None else f"{x * scale:.4g}"


def _span(r: tuple[float, float] | None) -> str:
    return "–" if r is None else f"{r[0]:.4g} to {r[1]:.4g}"


def _ground(case: Case) -> list[InputTable]:
    mats = InputTable(
        "Materials", ("material", "horizontal conductivity [m/d]",
                      "vertical conductivity [m/d]", "porosity [-]", "bulk density [kg/m³]",
                      "longitudinal dispersivity [m]", "transverse dispersivity [m]"),
        tuple((n, _g(m.horizontal_conductivity, _DAY),
               _g(m.vertical_conductivity or m.horizontal_conductivity, _DAY),
               _g(m.porosity), _g(m.bulk_density), _g(m.longitudinal_dispersivity),
               _g(m.transverse_dispersivity)) for n, m in case.materials.items()))
    layers = InputTable(
        "Layers, from the top down", ("layer", "material", "bottom elevation [m]"),
        tuple((lay.name, lay.material, "from the borehole picks" if lay.bottom is None
               else _g(lay.bottom)) for lay in case.layers))
    return [mats, layers]


def _flow(case: Case) -> list[InputTable]:
    heads = InputTable(
        "Fixed heads", ("face", "head [m]"),
        tuple((f.face, "varies (gradient or table)" if f.head is None else _g(f.head))
              for f in case.fixed_heads))
    wells = InputTable(
        "Wells", ("well", "kind", "x [m]", "y [m]", "screens, top to bottom [m]",
                  "rate [m³/d]"),
        tuple((w.name, w.kind, _g(w.x), _g(w.y), "; ".join(_span(s) for s in w.screens),
               _g(w.rate, _DAY)) for w in case.wells))
    recharge = InputTable(
        "Recharge", ("zone", "rate [mm/yr]"),
        tuple((r.name, _g(from_si(r.rate, "mm/yr"))) for r in case.recharge))
    return [t for t in (heads, wells, recharge) if t.rows]


def _transport(case: Case) -> list[InputTable]:
    tu, cu = case.output.time_unit, case.output.concentration_unit
    ct = from_si(1.0, cu)
    species = InputTable(
        "Species", ("species", f"limit [{cu}]", "Kd [L/kg]", f"half-life [{tu}]",
                    "parent (yield)", f"initial concentration [{cu}]"),
        tuple((n, _g(s.limit, ct), "varies by material" if isinstance(s.kd, dict)
               else _g(s.kd, 1000.0),
               "none" if s.half_life is None else _g(from_si(s.half_life, tu)),
               "–" if s.parent is None else f"{s.parent} ({s.yield_from_parent:g})",
               _g(s.initial_concentration, ct)) for n, s in case.species.items()))
    sources = InputTable(
        "Sources", ("source", "species", "kind", "strength", f"start [{tu}]",
                    f"stop [{tu}]"),
        tuple((s.name, s.species, s.kind.replace("_", " "), _strength(s, cu),
               _g(from_si(s.start, tu)),
               "end of run" if s.stop is None else _g(from_si(s.stop, tu)))
              for s in case.sources))
    points = InputTable(
        "Observation points", ("point", "kind", "x [m]", "y [m]", "z or screen [m]"),
        tuple((o.name, o.kind, _g(o.x), _g(o.y),
               _g(o.z) if o.screen is None else _span(o.screen))
              for o in case.observation_points))
    return [t for t in (species, sources, points) if t.rows]


def _strength(s: object, cu: str) -> str:
    from fe3d.case.schema import Source

    assert isinstance(s, Source)
    if s.release_file is not None:
        return f"release history from {s.release_file}"
    if s.concentration_file is not None:
        return f"measured points from {s.concentration_file}"
    if s.mass_rate is not None:
        return f"{s.mass_rate * 1000.0 * _DAY:.4g} g/d"
    return f"{from_si(s.concentration or 0.0, cu):.4g} {cu}"


def _control(case: Case) -> InputTable:
    tu, t, m = case.output.time_unit, case.time, case.mesh
    rows = [("simulated period", f"{from_si(t.end, tu):.4g} {tu}"),
            ("time step", "follows the plume (Courant number "
             f"{t.courant:g})" if t.step is None else f"{from_si(t.step, tu):.4g} {tu}"),
            ("time scheme", t.scheme.replace("_", " ")),
            ("plan cell size", f"{m.cell_size:.4g} m"
             + ("" if m.fine_cell_size is None else f", {m.fine_cell_size:.4g} m near "
                "sources and wells")),
            ("layer cell thickness", f"{m.layer_cell_thickness:.4g} m"),
            ("transport scheme", "bounded (low-order step corrected within local bounds)"
             if case.solver.monotone else "stabilised Galerkin (SUPG)")]
    return InputTable("Time and mesh", ("input", "value"), tuple(rows))


def input_tables(case: Case) -> tuple[InputTable, ...]:
    """The case's main inputs as tables in display units (module docstring)."""
    return (*_ground(case), *_flow(case), *_transport(case), _control(case))


def write_inputs(folder: Path, case: Case) -> Path:
    """``inputs.json`` in ``folder``: the title, site, display units and
    :func:`input_tables` of ``case``; ``parents`` (daughter → parent) and
    ``species_with_sources`` (species that have a source of their own)."""
    data = {"title": case.title, "site": case.site,
            "time_unit": case.output.time_unit,
            "concentration_unit": case.output.concentration_unit,
            "tables": [asdict(t) for t in input_tables(case)],
            # what the mass budget needs: a daughter's parent, the species with own sources
            "parents": {n: s.parent for n, s in case.species.items() if s.parent is not None},
            "species_with_sources": sorted({s.species for s in case.sources})}
    path = Path(folder) / INPUTS_FILE
    write_text_atomic(path, json.dumps(data, indent=2, ensure_ascii=False) + "\n")
    return path
