"""The mesh report in lines of text, for `fe3d mesh` (quality, plume corridor, sublayers,
faces, surface rules, lens fits). Reads the mesher's records; computes nothing."""

from __future__ import annotations

from dataclasses import dataclass

from fe3d.mesh.quality import report_lines
from fe3d.mesh.site_mesh import SiteMesh

__all__ = ["MeshLine", "mesh_lines"]


@dataclass(frozen=True)
class MeshLine:
    """One line of the mesh report; ``kind`` is "info", "rule" (a surface rule the mesher
    applied) or "warning"."""

    text: str
    kind: str = "info"


def mesh_lines(site: SiteMesh) -> list[MeshLine]:
    """The report of a mesh built or reused by the mesher (``site.report`` set)."""
    report = site.report
    if report is None:
        return [MeshLine(f"{site.n_nodes:,} nodes, {site.n_cells:,} tetrahedra")]
    out = [MeshLine(line) for line in report_lines(report.quality)]
    corridor = report.corridor
    if corridor is not None:
        out += [MeshLine(line) for line in corridor.lines()]
        if corridor.note:
            out.append(MeshLine(corridor.note, "warning"))
        out += [MeshLine(r.thin_warning(), "warning") for r in corridor.receptors if r.thin]
    out.append(MeshLine("sublayers: " + ", ".join(
        f"{k} {v}" for k, v in report.sublayers.items())))
    out.append(MeshLine("faces: " + ", ".join(f"{k} ({v.shape[1]} triangles)"
                                              for k, v in site.faces.items())))
    for rule in report.surface_rules:
        out.append(MeshLine(
            f"{rule.rule.replace('_', '-')} rule: unit {rule.unit!r} at "
            f"{rule.n_nodes} plan nodes ({rule.area:.4g} m², x "
            f"{rule.x_range[0]:.1f}–{rule.x_range[1]:.1f} m, y "
            f"{rule.y_range[0]:.1f}–{rule.y_range[1]:.1f} m)"
            + (f"; boreholes {', '.join(rule.boreholes)}" if rule.boreholes else ""),
            "rule"))
    out += [MeshLine(fit.line, "warning") for fit in report.lens_fits]
    return out
