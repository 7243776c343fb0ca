"""Three-member sequential first-order decay chain with transport in a column.

Reference: Sun, Y., Petersen, J.N. & Clement, T.P. (1999), *Analytical solutions for
multiple species reactive transport in multiple dimensions*, J. Contaminant Hydrology 35,
429–440: with equal retardation and dispersion the substitution
a_i = c_i + Σ_{j<i} [Π_{l=j}^{i−1} y_l k_l/(k_l − k_i)] c_j turns the chain into independent
single-species problems with decay k_i, each solved by the constant-inlet solution of van
Genuchten & Alves (1982). The transformation is written from memory, so the test first
checks by finite differences that the reference satisfies the coupled equations. Tolerance
(issue criterion): each member within 2 % of its peak.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from test_column import _exp_erfc

from fe3d.case.builder import Layer, Material, Solver, Source, Species, Time, box_case
from fe3d.case.parts import TransportInputs
from fe3d.pipeline import mesh_and_flow
from fe3d.transport.run import run_transport

pytestmark = pytest.mark.verification

V, D, THETA, RHO_B, KD = 1.0, 1.0, 0.25, 1600.0, 6.25e-5  # m/d, m²/d, -, kg/m³, m³/kg
R = 1 + RHO_B * KD / THETA  # 1.4
K = [0.05, 0.03, 0.02]  # 1/d, both phases decay
Y = [0.8, 0.6]  # mass yields 1→2, 2→3
C0, T_END = 1.0, 40.0


def _single(x: np.ndarray, t: float, k: float) -> np.ndarray:
    """Constant-inlet solution (c/c_in) with decay μ = k R (van Genuchten & Alves 1982)."""
    mu = k * R
    u = V * math.sqrt(1 + 4 * mu * D / V**2)
    s = 2 * math.sqrt(D * R * t)
    return 0.5 * _exp_erfc((V - u) * x / (2 * D), (R * x - u * t) / s) + 0.5 * _exp_erfc(
        (V + u) * x / (2 * D), (R * x + u * t) / s)


def _coef(j: int, i: int) -> float:
    """Π_{l=j}^{i−1} y_l k_l/(k_l − k_i) (0-based members)."""
    return math.prod(Y[m] * K[m] / (K[m] - K[i]) for m in range(j, i))


def reference(x: np.ndarray, t: float) -> list[np.ndarray]:
    c: list[np.ndarray] = []
    for i in range(3):
        a = _coef(0, i) * C0 * _single(x, t, K[i])
        c.append(a - sum(_coef(j, i) * c[j] for j in range(i)))
    return c


def test_reference_chain_satisfies_the_coupled_equations():
    """R c_i,t = D c_i,xx − v c_i,x − k_i R c_i + y_{i−1} k_{i−1} R c_{i−1}, by central
    differences (step 1e-3: residual ≤ 1e-5)."""
    x, t, h = np.linspace(1.0, 40.0, 30), 25.0, 1e-3
    now, tp, tm = reference(x, t), reference(x, t + h), reference(x, t - h)
    xp, xm = reference(x + h, t), reference(x - h, t)
    for i in range(3):
        c_t = (tp[i] - tm[i]) / (2 * h)
        c_x = (xp[i] - xm[i]) / (2 * h)
        c_xx = (xp[i] - 2 * now[i] + xm[i]) / h**2
        gain = Y[i - 1] * K[i - 1] * R * now[i - 1] if i else 0.0
        res = R * c_t - (D * c_xx - V * c_x - K[i] * R * now[i] + gain)
        assert np.max(np.abs(res)) < 1e-5, (i, np.max(np.abs(res)))


@pytest.mark.slow
def test_three_member_chain_matches_the_analytical_solution():
    h = 0.5
    names = ["parent", "daughter", "granddaughter"]
    species = [Species(name, kd=KD * 1000, half_life=math.log(2) / K[i],
                       parent=names[i - 1] if i else None,
                       options={"yield_from_parent": Y[i - 1]} if i else {})
               for i, name in enumerate(names)]
    # first-type inlet for every member, as in the reference: the parent at c0, the others
    # held clean (c = 0)
    inlets = [Source(f"inlet_{name}", species=name, shape="face_patch", face="west",
                     concentration=c_in)
              for name, c_in in zip(names, ("1 kg/m^3", "0 kg/m^3", "0 kg/m^3"), strict=True)]
    case = box_case(
        length=100.0, width=h, cell=h, dz=h, heads={"west": 2.5, "east": 0.0},
        layers=[Layer("sand", -h, Material(10.0, 10.0, porosity=THETA, bulk_density=RHO_B))],
        species=species, sources=inlets, time=Time(T_END, 0.25, scheme="crank_nicolson"),
        solver=Solver(linear_solver="direct"))
    site, flow = mesh_and_flow(case)
    *_, last = run_transport(site, flow, TransportInputs.of(case))
    ref = reference(site.points[0], T_END)
    for i, name in enumerate(names):
        err = np.max(np.abs(last.concentration[name] - ref[i])) / ref[i].max()
        print(name, "max error / peak", err)
        assert err <= 0.02, (name, err)
        assert last.budgets[name].relative_error <= 1e-8
    # production is its own budget term (T12): each member makes yield × what its parent
    # lost to decay (the same decay rates summed, to round-off), none of it counted as
    # source input through the clean inlets' tiny exchange
    for i in (1, 2):
        made = last.budgets[names[i]].produced
        assert made == pytest.approx(Y[i - 1] * last.budgets[names[i - 1]].decayed, rel=1e-10)
        assert made > 10 * abs(last.budgets[names[i]].source_input)
