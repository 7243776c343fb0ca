"""Receptors (fe3d/post/receptors.py): the water a well pumps and the mass leaving a face.

References:

- The concentration of the water a screen draws is the mean over the screen weighted by the
  flow each part gives; fe3d splits a well's rate over its screen in proportion to
  conductivity × length (theory.md F7; common practice, no source). For c linear in depth
  in units of conductivity K_k, the exact weighted mean is ∫K c dz / ∫K dz over the screen
  (calculus: each unit contributes K_k L_k c(z_k), z_k the middle of its part).
- The transport's own mass budget (theory.md T9): over a step of the θ-scheme the outflow
  term of an item is Δt Σ_j Q_j (ϑ c_j(t₁) + (1 − ϑ) c_j(t₀)), with the nodal outflow Q_j the
  receptor uses. Without the bounded scheme's correction the mass flux of the receptor at
  the step's ends therefore reproduces the budget's term to round-off.
"""

from __future__ import annotations

import itertools
from pathlib import Path

import numpy as np
import pytest

from fe3d.case.builder import Layer, Material, Time, box_case, with_changes
from fe3d.case.load import load_case
from fe3d.case.parts import FlowInputs, TransportInputs
from fe3d.flow.solve import solve_flow
from fe3d.mesh.build import build_mesh
from fe3d.pipeline import mesh_and_flow
from fe3d.post.receptors import receptors_of
from fe3d.transport.run import run_transport

pytestmark = pytest.mark.verification

EPS = np.finfo(float).eps
DAY = 86400.0
TINY = Path(__file__).parents[2] / "cases" / "tiny" / "case.toml"


def test_pumped_concentration_of_a_field_linear_in_depth_is_the_weighted_mean():
    """A screen from −1 m to −8 m across two units, K = 5 m/d above −4 m and 20 m/d below,
    and c = 2 + 0.3 z mg/L at the nodes: the receptor's flux-averaged concentration equals
    c at the K-weighted mean depth of the screen, z̄ = (5·3·(−2.5) + 20·4·(−6)) / (5·3 + 20·4)
    = −5.447 m (exact integral). Round-off: a weighted sum of ~60 terms, 1e3 ε relative. The
    receptor's water rate is the well's rate (the flow solve's split sums to it)."""
    well = {"name": "PW", "x": "50 m", "y": "20 m", "screens": [["-1 m", "-8 m"]],
            "rate": "40 m^3/d", "kind": "extraction"}
    case = box_case(length=100.0, width=40.0, cell=10.0, dz=1.0, fine_cell=4.0,
                    fine_radius=5.0, heads={"west": 1.0, "east": 0.0}, time=Time(1.0, 1.0),
                    layers=[Layer("upper", -4.0, Material(5.0, vertical_conductivity=5.0)),
                            Layer("lower", -10.0, Material(20.0, vertical_conductivity=20.0))],
                    sections={"wells": [well]})
    site = build_mesh(case)
    flow = solve_flow(site, FlowInputs.of(case))
    (pw,) = [r for r in receptors_of(site, flow) if r.name == "PW"]
    assert pw.kind == "well"
    assert pw.water_rate == pytest.approx(40.0 / DAY, rel=1e3 * EPS)
    conc = 2e-3 + 0.3e-3 * site.points[2]  # kg/m³
    z_mean = (5 * 3 * -2.5 + 20 * 4 * -6.0) / (5 * 3 + 20 * 4)
    assert pw.flux_averaged(conc) == pytest.approx(2e-3 + 0.3e-3 * z_mean, rel=1e3 * EPS)


@pytest.mark.parametrize(("scheme", "weight"), [("backward_euler", 1.0),
                                                ("crank_nicolson", 0.5)])
def test_mass_flux_of_each_receptor_is_the_budgets_outflow_term(scheme, weight):
    """The tiny case with a pumping well and a stream zone on the top face (stage 4 m,
    below the head there, so water leaves into it), SUPG without the bounded correction, an
    output at every step: for the well, the stream and the east face (fixed head, water
    leaving), the budget's
    cumulative outflow grows over each step by Δt (ϑ F(t₁) + (1 − ϑ) F(t₀)), F the
    receptor's mass flux. Tolerance 1e-10 of the largest step increment (the issue's bound;
    the round-off of a cumulative sum of ~40 terms is ~40 ε of it)."""
    pump = {"name": "fence_pump", "x": "40 m", "y": "10 m", "screens": [["4 m", "2 m"]],
            "rate": "3 m^3/d"}
    creek = {"name": "creek", "kind": "stream", "stage": "4 m", "leakance": "0.1 d^-1",
             "zone": [["44 m", "0 m"], ["56 m", "0 m"], ["56 m", "20 m"], ["44 m", "20 m"]]}
    case = with_changes(load_case(TINY), wells=[pump], head_dependent=[creek],
                        time={"scheme": scheme, "end": "400 d", "step": "10 d",
                              "output_interval": "10 d"},
                        solver={"monotone": False})
    site, flow = mesh_and_flow(case)
    receptors = {r.name: r for r in receptors_of(site, flow)}
    assert {"fence_pump", "east", "creek"} <= set(receptors)
    assert receptors["creek"].kind == "stream"
    assert "west" not in receptors  # water enters there
    snaps = list(run_transport(site, flow, TransportInputs.of(case)))
    for name in ("fence_pump", "east", "creek"):
        r = receptors[name]
        steps = [(b.time - a.time,
                  b.budgets["tracer"].outflow[name] - a.budgets["tracer"].outflow[name],
                  weight * r.mass_flux(b.concentration["tracer"])
                  + (1 - weight) * r.mass_flux(a.concentration["tracer"]))
                 for a, b in itertools.pairwise(snaps)]
        scale = max(abs(d) for _, d, _ in steps)
        assert scale > 0.0, name  # the plume reaches the receptor
        worst = max(abs(d - dt * f) for dt, d, f in steps)
        assert worst <= 1e-10 * scale, (name, worst, scale)
