"""VTK and gmsh-format mesh output (meshio); the only writer of .vtu/.pvd/.msh in fe3d.

.vtu files are written binary and uncompressed: zlib compression took most of the output
time (about 10× slower to write, measured in the project's solver notes) for files that any
viewer reads either way.
"""

from __future__ import annotations

from pathlib import Path
from typing import Literal
from xml.sax.saxutils import quoteattr

import meshio
import numpy as np

from fe3d._typing import FloatArray
from fe3d.mesh.site_mesh import SiteMesh
from fe3d.post.files import write_atomic, write_text_atomic

__all__ = ["write_field", "write_mesh", "write_pathlines", "write_pvd"]

_FACE_TAG_BASE = 100


def _tetra_mesh(site: SiteMesh, point_data: dict[str, FloatArray] | None = None,
                cell_data: dict[str, FloatArray] | None = None) -> meshio.Mesh:
    cd = {"unit_id": [site.cell_layer.astype(np.int32)]}
    for k, v in (cell_data or {}).items():
        cd[k] = [np.ascontiguousarray(v)]
    return meshio.Mesh(site.points.T, [("tetra", site.cells.T)],
                       point_data={k: np.ascontiguousarray(v) for k, v in
                                   (point_data or {}).items()},
                       cell_data=cd)


def write_mesh(site: SiteMesh, folder: Path, *,
               formats: tuple[Literal["msh", "vtu"], ...] = ("msh", "vtu"),
               msh_binary: bool = False) -> list[Path]:
    """Write ``mesh.msh`` (gmsh 2.2, physical groups per unit and face; text, or binary
    with ``msh_binary``) and ``mesh.vtu``, those named in ``formats``; returns the paths.

    A run that writes its fields as one VTKHDF series (:mod:`fe3d.post.series`) holds the
    mesh there already: it needs neither file unless asked for (docs/outputs.md)."""
    written = []
    if "msh" in formats:
        written.append(_write_msh(site, folder / "mesh.msh", binary=msh_binary))
    if "vtu" in formats:
        vtu_path = folder / "mesh.vtu"
        vtu = _tetra_mesh(site)
        write_atomic(vtu_path, lambda p: meshio.write(p, vtu, file_format="vtu",
                                                      compression=None))
        written.append(vtu_path)
    return written


def _write_msh(site: SiteMesh, msh_path: Path, *, binary: bool) -> Path:
    """The mesh in gmsh 2.2 format with a physical group per unit and per face."""
    face_names = list(site.faces)
    tris = [site.faces[f].T for f in face_names]
    cells = [("tetra", site.cells.T), *[("triangle", t) for t in tris]]
    phys = [site.cell_layer.astype(np.int32) + 1] + [
        np.full(t.shape[0], _FACE_TAG_BASE + i, dtype=np.int32) for i, t in enumerate(tris)]
    field_data = {name: np.array([i + 1, 3]) for i, name in enumerate(site.layer_names)}
    field_data |= {name: np.array([_FACE_TAG_BASE + i, 2]) for i, name in enumerate(face_names)}
    msh = meshio.Mesh(site.points.T, cells,
                      cell_data={"gmsh:physical": phys, "gmsh:geometrical": phys},
                      field_data=field_data)
    write_atomic(msh_path, lambda p: meshio.write(p, msh, file_format="gmsh22", binary=binary))
    return msh_path


def write_field(site: SiteMesh, path: Path, *, point_data: dict[str, FloatArray] | None = None,
                cell_data: dict[str, FloatArray] | None = None) -> Path:
    """Write one .vtu with the given point and cell arrays (names should carry units)."""
    m = _tetra_mesh(site, point_data, cell_data)
    write_atomic(path, lambda p: meshio.write(p, m, file_format="vtu", compression=None))
    return path


def write_pvd(path: Path, entries: list[tuple[float, str]], *, time_unit: str) -> Path:
    """Write a ParaView data collection listing (time, relative .vtu file) pairs."""
    rows = "\n".join(f'    <DataSet timestep="{t:.10g}" group="" part="0" file={quoteattr(f)}/>'
                     for t, f in entries)
    text = ('<?xml version="1.0"?>\n'
            f"<!-- time values are in {time_unit} -->\n"
            '<VTKFile type="Collection" version="0.1" byte_order="LittleEndian">\n'
            "  <Collection>\n"
            f"{rows}\n"
            "  </Collection>\n"
            "</VTKFile>\n")
    write_text_atomic(path, text)
    return path


def write_pathlines(path: Path, lines: list[tuple[FloatArray, FloatArray]], *,
                    time_unit_seconds: float, time_unit: str) -> Path:
    """Write polylines (points [m] ``(3, k)``, times [s] ``(k,)``) as a .vtp file, with the
    travel time of every vertex in ``time_unit`` and a particle id per line."""
    import pyvista as pv

    pts, conn, times, ids = [], [], [], []
    offset = 0
    for i, (p, t) in enumerate(lines):
        k = p.shape[1]
        if k < 2:
            continue
        pts.append(p.T)
        conn.append(np.concatenate([[k], np.arange(offset, offset + k)]))
        times.append(t / time_unit_seconds)
        ids.append(i)
        offset += k
    if pts:
        poly = pv.PolyData(np.vstack(pts), lines=np.concatenate(conn))
        poly.point_data[f"travel_time [{time_unit}]"] = np.concatenate(times)
        poly.cell_data["particle"] = np.array(ids)
    else:
        poly = pv.PolyData()
    write_atomic(path, lambda p: poly.save(str(p)))
    return path
