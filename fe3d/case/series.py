"""Release time series: a CSV of time and source strength, read into the case in SI units.

The header names the two columns with their units in brackets, ``time [d]`` then either
``concentration [mg/L]`` (fixed_concentration and inflow_concentration sources) or
``mass_rate [g/d]`` (mass_loading sources). Rows follow in increasing time; lines starting
with ``#`` are comments. Between rows the strength is linear in time, beyond the first and
last rows it is constant (theory.md T3c).
"""

from __future__ import annotations

import re
from pathlib import Path

from fe3d.case.data_files import shown_cell
from fe3d.case.geology import _rows
from fe3d.errors import CaseError
from fe3d.units import to_si

__all__ = ["read_concentration_points", "read_release_file"]

_HEADER = re.compile(r"^\s*([A-Za-z_]+)\s*\[([^\]]+)\]\s*$")
_QUANTITY_OF_KIND = {"fixed_concentration": "concentration",
                     "inflow_concentration": "concentration", "mass_loading": "mass_rate"}


def _shown(cells: list[str]) -> str:
    """Cells of one line as an error shows them (plain words and numbers only)."""
    return ",".join(shown_cell(c) for c in cells)


def _column(cell: str, key: str, path: Path) -> tuple[str, str]:
    m = _HEADER.match(cell)
    if m is None:
        raise CaseError(key, f"{path.name}: header {shown_cell(cell)}",
                        "each header cell must be a name and a unit in brackets, e.g. "
                        "'time [d]', 'concentration [mg/L]' or 'mass_rate [g/d]'")
    return m.group(1).lower(), m.group(2).strip()


def read_release_file(path: Path, *, kind: str, key: str) -> list[tuple[float, float]]:
    """Rows (time [s], value [kg/m³ or kg/s]) of a release CSV for a source of ``kind``."""
    header, rows, nums = _rows(path, key)
    wanted = _QUANTITY_OF_KIND.get(kind)
    if wanted is None:
        raise CaseError(key, path.name, "only fixed_concentration, inflow_concentration and "
                                        "mass_loading sources take a release file")
    if len(header) != 2:
        raise CaseError(key, f"{path.name}: {len(header)} header columns",
                        f"needs two columns: 'time [unit]' and '{wanted} [unit]'")
    (tname, tunit), (vname, vunit) = (_column(c, key, path) for c in header)
    if tname != "time" or vname != wanted:
        raise CaseError(key, f"{path.name}: header {_shown(header)}",
                        f"a {kind} source needs the columns 'time [unit]' and "
                        f"'{wanted} [unit]'")
    out: list[tuple[float, float]] = []
    for k, r in zip(nums[1:], rows, strict=True):
        where = f"{key}[line {k}]"
        if len(r) != 2:
            raise CaseError(where, f"{len(r)} columns", f"needs a time and a {wanted} "
                            f"({path.name})")
        try:
            t = to_si(f"{r[0]} {tunit}", "time")
            v = to_si(f"{r[1]} {vunit}", wanted)
        except ValueError as exc:
            raise CaseError(where, _shown(r), f"{exc} ({path.name})") from None
        if v < 0.0:
            raise CaseError(where, shown_cell(r[1]), f"a {wanted} must be ≥ 0 ({path.name})")
        if out and t <= out[-1][0]:
            raise CaseError(where, shown_cell(r[0]),
                            f"times must increase from row to row ({path.name})")
        out.append((t, v))
    if not out:
        raise CaseError(key, path.name, "holds no rows below the header")
    return out


def read_concentration_points(path: Path, *, key: str) -> list[tuple[float, float, float, float]]:
    """Rows (x, y, z [m], concentration [kg/m³]) of an initial-plume CSV with the header
    ``x [m], y [m], z [m], concentration [mg/L]`` (any length and concentration units)."""
    header, rows, nums = _rows(path, key)
    if len(header) != 4:
        raise CaseError(key, f"{path.name}: {len(header)} header columns",
                        "needs four columns: 'x [m], y [m], z [m], concentration [mg/L]'")
    cols = [_column(c, key, path) for c in header]
    if [name for name, _ in cols] != ["x", "y", "z", "concentration"]:
        raise CaseError(key, f"{path.name}: header {_shown(header)}",
                        "needs the columns 'x [unit], y [unit], z [unit], concentration [unit]'")
    dims = ("length", "length", "length", "concentration")
    out: list[tuple[float, float, float, float]] = []
    for k, r in zip(nums[1:], rows, strict=True):
        where = f"{key}[line {k}]"
        if len(r) != 4:
            raise CaseError(where, f"{len(r)} columns",
                            f"needs x, y, z and a concentration ({path.name})")
        try:
            vals = [to_si(f"{v} {u}", d) for v, (_, u), d in zip(r, cols, dims, strict=True)]
        except ValueError as exc:
            raise CaseError(where, _shown(r), f"{exc} ({path.name})") from None
        if vals[3] < 0.0:
            raise CaseError(where, shown_cell(r[3]), f"a concentration must be ≥ 0 ({path.name})")
        out.append((vals[0], vals[1], vals[2], vals[3]))
    if len(out) < 4:
        raise CaseError(key, path.name, "needs at least four points (not in one plane) to "
                                        "interpolate between")
    return out
