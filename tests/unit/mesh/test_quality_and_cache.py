"""Quality metrics on a regular tetrahedron, and mesh reuse by the hash of the mesh inputs."""

from __future__ import annotations

import dataclasses
import math
from pathlib import Path

import numpy as np
import pytest

from fe3d.case.builder import Source, with_changes
from fe3d.case.load import load_case
from fe3d.mesh.build import obtain_mesh
from fe3d.mesh.io import mesh_inputs_hash
from fe3d.mesh.quality import aspect_ratios, dihedral_angles

TINY = Path(__file__).parents[3] / "cases" / "tiny" / "case.toml"


def test_regular_tetrahedron_metrics():
    """Regular tetrahedron: every dihedral angle is arccos(1/3) ≈ 70.5288° (classical solid
    geometry, e.g. CRC Standard Mathematical Tables) and the normalised aspect ratio is 1."""
    p = np.array([[1, 1, 1], [1, -1, -1], [-1, 1, -1], [-1, -1, 1]], dtype=float).T
    c = np.array([[0], [1], [2], [3]])
    np.testing.assert_allclose(dihedral_angles(p, c), math.degrees(math.acos(1 / 3)),
                               rtol=1e-12)
    assert aspect_ratios(p, c)[0] == pytest.approx(1.0, rel=1e-12)


def test_right_corner_tetrahedron_angles():
    """Corner tetrahedron (0, e1, e2, e3): three right dihedral angles at the axes and three of
    arccos(1/√3) ≈ 54.7356° at the slanted face (exact by construction)."""
    p = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1]], dtype=float).T
    d = np.sort(dihedral_angles(p, np.array([[0], [1], [2], [3]]))[:, 0])
    np.testing.assert_allclose(d[:3], math.degrees(math.acos(1 / math.sqrt(3))), rtol=1e-12)
    np.testing.assert_allclose(d[3:], 90.0, rtol=1e-12)


def test_mesh_is_reused_only_while_mesh_inputs_are_unchanged(tmp_path):
    case = load_case(TINY)
    site, reused = obtain_mesh(case, [tmp_path], save_to=tmp_path)
    assert not reused
    again, reused = obtain_mesh(case, [tmp_path], save_to=tmp_path)
    assert reused
    np.testing.assert_array_equal(again.cells, site.cells)
    np.testing.assert_array_equal(again.points, site.points)
    assert {k: v.shape for k, v in again.faces.items()} == \
        {k: v.shape for k, v in site.faces.items()}
    # a physics-only change keeps the mesh; a mesh-input change rebuilds it
    physics = with_changes(case, materials={"sand": {"porosity": 0.25}})
    assert mesh_inputs_hash(physics) == mesh_inputs_hash(case)
    finer = with_changes(case, mesh={"cell_size": "6 m"})
    assert mesh_inputs_hash(finer) != mesh_inputs_hash(case)
    _, reused = obtain_mesh(finer, [tmp_path], save_to=tmp_path)
    assert not reused


def test_source_strength_and_well_rate_do_not_change_the_mesh_hash():
    """Only where sources and wells are shapes the mesh (their corners and screens are mesh
    nodes and levels); strengths, rates and kinds do not."""
    tiny = load_case(TINY)
    spill = Source("drum_spill", concentration="5 mg/L", x=(8, 12), y=(8, 12), z=(2, 4),
                   stop=200)

    def with_well(rate: float, **source: object):
        well = {"name": "w", "x": "30 m", "y": "10 m", "screens": [["4 m", "2 m"]],
                "rate": f"{rate} m^3/d"}
        return with_changes(tiny, wells=[well],
                            sources=[dataclasses.replace(spill, **source)])

    base = with_well(3)
    stronger = with_well(7, concentration="9 mg/L")
    moved = with_well(3, x=(8, 13))
    assert mesh_inputs_hash(stronger) == mesh_inputs_hash(base)
    assert mesh_inputs_hash(moved) != mesh_inputs_hash(base)


def test_a_crash_between_the_two_cache_files_never_reuses_the_wrong_mesh(tmp_path):
    """Issue 15: mesh.npz of case B written, then a crash before mesh.json: the folder holds
    B's arrays beside A's metadata. Neither case may reuse that pair (behaviour requirement,
    no outside reference)."""
    from fe3d.mesh.io import load_cached

    case_a = load_case(TINY)
    case_b = with_changes(case_a, mesh={"cell_size": "6 m"})
    a_folder, b_folder = tmp_path / "a", tmp_path / "b"
    obtain_mesh(case_a, [a_folder], save_to=a_folder)
    obtain_mesh(case_b, [b_folder], save_to=b_folder)
    (a_folder / "mesh.npz").write_bytes((b_folder / "mesh.npz").read_bytes())  # the crash
    assert load_cached(a_folder, mesh_inputs_hash(case_a)) is None
    assert load_cached(a_folder, mesh_inputs_hash(case_b)) is None
    assert load_cached(b_folder, mesh_inputs_hash(case_b)) is not None
    _, reused = obtain_mesh(case_a, [a_folder], save_to=a_folder)
    assert not reused


def test_a_cached_mesh_carries_the_same_report_as_a_fresh_one(tmp_path):
    """The mesher's report is a frozen record set at construction; loading the mesh from the
    cache gives equal fields (only origin and origin_path say where it came from) and equal
    arrays."""
    case = load_case(TINY)
    fresh, _ = obtain_mesh(case, [tmp_path], save_to=tmp_path)
    cached, reused = obtain_mesh(case, [tmp_path], save_to=tmp_path)
    assert reused
    a, b = fresh.report, cached.report
    assert (a.origin, b.origin, b.origin_path) == ("built", "cached", str(tmp_path))
    assert b.quality == a.quality
    assert (b.sublayers, b.surface_rules, b.lens_fits) == \
        (a.sublayers, a.surface_rules, a.lens_fits)
    for name in ("xy", "tri", "surfaces"):
        np.testing.assert_array_equal(getattr(b.plan, name), getattr(a.plan, name),
                                      strict=True)
    assert (b.plan.borehole_nodes, b.plan.well_nodes) == \
        (a.plan.borehole_nodes, a.plan.well_nodes)
    # the arrays too, bit for bit and in their own types (the file stores index arrays in
    # int16 or int32 where their values fit, and the cache gives back the built types)
    for name in ("points", "cells", "cell_layer"):
        np.testing.assert_array_equal(getattr(cached, name), getattr(fresh, name),
                                      strict=True)
    for face, tri in fresh.faces.items():
        np.testing.assert_array_equal(cached.faces[face], tri, strict=True)
    with np.load(tmp_path / "mesh.npz") as stored:
        assert stored["cells"].dtype == np.int16  # a few thousand nodes fit
        assert stored["cell_layer"].dtype == np.int16


def test_lumping_gives_each_node_a_quarter_of_its_cells():
    """Σ_nodes lumped(v) = Σ_cells v·|V| (each cell hands |V|/4 to each of its 4 nodes:
    P1 row-sum lumping, exact by construction); the volumes are computed once. Tolerance:
    the round-off bound of summing n_cells positive terms, n_cells · eps (Higham 2002,
    Accuracy and Stability of Numerical Algorithms, §4.2)."""
    site, _ = obtain_mesh(load_case(TINY), [])
    v = np.linspace(1.0, 2.0, site.n_cells)
    vol = site.cell_volumes()
    assert site.cell_volumes() is vol
    assert not vol.flags.writeable
    total = float(v @ np.abs(vol))
    rtol = site.n_cells * np.finfo(float).eps
    assert site.lumped(v).sum() == pytest.approx(total, rel=rtol)
    both = site.lumped(np.vstack([v, np.ones_like(v)]))
    np.testing.assert_allclose(both[0], site.lumped(v), rtol=0, atol=0)
    assert both[1].sum() == pytest.approx(float(np.abs(vol).sum()), rel=rtol)
