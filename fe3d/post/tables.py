"""CSV tables with units in the header (histories, mass budget, flow budget, plume measures,
receptors)."""

from __future__ import annotations

import csv
import io
import math
from pathlib import Path

from fe3d._typing import FloatArray
from fe3d.flow.solve import FlowField
from fe3d.post.files import write_text_atomic
from fe3d.post.plume import PlumeMeasures
from fe3d.post.receptors import ReceptorRow
from fe3d.transport.budget import MassBudget
from fe3d.units import from_si

__all__ = ["append_histories", "csv_text", "history_rows", "write_flow_budget",
           "write_histories", "write_mass_budget", "write_plume_table", "write_receptor_table"]


def csv_text(header: list[str], rows: list[list[object]]) -> str:
    """CSV text of a header and rows (newline line ends)."""
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(header)
    w.writerows(rows)
    return buf.getvalue()


def _g(x: float) -> str:
    return f"{x:.8g}"


def write_histories(path: Path, times: FloatArray, history: dict[str, FloatArray],
                    names: list[str], *, time_unit: str, conc_unit: str) -> Path:
    """One row per time step; one column per observation point and species."""
    header = [f"time [{time_unit}]"] + [f"{o} {sp} [{conc_unit}]" for sp in history
                                        for o in names]
    rows = history_rows(times, history, len(names), time_unit=time_unit, conc_unit=conc_unit)
    write_text_atomic(path, csv_text(header, rows))
    return path


def append_histories(path: Path, times: FloatArray, history: dict[str, FloatArray],
                     n_points: int, *, start: int, time_unit: str, conc_unit: str) -> None:
    """Append the rows from step ``start`` on to a ``histories.csv`` that
    :func:`write_histories` began (the same columns and number format)."""
    _append_rows(path, history_rows(times, history, n_points, time_unit=time_unit,
                                    conc_unit=conc_unit, start=start))


def _append_rows(path: Path, rows: list[list[object]]) -> None:
    """Append CSV ``rows`` to the end of ``path`` (one write, then flushed)."""
    text = csv_text([], rows)
    with path.open("a", encoding="utf-8") as fh:
        fh.write(text[text.index("\n") + 1:])  # csv_text's empty header line dropped
        fh.flush()


def history_rows(times: FloatArray, history: dict[str, FloatArray], n_points: int, *,
                 time_unit: str, conc_unit: str, start: int = 0) -> list[list[object]]:
    """The rows of ``histories.csv`` from step ``start`` on, in display units."""
    scale = from_si(1.0, conc_unit)
    return [[_g(from_si(t, time_unit))] + [_g(history[sp][i, j] * scale) for sp in history
                                           for j in range(n_points)]
            for i, t in enumerate(times) if i >= start]


def write_mass_budget(path: Path, budgets: list[MassBudget], *, time_unit: str) -> Path:
    """Cumulative mass balance per species and output time [kg]."""
    faces = sorted({f for b in budgets for f in b.outflow})
    header = ["species", f"time [{time_unit}]", "dissolved [kg]", "sorbed [kg]",
              "stored [kg]", "initial [kg]", "source input [kg]", "produced from parent [kg]",
              *[f"outflow {f} [kg]" for f in faces], "decayed [kg]", "imbalance [kg]",
              "relative error [-]"]
    rows = [[b.species, _g(from_si(b.time, time_unit)), _g(b.dissolved), _g(b.sorbed),
             _g(b.stored), _g(b.initial), _g(b.source_input), _g(b.produced),
             *[_g(b.outflow.get(f, 0.0)) for f in faces], _g(b.decayed), _g(b.imbalance),
             f"{b.relative_error:.3e}"] for b in budgets]
    write_text_atomic(path, csv_text(header, rows))
    return path


def write_flow_budget(path: Path, flow: FlowField) -> Path:
    """Water budget per item (fixed-head face, flux face, recharge zone, stream or drain
    zone, well) [m³/d], totals, the relative discrepancy, and the head in each well [m]."""
    day = 86400.0
    rows: list[list[object]] = [[b.name, b.kind, _g(b.inflow * day), _g(b.outflow * day),
                                 _g(b.net * day)] for b in flow.budget]
    rows.append(["total", "", _g(flow.total_inflow * day), _g(flow.total_outflow * day),
                 _g((flow.total_inflow - flow.total_outflow) * day)])
    rows.append(["relative discrepancy [-]", "", f"{flow.discrepancy:.3e}", "", ""])
    for name, h in flow.well_heads.items():
        rows.append([f"head in well {name} [m]", "well", _g(h), "", ""])
    write_text_atomic(path, csv_text(["item", "kind", "inflow [m3/d]", "outflow [m3/d]",
                                  "net [m3/d]"], rows))
    return path


def _opt(x: float | None, scale: float = 1.0) -> str:
    return "" if x is None else _g(x * scale)


def write_plume_table(path: Path, rows: list[tuple[str, float, float, PlumeMeasures]], *,
                      time_unit: str, conc_unit: str) -> Path:
    """Per species and output time: the limit and the region above it, measured exactly on
    the P1 field (theory.md O1, O2). ``rows`` hold (species, time [s], limit [kg/m³],
    measures); a blank cell: nothing above the limit."""
    scale = from_si(1.0, conc_unit)
    out = []
    for sp, t, lim, m in rows:
        centroid = m.centroid or (None, None, None)
        across = m.across or (None, None)
        elevation = m.elevation or (None, None)
        out.append([sp, _g(from_si(t, time_unit)), _g(lim * scale), _g(m.volume),
                    _g(m.dissolved_mass), _g(m.sorbed_mass), _g(m.extent), _g(m.downstream),
                    _g(m.upstream), *(_opt(v) for v in across), *(_opt(v) for v in elevation),
                    *(_opt(v) for v in centroid)])
    header = ["species", f"time [{time_unit}]", f"limit [{conc_unit}]",
              "volume above limit [m3]", "dissolved mass above limit [kg]",
              "sorbed mass above limit [kg]", "farthest extent from source [m]",
              "downstream of source [m]", "upstream of source [m]",
              "across flow min [m]", "across flow max [m]", "lowest elevation [m]",
              "highest elevation [m]", "centroid x [m]", "centroid y [m]", "centroid z [m]"]
    write_text_atomic(path, csv_text(header, out))
    return path


def write_receptor_table(path: Path, rows: list[ReceptorRow], *, time_unit: str,
                         conc_unit: str, append: bool = False) -> Path:
    """Per receptor (well or boundary where water leaves), species and time: the water
    leaving [m³/d], its flux-averaged concentration, the mass flux [kg/d] and the mass
    carried out since the start [kg] (theory.md O3; blank where not taken). With
    ``append``, ``rows`` are added at the end of a table this function began (no header,
    nothing rewritten)."""
    scale, day = from_si(1.0, conc_unit), 86400.0
    out = [[r.receptor, r.kind, r.species, _g(from_si(r.time, time_unit)),
            _g(r.water_rate * day), _g(r.concentration * scale), _g(r.mass_flux * day),
            "" if math.isnan(r.mass_out) else _g(r.mass_out)] for r in rows]
    header = ["receptor", "kind", "species", f"time [{time_unit}]", "water out [m3/d]",
              f"flux-averaged concentration [{conc_unit}]", "mass flux [kg/d]",
              "mass out since start [kg]"]
    if append:
        _append_rows(path, out)
    else:
        write_text_atomic(path, csv_text(header, out))
    return path
