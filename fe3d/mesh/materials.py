"""Material of every unit of a mesh and material values per cell: the one place where the
case's layers and lenses are matched with the mesh's units."""

from __future__ import annotations

from collections.abc import Sequence
from typing import TYPE_CHECKING

import numpy as np

from fe3d._typing import FloatArray
from fe3d.errors import CaseError
from fe3d.mesh.site_mesh import SiteMesh

if TYPE_CHECKING:
    from fe3d.case.parts import Ground
    from fe3d.case.schema import Material

__all__ = ["cell_values", "unit_materials", "unit_values"]


def unit_materials(ground: Ground, site: SiteMesh) -> tuple[list[Material], list[str]]:
    """Material of every unit of the mesh, in ``site.layer_names`` order, and its name.

    Raises
    ------
    CaseError
        When a unit of the mesh names no layer or lens of the case, or its material is not
        defined.
    """
    mats, keys = [], []
    for name in site.layer_names:
        mat = ground.unit_material.get(name)
        if mat is None or mat not in ground.materials:
            raise CaseError(f"layers[{name}].material", mat, "must name a defined material")
        mats.append(ground.materials[mat])
        keys.append(mat)
    return mats, keys


def unit_values(materials: Sequence[Material], attribute: str) -> FloatArray:
    """``attribute`` (a field or property of :class:`~fe3d.case.schema.Material`, e.g.
    ``"porosity"``, ``"bulk_density"``, ``"k_vertical"``) of each unit's material, shape
    ``(n_units,)`` (``materials`` from :func:`unit_materials`)."""
    return np.array([float(getattr(m, attribute)) for m in materials])


def cell_values(materials: Sequence[Material], site: SiteMesh, attribute: str) -> FloatArray:
    """A material value per cell, shape ``(n_cells,)``: :func:`unit_values` of each cell's
    unit."""
    return unit_values(materials, attribute)[site.cell_layer]
