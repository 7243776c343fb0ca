"""Hydraulic conductivity per cell: anisotropic units, dipping bedding, file fields."""

from __future__ import annotations

import csv
import math
import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from fe3d._typing import FloatArray, IndexArray
from fe3d.case.schema import Material
from fe3d.errors import CaseError
from fe3d.mesh.fields import read_vtk_cell_field
from fe3d.units import to_si

__all__ = ["CellConductivity", "bedding_normal", "cell_conductivity", "conductivity_tensors",
           "read_point_field", "tensor_entries", "unit_normals"]


def bedding_normal(strike: float, dip: float) -> FloatArray:
    """Unit normal (x east, y north, z up) of bedding with the given strike and dip [rad].

    Strike is the azimuth of the strike line, clockwise from north; the beds dip by ``dip``
    towards the azimuth strike + 90° (right-hand rule). Horizontal bedding gives (0, 0, 1).
    """
    az = strike + 0.5 * math.pi
    return np.array([math.sin(dip) * math.sin(az), math.sin(dip) * math.cos(az),
                     math.cos(dip)])


def read_point_field(path: Path, key: str) -> tuple[FloatArray, FloatArray]:
    """Read a CSV of points and conductivities with units in the header.

    The header must be ``x [m], y [m], z [m], conductivity [m/d]`` (any length and velocity
    units). Returns points [m] ``(k, 3)`` and conductivity [m/s] ``(k,)``.
    """
    try:
        with path.open(newline="", encoding="utf-8") as fh:
            rows = list(csv.reader(fh))
    except OSError as exc:
        raise CaseError(key, str(path), f"cannot be read ({exc.strerror})") from None
    except UnicodeDecodeError as exc:  # binary content: say where, never echo it
        raise CaseError(key, str(path), f"must be UTF-8 text (byte {exc.start} is not)") \
            from None
    except csv.Error as exc:  # e.g. a NUL byte in a line
        raise CaseError(key, str(path), f"is not a readable CSV file ({exc})") from None
    if len(rows) < 2 or len(rows[0]) != 4:
        raise CaseError(key, str(path), "must be a CSV with header 'x [m], y [m], z [m], "
                        "conductivity [m/d]' and at least one row")
    units = []
    for i, (col, dim) in enumerate(zip(rows[0], ("length",) * 3 + ("velocity",), strict=True)):
        m = re.search(r"\[(.+)\]", col)
        if m is None:
            raise CaseError(key, str(path), f"column {i + 1} header {col.strip()!r} needs its "
                            "unit in brackets, e.g. 'x [m]' or 'conductivity [m/d]'")
        try:
            units.append(to_si(f"1 {m.group(1).strip()}", dim))
        except ValueError as exc:
            raise CaseError(key, str(path), f"column {i + 1} unit: {exc}") from None
    try:
        data = np.array([[float(v) for v in r] for r in rows[1:] if r], dtype=float)
    except ValueError:
        raise CaseError(key, str(path), "every data row must hold four numbers") from None
    data = data * np.array(units)
    if np.any(data[:, 3] <= 0) or not np.all(np.isfinite(data)):
        raise CaseError(key, str(path), "conductivities must be finite and greater than zero")
    return data[:, :3], data[:, 3]


def _interpolate_log(points: FloatArray, values: FloatArray, at: FloatArray) -> FloatArray:
    """Linear interpolation of log K inside the points' hull, nearest neighbour outside."""
    from scipy.interpolate import LinearNDInterpolator, NearestNDInterpolator

    logk = np.log(values)
    nearest = NearestNDInterpolator(points, logk)
    if points.shape[0] >= 5:
        try:
            lin = LinearNDInterpolator(points, logk)(at)
        except Exception:  # coplanar points: Qhull cannot build a 3D triangulation
            lin = np.full(at.shape[0], np.nan)
    else:
        lin = np.full(at.shape[0], np.nan)
    out = np.where(np.isnan(lin), nearest(at), lin)
    return np.exp(out)


def unit_normals(unit_materials: list[Material]) -> FloatArray:
    """Bedding normal of every unit's material, shape ``(3, n_units)``."""
    return np.array([bedding_normal(m.conductivity_strike, m.conductivity_dip)
                     for m in unit_materials]).T


def tensor_entries(kh: FloatArray, kv: FloatArray, normals: FloatArray) -> FloatArray:
    """K = K_h I + (K_v − K_h) n nᵀ [m/s] of each cell (theory.md F1), shape ``(3, 3, k)``,
    from K_h and K_v ``(k,)`` [m/s] and the unit normals ``(3, k)``: entry by entry, with no
    temporaries of the result's size. The same numbers for a cell whichever cells are
    formed with it, so that a caller can form them a chunk at a time."""
    tensors = np.empty((3, 3, kh.size))
    step = kv - kh
    for i in range(3):
        scaled = step * normals[i]
        for j in range(3):
            np.multiply(scaled, normals[j], out=tensors[i, j])
        tensors[i, i] += kh
    return tensors


@dataclass(frozen=True)
class CellConductivity:
    """Hydraulic conductivity of every cell, K_e = K_h,e S_u(e) (theory.md F1), held as a
    value per cell and a shape tensor per unit instead of a (3, 3, n_cells) array.

    With r_u = K_v/K_h of unit u and n_u its bedding normal, S_u = I + (r_u − 1) n_u n_uᵀ,
    so that K_h S_u = K_h I + (K_v − K_h) n nᵀ, the tensor of F1 (a conductivity file
    changes K_h per cell and keeps the unit's ratio).

    Attributes
    ----------
    horizontal
        K_h of each cell [m/s], shape ``(n_cells,)``.
    cell_unit
        Unit index of each cell, shape ``(n_cells,)``.
    ratio
        K_v/K_h of each unit [-], shape ``(n_units,)``.
    normals
        Bedding normal of each unit, shape ``(3, n_units)``.
    """

    horizontal: FloatArray
    cell_unit: IndexArray
    ratio: FloatArray
    normals: FloatArray

    @property
    def vertical(self) -> FloatArray:
        """K_v of each cell [m/s], shape ``(n_cells,)``."""
        return self.ratio[self.cell_unit] * self.horizontal

    @property
    def principal(self) -> FloatArray:
        """(K_h, K_h, K_v) of each cell [m/s], shape ``(3, n_cells)``."""
        return np.vstack([self.horizontal, self.horizontal, self.vertical])

    @property
    def unit_shape(self) -> FloatArray:
        """S_u of each unit [-], shape ``(3, 3, n_units)``."""
        return tensor_entries(np.ones(self.ratio.size), self.ratio, self.normals)


def cell_conductivity(
    points: FloatArray, cells: IndexArray, cell_unit: IndexArray, unit_materials: list[Material],
    *, unit_keys: list[str], base_dir: Path | None = None,
) -> CellConductivity:
    """Conductivity of every cell from the units' materials (theory.md F1).

    Where a unit's material names a ``conductivity_file``, K_h of each cell comes from it
    and K_v keeps the material's K_v/K_h ratio: a CSV of points is interpolated in log K at
    the cell centre; a .vtu/.vtk file gives a cell array ``conductivity [unit]`` whose
    nearest cell centre is taken (exact when the file holds this mesh, e.g. a field written
    on ``mesh.vtu``).
    """
    # per-unit values gathered by the cells' unit index (no mask per unit over every cell)
    kh = np.array([m.horizontal_conductivity for m in unit_materials])[cell_unit]
    ratio = np.array([m.k_vertical / m.horizontal_conductivity for m in unit_materials])
    centres = None
    for u, mat in enumerate(unit_materials):
        if mat.conductivity_file is None:
            continue
        sel = cell_unit == u
        if not np.any(sel):
            continue
        if centres is None:
            centres = points[:, cells].mean(axis=1).T
        path = Path(mat.conductivity_file)
        if not path.is_absolute() and base_dir is not None:
            path = base_dir / path
        key = f"{unit_keys[u]}.conductivity_file"
        if path.suffix.lower() in (".vtu", ".vtk"):
            pts, unit, raw = read_vtk_cell_field(path, key, prefix="conductivity")
            try:
                vals = raw * to_si(f"1 {unit}", "velocity")
            except ValueError as exc:
                raise CaseError(key, str(path), f"cell array unit: {exc}") from None
            if np.any(vals <= 0) or not np.all(np.isfinite(vals)):
                raise CaseError(key, str(path), "conductivities must be finite and > 0")
            # cell centres of the same mesh coincide: take the nearest centre's value
            from scipy.spatial import cKDTree

            _, nearest = cKDTree(pts).query(centres[sel])
            kh[sel] = vals[nearest]
        else:
            pts, vals = read_point_field(path, key)
            kh[sel] = _interpolate_log(pts, vals, centres[sel])
    return CellConductivity(horizontal=kh, cell_unit=np.asarray(cell_unit), ratio=ratio,
                            normals=unit_normals(unit_materials))


def conductivity_tensors(
    points: FloatArray, cells: IndexArray, cell_unit: IndexArray, unit_materials: list[Material],
    *, unit_keys: list[str], base_dir: Path | None = None,
) -> tuple[FloatArray, FloatArray]:
    """Full conductivity tensor of every cell [m/s], shape ``(3, 3, n_cells)``, formed whole
    from :func:`cell_conductivity` (for scripts and tests; the flow stage never forms it).

    Returns
    -------
    tensors, principal
        The tensors and (K_h, K_h, K_v) per cell, shape ``(3, n_cells)``.
    """
    k = cell_conductivity(points, cells, cell_unit, unit_materials, unit_keys=unit_keys,
                          base_dir=base_dir)
    tensors = tensor_entries(k.horizontal, k.vertical, k.normals[:, k.cell_unit])
    return tensors, k.principal
