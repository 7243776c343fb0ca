"""Mesh files: read a meshio-readable tetrahedral mesh with unit tags into a SiteMesh, and the
mesh cache (a SiteMesh as .npz beside a hash of the case's mesh inputs)."""

from __future__ import annotations

import contextlib
import hashlib
import io
import json
from dataclasses import replace
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from fe3d._typing import FloatArray, IndexArray
from fe3d.errors import MeshError
from fe3d.mesh.corridor import Corridor
from fe3d.mesh.quality import quality_report
from fe3d.mesh.report import LensFit, MeshQuality, MeshReport, PlanLayout
from fe3d.mesh.site_mesh import SiteMesh
from fe3d.mesh.stratigraphy import RuleApplied

if TYPE_CHECKING:
    from fe3d.case.schema import Case

__all__ = ["faces_from_outline", "load_cached", "mesh_inputs_hash", "read_site_mesh",
           "save_cached"]

MESH_FORMAT = 7  # bump when the mesher's output for the same inputs changes


def read_site_mesh(path: Path, *, unit_tag: str | None = None, key: str = "mesh file",
                   unit_names: list[str] | None = None) -> SiteMesh:
    """Read a tetrahedral mesh with unit tags (any format meshio reads).

    Units come from the ``gmsh:physical`` tags of the tetrahedra (names from the file's
    physical names) or from an integer cell array ``unit_tag`` / ``unit_id`` /
    ``cell_tags``. A tag without a name in the file is a unit number: with ``unit_names``
    given, ``unit_id`` and ``cell_tags`` value *i* is ``unit_names[i]`` (as fe3d writes
    ``mesh.vtu``) and gmsh physical tag *t* is ``unit_names[t - 1]`` (as fe3d writes
    ``mesh.msh``); without, it is named ``unit_<tag>``. Boundary faces are the tagged
    triangles (gmsh physical surfaces); a file without them gives an empty ``faces``.

    Raises
    ------
    MeshError
        One line starting ``<key> = '<path>':`` if the file cannot be read, holds no
        tetrahedra, has no unit tags, or has a numbered tag outside ``unit_names``.
    """
    import meshio

    where = f"{key} = {str(path)!r}"
    said = io.StringIO()
    try:  # meshio prints its reader errors and may call sys.exit: keep both in one line
        with contextlib.redirect_stdout(said), contextlib.redirect_stderr(said):
            m = meshio.read(path)
    except (Exception, SystemExit) as exc:  # meshio raises many types for unreadable files
        why = " ".join((str(exc) if not isinstance(exc, SystemExit) else "").split()) or \
            " ".join(said.getvalue().split()) or type(exc).__name__
        msg = f"{where}: cannot be read as a mesh ({why})"
        raise MeshError(msg) from None
    tets = [i for i, c in enumerate(m.cells) if c.type == "tetra"]
    if not tets:
        found = sorted({c.type for c in m.cells}) or ["no cells"]
        msg = (f"{where}: holds no tetrahedra (found {', '.join(found)}; only linear "
               "tetrahedra are used)")
        raise MeshError(msg)
    cells = np.vstack([m.cells[i].data for i in tets]).T.astype(np.int64)
    keys = [k for k in (unit_tag, "gmsh:physical", "unit_id", "cell_tags") if k]
    tags, tag_key = None, ""
    for k in keys:
        if k in m.cell_data:
            tags = np.concatenate([np.asarray(m.cell_data[k][i]) for i in tets]).astype(np.int64)
            tag_key = k
            break
    if tags is None:
        msg = (f"{where}: has no unit tags on its tetrahedra (give gmsh physical groups "
               "named after the layers and lenses, or an integer cell array unit_id)")
        raise MeshError(msg)
    names_by_tag = {int(v[0]): k for k, v in m.field_data.items()
                    if np.size(v) >= 2 and int(v[1]) == 3}
    uniq = np.unique(tags)
    offset = 1 if tag_key == "gmsh:physical" else 0
    names_list = []
    for t in (int(t) for t in uniq):
        if t in names_by_tag:
            names_list.append(names_by_tag[t])
        elif unit_names is None:
            names_list.append(f"unit_{t}")
        elif 0 <= t - offset < len(unit_names):
            names_list.append(unit_names[t - offset])
        else:
            msg = (f"{where}: unit tag {t} ({tag_key}) has no name in the file and is not a "
                   f"unit number of the case ({offset}..{len(unit_names) - 1 + offset} = "
                   f"{unit_names})")
            raise MeshError(msg)
    names = tuple(dict.fromkeys(names_list))  # two tags may name one unit
    to_unit = np.array([names.index(n) for n in names_list], dtype=np.int64)
    cell_layer = to_unit[np.searchsorted(uniq, tags)]
    faces: dict[str, Any] = {}
    face_names = {int(v[0]): k for k, v in m.field_data.items()
                  if np.size(v) >= 2 and int(v[1]) == 2}
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
    if points.shape[0] < 3:
        msg = f"{where}: its points have {points.shape[0]} coordinates (3 needed)"
        raise MeshError(msg)
    used = np.unique(cells)
    if used.size != points.shape[1]:  # drop nodes no tetrahedron uses
        remap = np.full(points.shape[1], -1, dtype=np.int64)
        remap[used] = np.arange(used.size)
        points, cells = points[:, used], remap[cells]
        faces = {k: remap[v] for k, v in faces.items()}
        if any((v < 0).any() for v in faces.values()):
            msg = f"{where}: a tagged boundary triangle uses a node of no tetrahedron"
            raise MeshError(msg)
    a, b, c, d = (points[:, cells[i]] for i in range(4))
    neg = np.einsum("ij,ij->j", b - a, np.cross(c - a, d - a, axis=0)) < 0
    cells[[1, 2]] = np.where(neg, cells[[2, 1]], cells[[1, 2]])
    bare = SiteMesh(points=points, cells=cells, cell_layer=cell_layer, layer_names=names,
                    faces=faces)
    return replace(bare, report=MeshReport(quality=quality_report(bare), origin="imported",
                                           origin_path=str(path)))


def faces_from_outline(points: FloatArray, cells: IndexArray,
                       vertices: list[tuple[float, float]], edge_names: list[str], *,
                       where: str = "mesh file") -> dict[str, IndexArray]:
    """Name the boundary triangles of a tetrahedral mesh from a plan outline.

    A boundary triangle whose three nodes lie on one outline edge (within 1e-6 of the
    outline's extent) takes that edge's name; any other one is ``top`` if its outward
    normal points up and ``bottom`` if it points down. A steep triangle on no edge means
    the mesh does not follow the outline: ``MeshError``.
    """
    quad = [[0, 1, 2, 3], [0, 1, 3, 2], [0, 2, 3, 1], [1, 2, 3, 0]]
    allf = np.hstack([cells[q[:3]] for q in quad])
    opp = np.concatenate([cells[q[3]] for q in quad])
    key = np.sort(allf, axis=0).astype(np.int64)
    n = np.int64(points.shape[1])
    code = (key[0] * n + key[1]) * n + key[2]
    _, inv, count = np.unique(code, return_inverse=True, return_counts=True)
    single = count[inv] == 1
    tri, op = allf[:, single], opp[single]
    a, b, c = (points[:, tri[i]] for i in range(3))
    normal = np.cross(b - a, c - a, axis=0)
    flip = np.einsum("ij,ij->j", normal, points[:, op] - a) > 0
    normal[:, flip] *= -1
    nz = normal[2] / np.linalg.norm(normal, axis=0)
    v = np.asarray(vertices, dtype=float)
    tol = 1e-6 * max(1.0, float(np.ptp(v, axis=0).max()))
    lateral = np.full(tri.shape[1], -1)
    for i in range(len(v)):
        p0, p1 = v[i], v[(i + 1) % len(v)]
        d = p1 - p0
        on = np.ones(tri.shape[1], dtype=bool)
        for j in range(3):
            q = points[:2, tri[j]].T - p0
            t = np.clip(q @ d / (d @ d), 0.0, 1.0)
            on &= np.linalg.norm(q - t[:, None] * d, axis=1) <= tol
        lateral = np.where(on & (lateral < 0), i, lateral)
    out: dict[str, IndexArray] = {}
    for name in dict.fromkeys(edge_names):
        ids = [i for i, e in enumerate(edge_names) if e == name]
        out[name] = tri[:, np.isin(lateral, ids)]
    rest = lateral < 0
    steep = rest & (np.abs(nz) < 1e-3)
    if steep.any():
        j = int(np.nonzero(steep)[0][0])
        x, y, z = points[:, tri[:, j]].mean(axis=1)
        msg = (f"{where}: {int(steep.sum())} steep boundary triangles lie on no edge of the "
               f"case's boundary (first near x={x:.2f} m, y={y:.2f} m, z={z:.2f} m); tag the "
               "boundary triangles or make the mesh follow the boundary polygon")
        raise MeshError(msg)
    out["top"] = tri[:, rest & (nz > 0)]
    out["bottom"] = tri[:, rest & (nz < 0)]
    return out


def mesh_inputs_hash(case: Case) -> str:
    """SHA-256 of every case input that changes the mesh (geometry, geology, mesh controls,
    sources, observation points, wells), plus the mesher format."""
    keep = ["box", "boundary", "stratigraphy", "lenses", "refinement_lines", "mesh",
            "observation_points"]
    data = case.model_dump(mode="json", include=set(keep))
    # only where sources and wells are shapes the mesh: strengths, rates and release
    # histories do not change it
    data["sources"] = [s.model_dump(mode="json", include={"shape", "face", "x", "y", "z",
                                                           "points"})
                       for s in case.sources]
    data["wells"] = [w.model_dump(mode="json", include={"x", "y", "screens"})
                     for w in case.wells]
    data["layers"] = [{k: v for k, v in ly.model_dump(mode="json").items() if k != "material"}
                      for ly in case.layers]
    data["_format"] = MESH_FORMAT
    text = json.dumps(data, sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def save_cached(site: SiteMesh, folder: Path, digest: str) -> Path:
    """Write ``mesh.npz`` (exact arrays, the plan layout included, and the hash of the mesh
    inputs) and ``mesh.json`` (the same hash, units, faces and the rest of the mesh report)
    in ``folder``, each atomically. Both files carry the hash, so a crash between the two
    writes leaves a pair that :func:`load_cached` refuses rather than a mesh under the wrong
    hash."""
    report = site.report
    if report is None:
        msg = "a mesh without a mesher report (assembled from bare arrays) is not cached"
        raise MeshError(msg)
    folder.mkdir(parents=True, exist_ok=True)
    arrays = {"points": site.points, "cells": _narrow(site.cells),
              "cell_layer": _narrow(site.cell_layer), "mesh_inputs_sha256": np.array(digest)}
    arrays |= {f"face:{k}": _narrow(v) for k, v in site.faces.items()}
    plan = report.plan
    if plan is not None:
        arrays |= {"plan:xy": plan.xy, "plan:tri": _narrow(plan.tri),
                   "plan:surfaces": plan.surfaces}
    tmp = folder / "mesh.npz.part"
    with tmp.open("wb") as fh:
        np.savez(fh, **arrays)
    tmp.replace(folder / "mesh.npz")
    meta = {"mesh_inputs_sha256": digest, "units": list(site.layer_names),
            "faces": list(site.faces),
            "index_types": {"cells": str(site.cells.dtype),
                            "cell_layer": str(site.cell_layer.dtype),
                            "faces": {k: str(v.dtype) for k, v in site.faces.items()},
                            "plan_tri": None if plan is None else str(plan.tri.dtype)},
            "quality": report.quality.as_dict(),
            "surface_rules": [r.as_dict() for r in report.surface_rules],
            "lens_fit": [n.as_dict() for n in report.lens_fits],
            "sublayers": report.sublayers,
            "origin": report.origin, "origin_path": report.origin_path,
            "corridor": None if report.corridor is None else report.corridor.as_dict(),
            "plan_nodes": None if plan is None else {"boreholes": plan.borehole_nodes,
                                                     "wells": plan.well_nodes}}
    tmp_json = folder / "mesh.json.part"
    tmp_json.write_text(json.dumps(meta, indent=2), encoding="utf-8")
    tmp_json.replace(folder / "mesh.json")
    return folder / "mesh.npz"


def _narrow(a: np.ndarray) -> np.ndarray:
    """An index array in the smallest of int16 and int32 that holds its values (the file is
    then about half as large), or as it is; :func:`load_cached` gives it back its own type
    (``mesh.json``'s ``index_types``), so a cached mesh equals the built one bit for bit."""
    if a.size == 0 or not np.issubdtype(a.dtype, np.integer):
        return a
    low, high = int(a.min()), int(a.max())
    for kind in (np.int16, np.int32):
        info = np.iinfo(kind)
        if info.min <= low and high <= info.max:
            return a.astype(kind)
    return a


def _wide(a: np.ndarray, kind: str) -> np.ndarray:
    """``a`` back in the index type ``kind`` it had when it was saved."""
    return a.astype(kind) if a.dtype != np.dtype(kind) else a


def load_cached(folder: Path, digest: str) -> SiteMesh | None:
    """The cached mesh in ``folder`` if the hash stored in both ``mesh.json`` and
    ``mesh.npz`` equals ``digest``, else ``None``.

    Its report equals the one of the mesh when it was built, but for ``origin`` (``"cached"``)
    and ``origin_path`` (this folder).
    """
    meta_path, npz = folder / "mesh.json", folder / "mesh.npz"
    if not (meta_path.is_file() and npz.is_file()):
        return None
    try:
        meta = json.loads(meta_path.read_text(encoding="utf-8"))
        if meta.get("mesh_inputs_sha256") != digest:
            return None
        with np.load(npz) as z:
            if "mesh_inputs_sha256" not in z.files or str(z["mesh_inputs_sha256"]) != digest:
                return None
            kinds = meta["index_types"]
            faces = {name: _wide(z[f"face:{name}"], kinds["faces"][name])
                     for name in meta["faces"]}
            nodes = meta["plan_nodes"]
            plan = None if nodes is None else PlanLayout(
                xy=z["plan:xy"], tri=_wide(z["plan:tri"], kinds["plan_tri"]),
                surfaces=z["plan:surfaces"],
                borehole_nodes=dict(nodes["boreholes"]), well_nodes=dict(nodes["wells"]))
            report = MeshReport(
                quality=MeshQuality.from_dict(meta["quality"]), origin="cached",
                origin_path=str(folder), sublayers=dict(meta["sublayers"]),
                surface_rules=tuple(RuleApplied.from_dict(r) for r in meta["surface_rules"]),
                lens_fits=tuple(LensFit.from_dict(n) for n in meta["lens_fit"]), plan=plan,
                corridor=None if meta.get("corridor") is None else Corridor.from_dict(
                    meta["corridor"]))
            site = SiteMesh(points=z["points"], cells=_wide(z["cells"], kinds["cells"]),
                            cell_layer=_wide(z["cell_layer"], kinds["cell_layer"]),
                            layer_names=tuple(meta["units"]), faces=faces, report=report)
    except (OSError, ValueError, KeyError, TypeError):
        return None
    return site
