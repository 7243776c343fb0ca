"""The region where a P1 field exceeds a level, exactly: whole cells and pieces of cut cells.

A P1 field is linear in each tetrahedron, so the level cuts a tetrahedron along a plane and
the part above it is a convex polyhedron whose vertices are the tetrahedron's nodes above the
level and the points where the level crosses its edges (theory.md O1). With one node above,
the part is a corner tetrahedron; with two or three, a prism with planar faces, split here
into three tetrahedra. Every piece is therefore a tetrahedron with the level at its cut
vertices, and the volume, the integral of the field (times a weight constant per cell) and
the first moment over the region follow exactly from the pieces' vertices.

With t_ij = s_i / (s_i − s_j) ∈ (0, 1] the fraction of edge i→j from node i (above,
s = c − level > 0) to node j (not above) where the field meets the level, a piece's volume is
the cell's volume times a product of these fractions: t_ab t_ac t_ad (one node a above);
t_ac t_ad (1 − t_bd), t_ac t_bd (1 − t_bc), t_bc t_bd (a, b above); t_cd, (1 − t_cd) t_bd,
(1 − t_cd)(1 − t_bd) t_ad (a, b, c above). Each term is a product of numbers in [0, 1], free
of cancellation.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from functools import cached_property

import numpy as np

from fe3d._typing import BoolArray, FloatArray, IndexArray

__all__ = ["RegionAbove", "region_above"]

# A degree-2 rule on the tetrahedron, 4 points (Stroud 1971, "Approximate calculation of
# multiple integrals", rule T3:2-1): barycentric weights α at one vertex, β at the others.
_ALPHA = (5.0 + 3.0 * np.sqrt(5.0)) / 20.0
_BETA = (5.0 - np.sqrt(5.0)) / 20.0
_QUADRATURE = np.full((4, 4), _BETA) + np.eye(4) * (_ALPHA - _BETA)  # (point, vertex)


@dataclass(frozen=True)
class RegionAbove:
    """Where a P1 field exceeds a level.

    Attributes
    ----------
    points, cells, values, level
        The mesh's nodes [m] ``(3, n_nodes)`` and tetrahedra ``(4, n_cells)``, the nodal
        field ``(n_nodes,)`` and the level (held, not copied).
    whole
        Cells with every node above the level, shape ``(w,)``.
    whole_volume
        Their volumes [m³], shape ``(w,)``.
    piece_cell
        Cell each piece of a cut cell lies in, shape ``(k,)``.
    piece_points
        Vertices of the pieces [m], shape ``(3, 4, k)``.
    piece_values
        The field at the pieces' vertices (the level at cut points), shape ``(4, k)``.
    piece_volume
        Volume of each piece [m³], shape ``(k,)``.
    """

    points: FloatArray
    cells: IndexArray
    values: FloatArray
    level: float
    whole: IndexArray
    whole_volume: FloatArray
    piece_cell: IndexArray
    piece_points: FloatArray
    piece_values: FloatArray
    piece_volume: FloatArray

    @property
    def is_empty(self) -> bool:
        """Nothing exceeds the level."""
        return self.whole.size == 0 and self.piece_cell.size == 0

    @property
    def volume(self) -> float:
        """Volume of the region [m³]."""
        return float(self.whole_volume.sum() + self.piece_volume.sum())

    @property
    def whole_values(self) -> FloatArray:
        """The field at the nodes of the whole cells, shape ``(4, w)``."""
        return self.values[self.cells[:, self.whole]]

    @cached_property
    def _whole_mean(self) -> FloatArray:
        """Mean of the field over each whole cell, shape ``(w,)`` (computed once)."""
        return self.whole_values.mean(axis=0)

    def integral(self, weight_per_cell: FloatArray) -> float:
        """∫ w c dV over the region with ``w`` constant per cell, shape ``(n_cells,)``
        [units of w × c × m³]: exact (the mean of a linear field over a tetrahedron is the
        mean of its vertex values)."""
        return float((weight_per_cell[self.whole] * self.whole_volume * self._whole_mean).sum()
                     + (weight_per_cell[self.piece_cell] * self.piece_volume
                        * self.piece_values.mean(0)).sum())

    def integral_of_function(
            self, function: Callable[[FloatArray, IndexArray], FloatArray]) -> float:
        """∫ g(c, cell) dV over the region for a nonlinear ``function`` g, by the 4-point
        degree-2 rule on every part (Stroud 1971, T3:2-1): exact for g quadratic in c,
        otherwise with an error O(h² g'') per unit volume."""
        total = 0.0
        for cells, volume, values in ((self.whole, self.whole_volume, self.whole_values),
                                      (self.piece_cell, self.piece_volume, self.piece_values)):
            if cells.size:
                at_points = _QUADRATURE @ values  # (4 points, parts)
                g = function(at_points, np.broadcast_to(cells, at_points.shape))
                total += float((volume * g.mean(0)).sum())
        return total

    def first_moment(self) -> FloatArray:
        """∫ x dV over the region [m⁴], shape ``(3,)``."""
        # Σ_e V_e x̄_e = Σ_j x_j Σ_{e ∋ j} V_e/4 over the whole cells e
        weights = np.bincount(self.cells[:, self.whole].ravel(),
                              weights=np.tile(self.whole_volume / 4.0, 4),
                              minlength=self.values.size)
        whole = self.points @ weights
        return whole + (self.piece_points.mean(1) * self.piece_volume).sum(1)

    def vertices(self) -> FloatArray:
        """Every vertex of the region [m], shape ``(3, p)`` (with repeats): the nodes above
        the level and the pieces' vertices. The region's extreme points are among them, so
        extents taken over them are exact."""
        return np.concatenate([self.points[:, self.values > self.level],
                               self.piece_points.reshape(3, -1)], axis=1)


def region_above(points: FloatArray, cells: IndexArray, cell_volume: FloatArray,
                 values: FloatArray, level: float) -> RegionAbove:
    """The region where the P1 field ``values`` exceeds ``level``, exactly.

    Parameters
    ----------
    points, cells
        Nodes [m] ``(3, n_nodes)`` and tetrahedra ``(4, n_cells)``.
    cell_volume
        Volume of each tetrahedron [m³] ``(n_cells,)`` (its sign is ignored).
    values
        Nodal field ``(n_nodes,)``.
    level
        The level; a node exactly at it counts as not above (the region is open, its volume
        the same either way).
    """
    is_above = values > level
    n_above = is_above[cells].sum(axis=0, dtype=np.int8)
    whole = np.nonzero(n_above == 4)[0]
    cut = np.nonzero((n_above > 0) & (n_above < 4))[0]
    s = values[cells[:, cut]] - level
    parts = [_pieces(points, cells[:, cut], np.abs(cell_volume[cut]), s, n_above[cut] == k,
                     cut, k, level) for k in (1, 2, 3)]
    return RegionAbove(
        points=points, cells=cells, values=values, level=level, whole=whole,
        whole_volume=np.abs(cell_volume[whole]),
        piece_cell=np.concatenate([p[0] for p in parts]),
        piece_points=np.concatenate([p[1] for p in parts], axis=2),
        piece_values=np.concatenate([p[2] for p in parts], axis=1),
        piece_volume=np.concatenate([p[3] for p in parts]))


def _pieces(points: FloatArray, cut_cells: IndexArray, cut_volume: FloatArray, s: FloatArray,
            select: BoolArray, cut_ids: IndexArray, k: int, level: float,
            ) -> tuple[IndexArray, FloatArray, FloatArray, FloatArray]:
    """Tetrahedra covering the part above the level of the cut cells ``select`` picks, which
    have ``k`` nodes above it (``s`` = field − level at the cut cells' nodes ``(4, m)``):
    (parent cell, vertices ``(3, 4, p)``, values ``(4, p)``, volumes)."""
    ids = cut_ids[select]
    s_k = s[:, select]
    order = np.argsort(s_k <= 0.0, axis=0, kind="stable")  # nodes above first
    sv = np.take_along_axis(s_k, order, axis=0)
    x = points[:, np.take_along_axis(cut_cells[:, select], order, axis=0)]  # (3, 4, m)
    v = cut_volume[select]
    c = sv + level

    def cut(i: int, j: int) -> tuple[FloatArray, FloatArray]:
        t = sv[i] / (sv[i] - sv[j])  # s_i > 0 ≥ s_j: t in (0, 1]
        return t, x[:, i] + t * (x[:, j] - x[:, i])

    lev = np.full(ids.size, level)
    if k == 1:
        (t_ab, p_ab), (t_ac, p_ac), (t_ad, p_ad) = cut(0, 1), cut(0, 2), cut(0, 3)
        tets = [((x[:, 0], p_ab, p_ac, p_ad), (c[0], lev, lev, lev), v * t_ab * t_ac * t_ad)]
    elif k == 2:
        (t_ac, p_ac), (t_ad, p_ad), (t_bc, p_bc), (t_bd, p_bd) = \
            cut(0, 2), cut(0, 3), cut(1, 2), cut(1, 3)
        tets = [((x[:, 0], p_ac, p_ad, p_bd), (c[0], lev, lev, lev),
                 v * t_ac * t_ad * (1.0 - t_bd)),
                ((x[:, 0], p_ac, p_bd, p_bc), (c[0], lev, lev, lev),
                 v * t_ac * t_bd * (1.0 - t_bc)),
                ((x[:, 0], p_bc, p_bd, x[:, 1]), (c[0], lev, lev, c[1]), v * t_bc * t_bd)]
    else:
        (t_ad, p_ad), (t_bd, p_bd), (t_cd, p_cd) = cut(0, 3), cut(1, 3), cut(2, 3)
        tets = [((x[:, 0], x[:, 1], x[:, 2], p_cd), (c[0], c[1], c[2], lev), v * t_cd),
                ((x[:, 0], x[:, 1], p_cd, p_bd), (c[0], c[1], lev, lev),
                 v * (1.0 - t_cd) * t_bd),
                ((x[:, 0], p_bd, p_cd, p_ad), (c[0], lev, lev, lev),
                 v * (1.0 - t_cd) * (1.0 - t_bd) * t_ad)]
    return (np.tile(ids, len(tets)),
            np.concatenate([np.stack(p, axis=1) for p, _, _ in tets], axis=2),
            np.concatenate([np.stack(val) for _, val, _ in tets], axis=1),
            np.concatenate([vol for _, _, vol in tets]))
