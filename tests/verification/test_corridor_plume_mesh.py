"""The corridor mesher on a small site: fine cells along the plume's path, coarse elsewhere,
and the mesh reused when nothing changes.

Rule checked (fe3d's, docs/theory.md M1–M2): along the pathline from the source the plan cell
size is at most Pe* α_L with the grid Péclet target Pe* = 2 (common practice for central
schemes; Zheng & Bennett 2002, *Applied contaminant transport modeling*, 2nd ed., ch. 7, from
memory), and away from the corridor it is the case's background size. The flow is uniform
along x (fixed heads west and east, no-flux sides; Darcy's law), so the pathline is the line
y = const through the source. Tolerances: gmsh is asked for 0.8 × each target size and its
edges overshoot its size field by up to ~20 % (measured, fe3d.mesh.build), so the median edge
is within the target itself; away from the corridor the median edge lies within ±25 % of the
background size (the same overshoot, and shorter edges where sizes grade).
"""

from __future__ import annotations

import numpy as np
import pytest

from fe3d.case.builder import Layer, Material, Source, Time, box_case, with_changes
from fe3d.pipeline import mesh_and_flow, mesh_case

pytestmark = pytest.mark.verification

ALPHA_L = 1.0  # [m]
BACKGROUND = 10.0  # [m]


def site_case():
    sand = Material(20.0, porosity=0.3, longitudinal_dispersivity=ALPHA_L,
                    transverse_dispersivity=0.1, vertical_dispersivity=0.05)
    return box_case(length=200.0, width=160.0, layers=[Layer("sand", -4.0, sand)],
                    heads={"west": 1.0, "east": 0.0}, cell=BACKGROUND, dz=2.0,
                    sources=[Source("spill", concentration=1.0, x=(10.0, 16.0),
                                    y=(37.0, 43.0), z=(-2.0, 0.0))],
                    time=Time(end=3650.0, step=100.0), title="corridor site")


def edges_near(site, select) -> np.ndarray:
    """Lengths [m] of the plan edges whose midpoints satisfy ``select(x, y)``."""
    plan = site.report.plan
    tri = plan.tri
    e = np.unique(np.sort(np.hstack([tri[[0, 1]], tri[[1, 2]], tri[[0, 2]]]), axis=0), axis=1)
    mid = 0.5 * (plan.xy[:, e[0]] + plan.xy[:, e[1]])
    keep = select(mid[0], mid[1])
    return np.linalg.norm(plan.xy[:, e[0, keep]] - plan.xy[:, e[1, keep]], axis=0)


def test_corridor_cells_of_the_target_size_along_the_pathline() -> None:
    site, _flow = mesh_and_flow(site_case())
    corridor = site.report.corridor
    assert corridor is not None
    target = 2.0 * ALPHA_L
    along = edges_near(site, lambda x, y: (x > 30) & (x < 180) & (np.abs(y - 40) < 2))
    assert np.median(along) <= target, (np.median(along), target)
    # beyond the widest half-width and the grading (4 background cells, fe3d.mesh.build)
    edge = 40.0 + corridor.width_range[1] / 2 + 5 * BACKGROUND
    far = edges_near(site, lambda x, y: y > edge)
    assert far.size > 0
    assert np.median(far) == pytest.approx(BACKGROUND, rel=0.25)
    plain, _ = mesh_and_flow(with_changes(site_case(), mesh={"corridor": False}))
    assert site.n_nodes > plain.n_nodes
    assert plain.report.corridor is None


def test_corridor_mesh_is_reused_on_a_rerun(tmp_path) -> None:
    case = site_case()
    first, reused_first, _ = mesh_case(case, tmp_path)
    again, reused_again, _ = mesh_case(case, tmp_path)
    assert not reused_first
    assert reused_again
    assert again.report.corridor == first.report.corridor
    assert np.array_equal(again.points, first.points)
    finer = with_changes(case, mesh={"corridor_peclet": 1.0})
    _, reused_finer, _ = mesh_case(finer, tmp_path)
    assert not reused_finer  # another corridor is another mesh
