"""Read cell fields given on another (or the same) tetrahedral mesh from VTK files."""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np

from fe3d._typing import FloatArray
from fe3d.errors import CaseError

__all__ = ["read_vtk_cell_field"]


def read_vtk_cell_field(
    path: Path, key: str, *, prefix: str,
) -> tuple[FloatArray, str, FloatArray]:
    """Cell centres [m] ``(k, 3)``, the unit text and the values of the first cell array whose
    name starts with ``prefix`` and carries its unit in brackets, e.g. ``conductivity [m/d]``.
    """
    import meshio

    try:
        m = meshio.read(path)
    except (Exception, SystemExit) as exc:  # meshio raises many types; some readers exit
        raise CaseError(key, str(path), f"cannot be read as a mesh ({type(exc).__name__})") \
            from None
    for name, blocks in m.cell_data.items():
        unit = re.fullmatch(rf"{re.escape(prefix)}\s*\[(.+)\]", name.strip())
        if unit is None:
            continue
        centres, values = [], []
        for block, data in zip(m.cells, blocks, strict=True):
            centres.append(m.points[block.data].mean(axis=1))
            values.append(np.asarray(data, dtype=float).reshape(len(block.data), -1)[:, 0])
        return np.vstack(centres), unit.group(1).strip(), np.concatenate(values)
    raise CaseError(key, str(path), f"needs a cell array named '{prefix} [unit]', e.g. "
                    f"'{prefix} [m/d]'")
