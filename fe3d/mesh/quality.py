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

import numpy as np

from fe3d._typing import FloatArray, IndexArray
from fe3d.mesh.report import MeshQuality

if TYPE_CHECKING:
    from fe3d.mesh.site_mesh import SiteMesh

__all__ = ["aspect_ratios", "dihedral_angles", "quality_report", "report_lines"]

_FACES = ((1, 2, 3), (0, 2, 3), (0, 1, 3), (0, 1, 2))  # face i is opposite vertex i


def _face_normals(points: FloatArray, cells: IndexArray) -> tuple[FloatArray, FloatArray]:
    """Outward area vectors of the four faces, shape ``(4, 3, m)``, and volumes ``(m,)``."""
    p = points[:, cells]  # (3, 4, m)
    normals = np.empty((4, 3, cells.shape[1]))
    for i, (a, b, c) in enumerate(_FACES):
        n = 0.5 * np.cross(p[:, b] - p[:, a], p[:, c] - p[:, a], axis=0)
        # outward: pointing away from the opposite vertex
        sign = np.sign(np.einsum("ij,ij->j", n, p[:, a] - p[:, i]))
        normals[i] = n * np.where(sign == 0, 1.0, sign)
    vol = np.einsum("ij,ij->j", p[:, 1] - p[:, 0],
                    np.cross(p[:, 2] - p[:, 0], p[:, 3] - p[:, 0], axis=0)) / 6.0
    return normals, vol


def dihedral_angles(points: FloatArray, cells: IndexArray) -> FloatArray:
    """The six dihedral angles [degrees] of every tetrahedron, shape ``(6, m)``."""
    normals, _ = _face_normals(points, cells)
    unit = normals / np.maximum(np.linalg.norm(normals, axis=1, keepdims=True), 1e-300)
    out = []
    for i in range(4):
        for j in range(i + 1, 4):
            cos = np.clip(np.einsum("ij,ij->j", unit[i], unit[j]), -1.0, 1.0)
            out.append(180.0 - np.degrees(np.arccos(cos)))
    return np.array(out)


def aspect_ratios(points: FloatArray, cells: IndexArray) -> FloatArray:
    """Longest edge / (2√6 · inradius) of every tetrahedron (1 when regular), ``(m,)``."""
    normals, vol = _face_normals(points, cells)
    area = np.linalg.norm(normals, axis=1).sum(axis=0)
    r_in = 3.0 * np.abs(vol) / np.maximum(area, 1e-300)
    p = points[:, cells]
    longest = np.zeros(cells.shape[1])
    for i in range(4):
        for j in range(i + 1, 4):
            longest = np.maximum(longest, np.linalg.norm(p[:, i] - p[:, j], axis=0))
    with np.errstate(divide="ignore"):
        return longest / (2.0 * np.sqrt(6.0) * r_in)


def quality_report(site: SiteMesh, *, chunk: int = 500_000) -> MeshQuality:
    """Cell and node counts, volume per unit [m³], min and 1st-percentile dihedral angle
    [degrees] and the worst aspect ratio (with where it is)."""
    m = site.n_cells
    mins = np.empty(m)
    maxs = np.empty(m)
    ar = np.empty(m)
    for s in range(0, m, chunk):
        c = site.cells[:, s:s + chunk]
        d = dihedral_angles(site.points, c)
        mins[s:s + chunk], maxs[s:s + chunk] = d.min(axis=0), d.max(axis=0)
        ar[s:s + chunk] = aspect_ratios(site.points, c)
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
