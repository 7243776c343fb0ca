"""Reading back the concentration series a run wrote (``results.vtkhdf``, or with
``output.vtu_series`` concentration.pvd and its .vtu files), for studies that combine the
fields of several runs on one mesh."""

from __future__ import annotations

import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np

from fe3d._typing import FloatArray
from fe3d.post.series import SERIES_FILE, read_series, read_static
from fe3d.units import from_si

__all__ = ["read_concentration_series", "read_largest_over_run"]


def read_concentration_series(folder: Path, species: list[str], *, time_unit: str,
                              conc_unit: str) -> tuple[FloatArray, dict[str, FloatArray]]:
    """Output times [s] ``(n_times,)`` and nodal concentrations [kg/m³] ``(n_times,
    n_nodes)`` per species, from the series fe3d.post.outputs.SeriesWriter wrote in
    ``folder`` (display units ``time_unit`` and ``conc_unit`` as written there)."""
    t_scale, c_scale = from_si(1.0, time_unit), from_si(1.0, conc_unit)
    series = folder / SERIES_FILE
    if series.is_file():  # the default: one VTKHDF file
        names = [f"{sp} [{conc_unit}]" for sp in species]
        times, values = read_series(series, names)
        return times / t_scale, {sp: values[f"{sp} [{conc_unit}]"] / c_scale for sp in species}
    import meshio

    root = ET.parse(folder / "concentration.pvd").getroot()
    entries = [(float(d.attrib["timestep"]), d.attrib["file"]) for d in root.iter("DataSet")]
    fields: dict[str, list[FloatArray]] = {sp: [] for sp in species}
    for _t, name in entries:
        data = meshio.read(folder / name).point_data
        for sp in species:
            fields[sp].append(np.asarray(data[f"{sp} [{conc_unit}]"], dtype=float) / c_scale)
    times = np.array([t for t, _ in entries]) / t_scale
    return times, {sp: np.stack(v) for sp, v in fields.items()}


def read_largest_over_run(folder: Path, species: list[str], *, conc_unit: str,
                          ) -> dict[str, FloatArray]:
    """Each species' largest concentration over every time step at every node [kg/m³]
    ``(n_nodes,)`` (theory.md O4), from the series file of ``folder`` (written there in the
    display unit ``conc_unit``)."""
    names = [f"{sp} largest [{conc_unit}]" for sp in species]
    values = read_static(folder / SERIES_FILE, names)
    c_scale = from_si(1.0, conc_unit)
    return {sp: values[name] / c_scale for sp, name in zip(species, names, strict=True)}
