"""Steady flow checks against closed-form results of elementary hydrogeology.

Reference: Freeze, R.A. & Cherry, J.A. (1979), *Groundwater*, Prentice-Hall, ch. 2
(layered heterogeneity and anisotropy):
for flow parallel to layers the equivalent conductivity is the thickness-weighted arithmetic
mean, Σ K_i b_i / Σ b_i; for flow across layers it is the harmonic mean, Σ b_i / Σ (b_i/K_i).
A linear head between two fixed heads is the exact solution of ∇·(K∇h) = 0 in a box with
horizontal layers and flow along them; P1 elements contain it, so the error is round-off.
"""

from __future__ import annotations

import numpy as np
import pytest

from fe3d.case.builder import Layer, Material, box_case
from fe3d.pipeline import mesh_and_flow

pytestmark = pytest.mark.verification

DAY = 86400.0
LAYERS = [("sand", -3.0, 12.0, 1.2), ("clay", -4.5, 0.02, 0.004), ("gravel", -9.0, 55.0, 9.0)]
# Round-off scale: heads ~10 m, conditioning of a few-thousand-node Laplacian with a
# 3000x conductivity contrast; 1e-10 m is the stated bound (~1e6 machine epsilons
# times the head scale), comfortably above what a direct solve reaches (~1e-13).
HEAD_ATOL = 1e-10


def _case(**kwargs):
    """The box with LAYERS (name, bottom [m], K_h [m/d], K_v [m/d]) from the top at 0 m."""
    return box_case(layers=[Layer(n, b, Material(kh, kv)) for n, b, kh, kv in LAYERS],
                    **kwargs)


def _thickness(layers: list[tuple[str, float, float, float]]) -> list[float]:
    tops = [0.0] + [b for _, b, _, _ in layers[:-1]]
    return [t - b for t, (_, b, _, _) in zip(tops, layers, strict=True)]


def test_linear_head_between_fixed_heads_is_exact():
    """Head is linear in x in every layer (exact solution contained in P1)."""
    case = _case(length=120.0, width=30.0, heads={"west": 10.0, "east": 7.0}, cell=12.0,
                 dz=1.5)
    site, flow = mesh_and_flow(case)
    x = site.points[0]
    exact = 10.0 - 3.0 * x / 120.0
    err = np.max(np.abs(flow.head - exact))
    assert err <= HEAD_ATOL, f"max head error {err:.3e} m"
    # Darcy flux in each layer is K_h * gradient, along x only
    qx_expected = site.cell_layer.choose([k * 3.0 / 120.0 / DAY for _, _, k, _ in LAYERS])
    np.testing.assert_allclose(flow.darcy_flux[0], qx_expected, rtol=1e-8)
    assert np.max(np.abs(flow.darcy_flux[1:])) <= 1e-8 * np.max(np.abs(qx_expected))


def test_flow_parallel_to_layers_gives_arithmetic_mean():
    """Q = K_arith · A · Δh / L with K_arith = Σ K_i b_i / Σ b_i (Freeze & Cherry 1979)."""
    case = _case(length=120.0, width=30.0, heads={"west": 10.0, "east": 7.0}, cell=12.0,
                 dz=1.5)
    _, flow = mesh_and_flow(case)
    b = _thickness(LAYERS)
    k_arith = sum(k * t for (_, _, k, _), t in zip(LAYERS, b, strict=True)) / sum(b) / DAY
    q_expected = k_arith * (30.0 * sum(b)) * 3.0 / 120.0
    west = next(f for f in flow.budget if f.name == "west")
    assert west.inflow == pytest.approx(q_expected, rel=1e-10)
    assert flow.discrepancy <= 1e-10


def test_flow_across_layers_gives_harmonic_mean():
    """Q = K_harm · A · Δh / B with K_harm = Σ b_i / Σ (b_i / K_v,i) (Freeze & Cherry 1979)."""
    case = _case(length=40.0, width=30.0, heads={"top": 10.0, "bottom": 6.0}, cell=10.0,
                 dz=1.0)
    site, flow = mesh_and_flow(case)
    b = _thickness(LAYERS)
    k_harm = sum(b) / sum(t / kv for (_, _, _, kv), t in zip(LAYERS, b, strict=True)) / DAY
    q_expected = k_harm * (40.0 * 30.0) * 4.0 / sum(b)
    top = next(f for f in flow.budget if f.name == "top")
    assert top.inflow == pytest.approx(q_expected, rel=1e-10)
    assert flow.discrepancy <= 1e-10
    # head is piecewise linear in z with kinks at the interfaces: check one interface value
    z = site.points[2]
    h_interface = 10.0 - 4.0 * (b[0] / LAYERS[0][3]) / sum(t / kv for (_, _, _, kv), t in
                                                            zip(LAYERS, b, strict=True))
    at_iface = np.isclose(z, LAYERS[0][1])
    np.testing.assert_allclose(flow.head[at_iface], h_interface, atol=HEAD_ATOL)


def test_budget_closes_on_demo_like_heterogeneous_case():
    """Budget discrepancy ≤ 1e-10 (design target for the consistent residual flux)."""
    case = _case(length=200.0, width=80.0, heads={"west": 10.0, "north": 8.0, "east": 7.5},
                 cell=15.0, dz=2.0)
    _, flow = mesh_and_flow(case)
    assert flow.total_inflow > 0
    assert flow.discrepancy <= 1e-10
