"""Mesh files: read a meshio-readable tetrahedral mesh with unit tags into a SiteMesh, and the
mesh cache (a SiteMesh as .npz beside a hash of the case's mesh inputs)."""

from __future__ import annotations

import hashlib
import json
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from fe3d.errors import MeshError
from fe3d.mesh.site_mesh import SiteMesh

if TYPE_CHECKING:
    from fe3d.case.schema import Case

__all__ = ["load_cached", "mesh_inputs_hash", "read_site_mesh", "save_cached"]

MESH_FORMAT = 2  # bump when the mesher's output for the same inputs changes


def read_site_mesh(path: Path, *, unit_tag: str | None = None) -> SiteMesh:
    """Read a tetrahedral mesh with unit tags (any format meshio reads).

    Units come from the ``gmsh:physical`` tags of the tetrahedra (names from the file's
    physical names) or from an integer cell array ``unit_tag`` / ``unit_id`` (names
    ``unit_<id>``). Boundary faces are the tagged triangles (gmsh physical surfaces).

    Raises
    ------
    MeshError
        If the file cannot be read, holds no tetrahedra, or has no unit tags.
    """
    import meshio

    try:
        m = meshio.read(path)
    except Exception as exc:  # meshio raises many types for unreadable files
        msg = f"mesh file {str(path)!r} cannot be read: {exc}"
        raise MeshError(msg) from None
    tets = [i for i, c in enumerate(m.cells) if c.type == "tetra"]
    if not tets:
        msg = f"mesh file {str(path)!r} holds no tetrahedra (only linear tetrahedra are used)"
        raise MeshError(msg)
    cells = np.vstack([m.cells[i].data for i in tets]).T.astype(np.int64)
    keys = [k for k in (unit_tag, "gmsh:physical", "unit_id", "cell_tags") if k]
    tags = None
    for k in keys:
        if k in m.cell_data:
            tags = np.concatenate([np.asarray(m.cell_data[k][i]) for i in tets]).astype(np.int64)
            break
    if tags is None:
        msg = (f"mesh file {str(path)!r} has no unit tags on its tetrahedra (looked for cell "
               f"data {keys})")
        raise MeshError(msg)
    names_by_tag = {int(v[0]): k for k, v in m.field_data.items() if int(v[1]) == 3}
    uniq = np.unique(tags)
    names = tuple(names_by_tag.get(int(t), f"unit_{int(t)}") for t in uniq)
    cell_layer = np.searchsorted(uniq, tags).astype(np.int64)
    faces: dict[str, Any] = {}
    face_names = {int(v[0]): k for k, v in m.field_data.items() if int(v[1]) == 2}
    if "gmsh:physical" in m.cell_data:
        for i, c in enumerate(m.cells):
            if c.type != "triangle":
                continue
            phys = np.asarray(m.cell_data["gmsh:physical"][i]).astype(np.int64)
            for t in np.unique(phys):
                name = face_names.get(int(t), f"face_{int(t)}")
                tri = c.data[phys == t].T.astype(np.int64)
                faces[name] = np.hstack([faces[name], tri]) if name in faces else tri
    points = np.ascontiguousarray(m.points.T[:3].astype(float))
    used = np.unique(cells)
    if used.size != points.shape[1]:  # drop nodes no tetrahedron uses
        remap = np.full(points.shape[1], -1, dtype=np.int64)
        remap[used] = np.arange(used.size)
        points, cells = points[:, used], remap[cells]
        faces = {k: remap[v] for k, v in faces.items()}
    a, b, c, d = (points[:, cells[i]] for i in range(4))
    neg = np.einsum("ij,ij->j", b - a, np.cross(c - a, d - a, axis=0)) < 0
    cells[[1, 2]] = np.where(neg, cells[[2, 1]], cells[[1, 2]])
    return SiteMesh(points=points, cells=cells, cell_layer=cell_layer, layer_names=names,
                    faces=faces, info={"imported_from": str(path)})


def mesh_inputs_hash(case: Case) -> str:
    """SHA-256 of every case input that changes the mesh (geometry, geology, mesh controls,
    sources, observation points, wells), plus the mesher format."""
    keep = ["box", "boundary", "stratigraphy", "lenses", "refinement_lines", "mesh", "sources",
            "observation_points", "wells"]
    data = case.model_dump(mode="json", include=set(keep))
    data["layers"] = [{k: v for k, v in ly.model_dump(mode="json").items() if k != "material"}
                      for ly in case.layers]
    data["_format"] = MESH_FORMAT
    text = json.dumps(data, sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def save_cached(site: SiteMesh, folder: Path, digest: str) -> Path:
    """Write ``mesh.npz`` (exact arrays) and ``mesh.json`` (hash and quality) in ``folder``."""
    folder.mkdir(parents=True, exist_ok=True)
    arrays = {"points": site.points, "cells": site.cells, "cell_layer": site.cell_layer}
    arrays |= {f"face:{k}": v for k, v in site.faces.items()}
    tmp = folder / "mesh.npz.part"
    with tmp.open("wb") as fh:
        np.savez(fh, **arrays)
    tmp.replace(folder / "mesh.npz")
    meta = {"mesh_inputs_sha256": digest, "units": list(site.layer_names),
            "faces": list(site.faces),
            "quality": site.info.get("quality"),
            "surface_rules": site.info.get("surface_rules", []),
            "sublayers": site.info.get("sublayers")}
    (folder / "mesh.json").write_text(json.dumps(meta, indent=2), encoding="utf-8")
    return folder / "mesh.npz"


def load_cached(folder: Path, digest: str) -> SiteMesh | None:
    """The cached mesh in ``folder`` if its stored hash equals ``digest``, else ``None``."""
    meta_path, npz = folder / "mesh.json", folder / "mesh.npz"
    if not (meta_path.is_file() and npz.is_file()):
        return None
    try:
        meta = json.loads(meta_path.read_text(encoding="utf-8"))
        if meta.get("mesh_inputs_sha256") != digest:
            return None
        with np.load(npz) as z:
            faces = {name: z[f"face:{name}"] for name in meta["faces"]}
            site = SiteMesh(points=z["points"], cells=z["cells"], cell_layer=z["cell_layer"],
                            layer_names=tuple(meta["units"]), faces=faces,
                            info={"reused_from": str(folder), "quality": meta.get("quality"),
                                  "surface_rules": meta.get("surface_rules", []),
                                  "sublayers": meta.get("sublayers")})
    except (OSError, ValueError, KeyError):
        return None
    return site
