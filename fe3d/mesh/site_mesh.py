"""The SiteMesh record: geometry and tags only, never a physical coefficient."""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property
from typing import Any

import numpy as np

from fe3d._typing import FloatArray, IndexArray
from fe3d.p1 import CsrPattern

__all__ = ["SiteMesh"]


@dataclass(frozen=True)
class SiteMesh:
    """A conforming tetrahedral mesh of the site with layer and face tags.

    Attributes
    ----------
    points
        Node coordinates [m], shape ``(3, n_nodes)``.
    cells
        Tetrahedra (node ids), shape ``(4, n_cells)``, positively oriented.
    cell_layer
        Index into ``layer_names`` of each cell, shape ``(n_cells,)``.
    layer_names
        Hydrostratigraphic unit names, top down.
    faces
        Boundary face name → node-id triples of its triangles, shape ``(3, n_facets)``.
    info
        Mesher details (plan mesh, sublayers, pinch-out and lens reports, well nodes).
    """

    points: FloatArray
    cells: IndexArray
    cell_layer: IndexArray
    layer_names: tuple[str, ...]
    faces: dict[str, IndexArray]
    info: dict[str, Any] = field(default_factory=dict)

    @property
    def n_nodes(self) -> int:
        """Number of nodes."""
        return int(self.points.shape[1])

    @property
    def n_cells(self) -> int:
        """Number of tetrahedra."""
        return int(self.cells.shape[1])

    @cached_property
    def pattern(self) -> CsrPattern:
        """CSR pattern of the P1 operators on this mesh (with each cell's entry positions),
        built once and shared by every operator of the flow and transport stages."""
        return CsrPattern.of_cells(self.cells, self.n_nodes)

    def cell_volumes(self) -> FloatArray:
        """Signed volume of every tetrahedron [m³], shape ``(n_cells,)``."""
        p = self.points
        a, b, c, d = (p[:, self.cells[i]] for i in range(4))
        return np.einsum("ij,ij->j", b - a, np.cross(c - a, d - a, axis=0)) / 6.0

    def face_nodes(self, name: str) -> IndexArray:
        """Sorted unique node ids on a named boundary face."""
        return np.unique(self.faces[name])

    def skfem_mesh(self) -> Any:
        """The scikit-fem ``MeshTet`` with named subdomains (layers) and boundaries (faces)."""
        from skfem import MeshTet

        mesh = MeshTet(np.ascontiguousarray(self.points), np.ascontiguousarray(self.cells))
        subdomains = {name: np.nonzero(self.cell_layer == i)[0]
                      for i, name in enumerate(self.layer_names)}
        boundaries = {name: _facet_ids(mesh, tri) for name, tri in self.faces.items()}
        return mesh.with_subdomains(subdomains).with_boundaries(boundaries)


def _facet_ids(mesh: Any, tri: IndexArray) -> IndexArray:
    """skfem facet indices of the given node triples, shape ``(3, k)`` → ``(k,)``."""
    n = np.int64(mesh.p.shape[1])

    def keys(a: IndexArray) -> IndexArray:
        s = np.sort(a, axis=0).astype(np.int64)
        return (s[0] * n + s[1]) * n + s[2]

    facet_keys = keys(mesh.facets)
    order = np.argsort(facet_keys)
    wanted = keys(tri)
    pos = np.searchsorted(facet_keys, wanted, sorter=order)
    found = order[np.minimum(pos, order.size - 1)]
    if not np.array_equal(facet_keys[found], wanted):
        msg = "a tagged boundary triangle is not a facet of the mesh"
        raise ValueError(msg)
    return found.astype(np.int64)
