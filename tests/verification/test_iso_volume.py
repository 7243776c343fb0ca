"""The region above a level of a P1 field, measured exactly (fe3d/post/iso_volume.py).

References:

- Volume of a box on one side of a plane: Barrow, D. L. & Smith, P. W. (1979), "Spline
  notation applied to a volume problem", The American Mathematical Monthly 86(1), 50–51
  (inclusion–exclusion over the box's corners of the truncated cubes (L − w·v)₊³; cited from
  memory, so the formula is also checked here against values of the Irwin–Hall
  distribution, the sum of three uniform variables: P(U₁+U₂+U₃ ≤ 1) = 1/6, ≤ 1.5 = 1/2).
- Volume of an ellipsoid, 4/3 π abc (any handbook, e.g. Bronshtein & Semendyayev, Handbook
  of Mathematics).
- VTK's scalar clip and its attribute integration (through pyvista, a reference library),
  which cut the same tetrahedra by the same plane.
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from skfem import MeshTet

from fe3d.p1 import volumes
from fe3d.post.iso_volume import region_above

pytestmark = pytest.mark.verification

EPS = np.finfo(float).eps


def _box_mesh(xs: np.ndarray, ys: np.ndarray, zs: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """A tensor-product tetrahedral mesh of the box, every tetrahedron positively oriented
    (VTK's volumes are signed)."""
    m = MeshTet.init_tensor(xs, ys, zs)
    p, t = m.p.copy(), m.t.copy()
    neg = volumes(p, t) < 0
    t[0, neg], t[1, neg] = t[1, neg].copy(), t[0, neg].copy()
    return p, t


def box_volume_below(weights: tuple[float, float, float], sides: tuple[float, float, float],
                     level: float) -> float:
    """Volume of {x in [0, A]×[0, B]×[0, C] : w·x ≤ level} for w > 0 (Barrow & Smith 1979):
    A B C / (3! Π w_i A_i) Σ_v (−1)^|v| (level − Σ_i v_i w_i A_i)₊³ over the corners v."""
    scaled = [w * s for w, s in zip(weights, sides, strict=True)]
    total = sum((-1) ** sum(v) * max(level - sum(vi * si for vi, si in
                                                 zip(v, scaled, strict=True)), 0.0) ** 3
                for v in itertools.product((0, 1), repeat=3))
    return math.prod(sides) * total / (6.0 * math.prod(scaled))


def test_reference_box_formula_reproduces_the_irwin_hall_values():
    """The unit cube below x + y + z = 1 and = 1.5: 1/6 and 1/2 exactly (round-off only)."""
    assert box_volume_below((1, 1, 1), (1, 1, 1), 1.0) == pytest.approx(1 / 6, rel=1e-14)
    assert box_volume_below((1, 1, 1), (1, 1, 1), 1.5) == pytest.approx(0.5, rel=1e-14)
    assert box_volume_below((1, 2, 3), (2, 1, 1), 100.0) == pytest.approx(2.0, rel=1e-14)


@pytest.mark.parametrize("level", [0.4, 1.7, 3.1, 5.2, 6.9])
def test_volume_above_a_linear_field_equals_the_exact_half_space_volume(level):
    """c = 0.5 x + 1.25 y + 2 z on a 3 × 2 × 1.5 m box (graded spacing; mid-box the level
    cuts cells with one, two and three nodes above it): P1 holds c exactly, so the volume above
    the level equals Barrow & Smith's exact volume to round-off. Tolerance 1e-10 relative:
    each piece's volume is a product of four numbers in [0, 1] (a few ε), summed over
    ~2·10⁴ pieces, so the round-off is below 1e5 ε ≈ 2e-11 of the box volume."""
    xs = np.linspace(0, 3, 15) ** 1.3 / 3 ** 0.3
    p, t = _box_mesh(xs, np.linspace(0, 2, 11), np.linspace(0, 1.5, 9) ** 1.2 / 1.5 ** 0.2)
    w, sides = (0.5, 1.25, 2.0), (3.0, 2.0, 1.5)
    c = w[0] * p[0] + w[1] * p[1] + w[2] * p[2]
    region = region_above(p, t, volumes(p, t), c, level)
    exact = math.prod(sides) - box_volume_below(w, sides, level)
    assert region.volume == pytest.approx(exact, rel=1e-10)
    if level == 3.1:  # mid-box, the level cuts cells with one, two and three nodes above
        assert {int(k) for k in (c[t] > level).sum(axis=0)} >= {1, 2, 3}


def test_volume_above_zero_of_a_quadratic_tends_to_the_ellipsoid_with_order_two():
    """c = 1 − (x²/a² + y²/b² + z²/c²), a, b, c = 3, 2, 1 m, on one octant (×8 by symmetry),
    meshes of 6, 12, 24, 48 cells a side. The P1 interpolant of a smooth field differs from
    it by O(h²), so the region's volume tends to 4/3 π abc (handbook) with order 2; every
    pairwise observed order must be ≥ 1.8 (the issue's bound) and the finest error ≤ 0.1 %
    (the O(h²) constant measured on the coarsest mesh, 3.3 %, divided by 64 ≈ 0.05 %,
    doubled)."""
    a, b, c = 3.0, 2.0, 1.0
    exact = 4.0 / 3.0 * math.pi * a * b * c
    rows = []
    for n in (6, 12, 24, 48):
        p, t = _box_mesh(*(np.linspace(0, 1.25 * s, n + 1) for s in (a, b, c)))
        f = 1.0 - (p[0] ** 2 / a ** 2 + p[1] ** 2 / b ** 2 + p[2] ** 2 / c ** 2)
        rows.append((1.25 * a / n, abs(8 * region_above(p, t, volumes(p, t), f, 0.0).volume
                                       - exact) / exact))
    orders = [math.log2(e0 / e1) for (_, e0), (_, e1) in itertools.pairwise(rows)]
    table = "\n".join(f"h = {h:.4g} m, error {e:.3e}" for h, e in rows) + f"\norders {orders}"
    assert min(orders) >= 1.8, table
    assert rows[-1][1] <= 1e-3, table


@pytest.mark.parametrize("level", [-0.8, 0.0, 0.9])
def test_volume_integral_and_extent_match_vtk_clip_of_a_rough_field(level):
    """A random nodal field (seed 0) on a graded box mesh: the volume above the level and
    the integral of c over it equal those of VTK's clip of the same tetrahedra by the same
    level (vtkClipDataSet, vtkIntegrateAttributes through pyvista), and the region's
    bounding box equals the clip's. Tolerance 1e-12 relative: both sum the same ~10⁴ exact
    pieces in a different order and split, a few hundred ε."""
    import pyvista as pv

    p, t = _box_mesh(np.linspace(0, 1, 9) ** 1.5, np.linspace(0, 2, 7), np.linspace(0, 1.5, 6))
    c = np.random.default_rng(0).normal(size=p.shape[1])
    region = region_above(p, t, volumes(p, t), c, level)
    grid = pv.UnstructuredGrid({pv.CellType.TETRA: t.T.copy()}, p.T.copy())
    grid.point_data["c"] = c
    clip = grid.clip_scalar(scalars="c", value=level, invert=False)
    assert region.volume == pytest.approx(clip.volume, rel=1e-12)
    integral = region.integral(np.ones(t.shape[1]))
    assert integral == pytest.approx(clip.integrate_data().point_data["c"][0], rel=1e-12)
    vx = region.vertices()
    np.testing.assert_allclose(np.ravel([vx.min(axis=1), vx.max(axis=1)], order="F"),
                               clip.bounds, rtol=0, atol=1e3 * EPS * 2.0)


def test_integral_below_every_value_is_the_whole_field():
    """With the level below every value, the region is the mesh and ∫θc dV is the P1
    integral Σ_e θ_e V_e mean(c_e), which equals the lumped sum Σ_j c_j ∫θφ_j dV
    (∫φ_j dV = V_e/4 on each cell, exact for P1); round-off 1e3 ε relative (a sum of
    ~10³ positive terms)."""
    p, t = _box_mesh(np.linspace(0, 1, 6), np.linspace(0, 1, 5), np.linspace(0, 1, 4))
    rng = np.random.default_rng(0)
    c = rng.uniform(0.5, 2.0, p.shape[1])
    theta = rng.uniform(0.1, 0.4, t.shape[1])
    vol = volumes(p, t)
    region = region_above(p, t, vol, c, -1.0)
    lumped = np.bincount(t.ravel(), weights=np.tile(theta * vol / 4, 4), minlength=c.size)
    assert region.integral(theta) == pytest.approx(lumped @ c, rel=1e3 * EPS)
    assert region.volume == pytest.approx(vol.sum(), rel=1e3 * EPS)
    assert region_above(p, t, vol, c, 3.0).is_empty


def test_quadrature_integrates_a_quadratic_function_of_the_field_exactly():
    """∫ c² dV over each tetrahedron from the integration formula of barycentric monomials,
    ∫ λ_i^a λ_j^b dV = a! b! 3! V / (a + b + 3)! (Zienkiewicz & Taylor, The Finite Element
    Method, vol. 1): V/20 (Σ c_i² + (Σ c_i)²). The 4-point degree-2 rule (Stroud 1971,
    T3:2-1) is exact for it, on whole cells and on the pieces of cut cells (checked against
    the sum of the pieces' own formula); round-off 1e3 ε relative."""
    p, t = _box_mesh(np.linspace(0, 1, 6), np.linspace(0, 1, 5), np.linspace(0, 1, 4))
    c = np.random.default_rng(0).uniform(0.0, 2.0, p.shape[1])
    vol = volumes(p, t)

    def square(values: np.ndarray, _cells: np.ndarray) -> np.ndarray:
        return values ** 2

    ct = c[t]
    exact = float((np.abs(vol) / 20 * ((ct ** 2).sum(0) + ct.sum(0) ** 2)).sum())
    assert region_above(p, t, vol, c, -1.0).integral_of_function(square) == \
        pytest.approx(exact, rel=1e3 * EPS)
    region = region_above(p, t, vol, c, 1.0)
    parts = [(region.whole_volume, region.whole_values),
             (region.piece_volume, region.piece_values)]
    exact_cut = sum(float((v / 20 * ((x ** 2).sum(0) + x.sum(0) ** 2)).sum()) for v, x in parts)
    assert region.integral_of_function(square) == pytest.approx(exact_cut, rel=1e3 * EPS)
