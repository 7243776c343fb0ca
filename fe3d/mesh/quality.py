"""Element quality metrics and the mesh quality report; pure numpy on points and cells.

Dihedral angles: the angle between two faces of a tetrahedron along their shared edge,
π minus the angle between the outward face normals. A regular tetrahedron has all six equal
to arccos(1/3) ≈ 70.53°; slivers have angles near 0° or 180°.

Aspect ratio: longest edge / (2√6 · inradius), which is 1 for the regular tetrahedron and
grows without bound for degenerate cells (one of the measures compared by Parthasarathy,
Graichen & Hathaway 1994, "A comparison of tetrahedron quality measures", Finite Elements in
Analysis and Design 15:255–261; normalisation recalled from memory).
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numba
import numpy as np

from fe3d._typing import FloatArray, IndexArray
from fe3d.mesh.report import MeshQuality
from fe3d.p1 import index_array

if TYPE_CHECKING:
    from fe3d.mesh.site_mesh import SiteMesh

__all__ = ["aspect_ratios", "dihedral_angles", "quality_report", "report_lines"]

_FACES = ((1, 2, 3), (0, 2, 3), (0, 1, 3), (0, 1, 2))  # face i is opposite vertex i
_PAIRS = ((0, 1), (0, 2), (0, 3), (1, 2), (1, 3), (2, 3))  # the faces of each dihedral angle


@numba.njit(cache=True, nogil=True)
def _quality_kernel(points: FloatArray, cells: IndexArray, angles: FloatArray,
                    aspect: FloatArray) -> None:
    """Six dihedral angles [degrees] into ``angles`` ``(6, m)`` and the aspect ratio into
    ``aspect`` ``(m,)`` of every cell, one cell at a time (no ``(4, 3, m)`` temporaries)."""
    p = np.empty((4, 3))
    unit = np.empty((4, 3))
    faces = np.array(_FACES)
    pairs = np.array(_PAIRS)
    for e in range(cells.shape[1]):
        for i in range(4):
            for k in range(3):
                p[i, k] = points[k, cells[i, e]]
        area = 0.0
        for i in range(4):
            a, b, c = faces[i, 0], faces[i, 1], faces[i, 2]
            ux, uy, uz = p[b, 0] - p[a, 0], p[b, 1] - p[a, 1], p[b, 2] - p[a, 2]
            vx, vy, vz = p[c, 0] - p[a, 0], p[c, 1] - p[a, 1], p[c, 2] - p[a, 2]
            nx, ny, nz = 0.5 * (uy * vz - uz * vy), 0.5 * (uz * vx - ux * vz), \
                0.5 * (ux * vy - uy * vx)
            # outward: pointing away from the opposite vertex
            side = nx * (p[a, 0] - p[i, 0]) + ny * (p[a, 1] - p[i, 1]) + nz * (p[a, 2] - p[i, 2])
            sign = -1.0 if side < 0.0 else 1.0
            size = np.sqrt(nx * nx + ny * ny + nz * nz)
            area += size
            scale = sign / max(size, 1e-300)
            unit[i, 0], unit[i, 1], unit[i, 2] = nx * scale, ny * scale, nz * scale
        for k in range(6):
            i, j = pairs[k, 0], pairs[k, 1]
            cos = unit[i, 0] * unit[j, 0] + unit[i, 1] * unit[j, 1] + unit[i, 2] * unit[j, 2]
            angles[k, e] = 180.0 - np.degrees(np.arccos(min(1.0, max(-1.0, cos))))
        bx, by, bz = p[1, 0] - p[0, 0], p[1, 1] - p[0, 1], p[1, 2] - p[0, 2]
        cx, cy, cz = p[2, 0] - p[0, 0], p[2, 1] - p[0, 1], p[2, 2] - p[0, 2]
        dx, dy, dz = p[3, 0] - p[0, 0], p[3, 1] - p[0, 1], p[3, 2] - p[0, 2]
        vol = (bx * (cy * dz - cz * dy) + by * (cz * dx - cx * dz)
               + bz * (cx * dy - cy * dx)) / 6.0
        longest = 0.0
        for i in range(4):
            for j in range(i + 1, 4):
                longest = max(longest, np.sqrt((p[i, 0] - p[j, 0]) ** 2
                                               + (p[i, 1] - p[j, 1]) ** 2
                                               + (p[i, 2] - p[j, 2]) ** 2))
        r_in = 3.0 * abs(vol) / max(area, 1e-300)
        aspect[e] = longest / (2.0 * np.sqrt(6.0) * r_in) if r_in > 0.0 else np.inf


def _measure(points: FloatArray, cells: IndexArray) -> tuple[FloatArray, FloatArray]:
    angles = np.empty((6, cells.shape[1]))
    aspect = np.empty(cells.shape[1])
    _quality_kernel(np.ascontiguousarray(points, dtype=float),
                    index_array(cells), angles, aspect)
    return angles, aspect


def dihedral_angles(points: FloatArray, cells: IndexArray) -> FloatArray:
    """The six dihedral angles [degrees] of every tetrahedron, shape ``(6, m)``, between the
    face pairs (0, 1), (0, 2), (0, 3), (1, 2), (1, 3), (2, 3) (face i opposite vertex i)."""
    return _measure(points, cells)[0]


def aspect_ratios(points: FloatArray, cells: IndexArray) -> FloatArray:
    """Longest edge / (2√6 · inradius) of every tetrahedron (1 when regular), ``(m,)``."""
    return _measure(points, cells)[1]


def quality_report(site: SiteMesh, *, chunk: int = 500_000) -> MeshQuality:
    """Cell and node counts, volume per unit [m³], min and 1st-percentile dihedral angle
    [degrees] and the worst aspect ratio (with where it is)."""
    m = site.n_cells
    mins = np.empty(m)
    maxs = np.empty(m)
    ar = np.empty(m)
    for s in range(0, m, chunk):
        d, ar[s:s + chunk] = _measure(site.points, site.cells[:, s:s + chunk])
        mins[s:s + chunk], maxs[s:s + chunk] = d.min(axis=0), d.max(axis=0)
    vol = site.cell_volumes()
    worst = int(np.argmax(ar))
    x, y, z = (float(v) for v in site.points[:, site.cells[:, worst]].mean(axis=1))
    return MeshQuality(
        cells=m, nodes=site.n_nodes,
        volume_per_unit_m3={name: float(vol[site.cell_layer == i].sum())
                            for i, name in enumerate(site.layer_names)},
        min_dihedral_deg=float(mins.min()),
        p01_dihedral_deg=float(np.percentile(mins, 1.0)),
        max_dihedral_deg=float(maxs.max()),
        worst_aspect_ratio=float(ar[worst]),
        worst_aspect_ratio_at_m=(x, y, z),
        min_volume_m3=float(vol.min()),
    )


def report_lines(report: MeshQuality) -> list[str]:
    """The quality report as short text lines."""
    lines = [f"{report.cells:,} tetrahedra, {report.nodes:,} nodes"]
    for name, v in report.volume_per_unit_m3.items():
        lines.append(f"volume of {name}: {v:.6g} m³")
    w = report.worst_aspect_ratio_at_m
    lines += [f"dihedral angle: min {report.min_dihedral_deg:.2f}°, 1st percentile of the "
              f"cell minima {report.p01_dihedral_deg:.2f}°, max "
              f"{report.max_dihedral_deg:.2f}°",
              f"worst aspect ratio {report.worst_aspect_ratio:.3g} near x={w[0]:.1f} m, "
              f"y={w[1]:.1f} m, z={w[2]:.2f} m"]
    return lines
