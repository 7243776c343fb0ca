"""The SiteMesh record: geometry and tags only, never a physical coefficient."""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property
from typing import Any

import numpy as np

from fe3d._typing import FloatArray, IndexArray
from fe3d.mesh.geometry import lump_to_nodes
from fe3d.mesh.prisms import signed_volumes
from fe3d.mesh.report import MeshReport
from fe3d.p1 import CsrPattern, index_type

__all__ = ["SiteMesh"]


@dataclass(frozen=True)
class SiteMesh:
    """A conforming tetrahedral mesh of the site with layer and face tags.

    Attributes
    ----------
    points
        Node coordinates [m], shape ``(3, n_nodes)``.
    cells
        Tetrahedra (node ids), shape ``(4, n_cells)``, positively oriented; C-ordered int32
        (int64 from 2³¹ nodes on), whatever integer type they were given in.
    cell_layer
        Index into ``layer_names`` of each cell, shape ``(n_cells,)``.
    layer_names
        Hydrostratigraphic unit names, top down.
    faces
        Boundary face name → node-id triples of its triangles, shape ``(3, n_facets)``.
    report
        What the mesher reports: quality, sublayers, surface rules, lens fits, plan layout
        (:class:`~fe3d.mesh.report.MeshReport`). Every mesh from
        :func:`~fe3d.mesh.build.build_mesh`, the mesh cache or a mesh file has one; ``None``
        only for a mesh a script assembles from bare arrays.
    """

    points: FloatArray
    cells: IndexArray
    cell_layer: IndexArray
    layer_names: tuple[str, ...]
    faces: dict[str, IndexArray]
    report: MeshReport | None = None

    def __post_init__(self) -> None:
        # the compiled kernels read C-ordered float64 points and int32 or int64 cells; held
        # in any other layout (the mesher's points were a transposed view) every kernel call
        # made a copy: at 1 M nodes 12 of the 38 s of meshing and solving the flow went to
        # copying the points for each pathline point the plume corridor located. Cells are
        # int32 below 2³¹ nodes: 16 bytes per cell instead of 32, about 93 bytes per node
        points = np.ascontiguousarray(self.points, dtype=float)
        cells = np.ascontiguousarray(self.cells, dtype=index_type(points.shape[1]))
        object.__setattr__(self, "points", points)
        object.__setattr__(self, "cells", cells)

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

    @cached_property
    def _volumes(self) -> FloatArray:
        vol = signed_volumes(self.points, self.cells)  # compiled: one pass over the cells
        vol.flags.writeable = False
        return vol

    def cell_volumes(self) -> FloatArray:
        """Signed volume of every tetrahedron [m³], shape ``(n_cells,)``: computed once on
        first use and shared (read-only; copy before changing it). Positive on a valid mesh
        (:func:`~fe3d.mesh.build.check_volumes` refuses any other)."""
        return self._volumes

    def lumped(self, per_cell: FloatArray) -> FloatArray:
        """Nodal lumping Σ over the cells at each node of value · |V| / 4
        (:func:`~fe3d.mesh.geometry.lump_to_nodes` with the cached volumes).

        ``per_cell`` has shape ``(n_cells,)`` or ``(k, n_cells)``; the result has shape
        ``(n_nodes,)`` or ``(k, n_nodes)``. ``site.lumped(np.ones(n_cells))`` is the volume
        each node stands for [m³]; ``site.lumped(porosity)`` its pore volume.
        """
        return lump_to_nodes(self.cells, self._volumes, per_cell, self.n_nodes)

    def face_nodes(self, name: str) -> IndexArray:
        """Sorted unique node ids on a named boundary face."""
        return np.unique(self.faces[name])

    def skfem_mesh(self) -> Any:
        """The scikit-fem ``MeshTet`` with named subdomains (layers) and boundaries (faces)."""
        from skfem import MeshTet

        # int64 node ids, as scikit-fem makes its own meshes (a copy: this is for checks)
        mesh = MeshTet(self.points, self.cells.astype(np.int64))
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
