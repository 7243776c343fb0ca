"""A continuous point source at site resolution with fe3d's defaults: first times, and the
plume's concentration along its centre line.

A leak of 10 g/d at a point in the middle of a 20 m sand (v = 0.5 m/d, α_L 5 m, α_T 0.5 m,
α_V 0.05 m: a common site's ratios 1 : 0.1 : 0.01), half-life 1 yr, switched on at t = 0,
site cells (20 m plan cells, 2 m layers) and otherwise fe3d's defaults (no solver options,
no ``time.step``, the plume corridor on). Receptors on the centre line 50, 100, 200 and
300 m downstream at the source's depth; limit 0.01 mg/L; 2,500 d (the plume is steady at
every receptor by then).

Reference: the growing plume of a continuous point source in uniform flow with first-order
decay (Carslaw & Jaeger 1959, *Conduction of heat in solids*, §10.4; Wexler 1992, USGS TWRI
3-B7; Hunt 1978 for its steady limit; from memory), with the images of the no-flux top,
base and sides (``_point_source.py``). The formula is checked here against a numerical time
integral of the instantaneous point source and against its steady limit before it is used.

Tolerances. First time above the limit: 10 % of exact (issue 11's criterion at site
resolution). Concentration at the end: the default mesh reads a thin plume low (the corridor
sizes plan cells by α_L, so 10 m cells hold a plume 7 m wide (σ_T) at 50 m; theory.md M4),
so this is not held to a fixed share: the check is that the error is the discretisation's,
i.e. it shrinks at every receptor when the layers are halved (common practice, no source),
and that nothing falls below zero beyond the solver tolerance (issue 11). Measured when
written (36,423 nodes, layers 1.12 m from σ_V at the 50 m receptor, 515 steps at plume
Courant ≤ 0.91, 9 s): first times +3.3, +0.9, +1.2, +0.8 % against exact (36.1, 106.9,
286.7, 498.4 d); centre line at the end −15.6, −11.0, −8.1, −4.9 % against exact at 50, 100,
200, 300 m (halved layers, 70,966 nodes: −13.4, −9.0, −6.6, −3.6 %; the plan cells are then
what is left); with the layers sized at half the corridor length as before this test was
written (2 m, 21 k nodes) −27, −21, −16, −11 %. Lowest value −2e-29 mg/L; mass budget
8e-10.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from _point_source import mirrored, point_source, point_source_growing
from scipy.integrate import quad
from scipy.optimize import brentq

from fe3d.case.builder import (
    Layer,
    Material,
    ObservationPoint,
    Source,
    Species,
    Time,
    box_case,
    with_changes,
)
from fe3d.pipeline import run_case

pytestmark = pytest.mark.verification

DAY = 86400.0
THETA = 0.25
V = 0.5  # seepage velocity [m/d]
ALPHA = (5.0, 0.5, 0.05)  # α_L, α_T, α_V [m]
HALF_LIFE = 365.0  # [d]
RATE = 10.0  # [g/d]
LIMIT = 0.01  # [mg/L]
WIDTH, DEPTH, LENGTH = 200.0, 20.0, 600.0
SOURCE = (50.0, 100.0, -10.0)
DOWN = (50.0, 100.0, 200.0, 300.0)
END = 2500.0  # [d]
PARAMS = {"porosity": THETA, "velocity": V / DAY,
          "dispersion": tuple(a * V / DAY for a in ALPHA),
          "decay": math.log(2.0) / (HALF_LIFE * DAY)}


def exact(distance: float, t_days: float) -> float:
    """Centre-line concentration [mg/L] ``distance`` [m] downstream at ``t_days``, with the
    images of the no-flux faces."""
    target = np.array([[SOURCE[0] + distance], [SOURCE[1]], [SOURCE[2]]])
    c = mirrored(target, np.array(SOURCE)[:, None], np.array([RATE * 1e-3 / DAY]),
                 y_walls=(0.0, WIDTH), z_walls=(-DEPTH, 0.0), n_images=2,
                 kernel=point_source_growing, time=t_days * DAY, **PARAMS)
    return 1000.0 * float(c[0])


def test_growing_plume_is_the_time_integral_of_the_instantaneous_source() -> None:
    """The closed form against quadrature of exp(−λt/R) (4πt)^{-3/2} (D'_xD'_yD'_z)^{-1/2}
    exp(−(x − ut)²/4D'_x t − y²/4D'_y t − z²/4D'_z t) (D' = D/R, u = v/R) to rtol 1e-9, at
    R = 1.3 and four points and times; and its late-time limit against the steady formula
    to rtol 1e-12."""
    r = 1.3
    v, (dx, dy, dz), lam = PARAMS["velocity"], PARAMS["dispersion"], PARAMS["decay"]
    m = RATE * 1e-3 / DAY

    def kernel(x: float, y: float, z: float, tau: float) -> float:
        a, b, c = dx / r, dy / r, dz / r
        return (m / (THETA * r) * math.exp(-lam * tau / r)
                / ((4.0 * math.pi * tau) ** 1.5 * math.sqrt(a * b * c))
                * math.exp(-(x - v * tau / r) ** 2 / (4 * a * tau) - y * y / (4 * b * tau)
                           - z * z / (4 * c * tau)))

    for x, y, z, t in [(50.0, 0.0, 0.0, 100.0), (100.0, 3.0, 0.5, 300.0),
                       (300.0, 0.0, 0.0, 900.0), (20.0, -2.0, 0.2, 30.0)]:
        numeric = quad(lambda tau, x=x, y=y, z=z: kernel(x, y, z, tau), 0.0, t * DAY,
                       limit=400, epsabs=0.0, epsrel=1e-11)[0]
        closed = point_source_growing(np.array(x), np.array(y), np.array(z), time=t * DAY,
                                      retardation=r, mass_rate=m, **PARAMS)
        assert float(closed) == pytest.approx(numeric, rel=1e-9)
    x = np.array([50.0, 300.0])
    late = point_source_growing(x, 0 * x, 0 * x, time=1e6 * DAY, retardation=r, mass_rate=m,
                                **PARAMS)
    np.testing.assert_allclose(late, point_source(x, 0 * x, 0 * x, mass_rate=m, **PARAMS),
                               rtol=1e-12)


def _case():
    k = V * THETA * LENGTH / 4.0  # K [m/d] for a 4 m head drop over the length
    sand = Material(k, k, porosity=THETA, longitudinal_dispersivity=ALPHA[0],
                    transverse_dispersivity=ALPHA[1],
                    options={"vertical_dispersivity": f"{ALPHA[2]} m",
                             "diffusion_coefficient": "0 m^2/s"})
    return box_case(
        length=LENGTH, width=WIDTH, cell=20.0, dz=2.0, heads={"west": 4.0, "east": 0.0},
        layers=[Layer("sand", -DEPTH, sand)],
        species=[Species("solvent", limit=LIMIT, half_life=HALF_LIFE)],
        sources=[Source("leak", species="solvent", shape="point", kind="mass_loading",
                        mass_rate=RATE, points=[SOURCE])],
        observation_points=[ObservationPoint(f"R{d:g}", x=SOURCE[0] + d, y=SOURCE[1],
                                             z=SOURCE[2]) for d in DOWN],
        time=Time(END, step=None, output_interval=500.0))


def _ends(folder) -> dict[str, float]:
    """Concentration [mg/L] of every receptor at the last step (histories.csv)."""
    import csv

    with (folder / "histories.csv").open() as f:
        rows = list(csv.DictReader(f))
    return {f"R{d:g}": float(next(v for k, v in rows[-1].items() if k.startswith(f"R{d:g}")))
            for d in DOWN}


@pytest.mark.slow
def test_point_source_at_site_resolution_with_the_defaults(tmp_path) -> None:
    case = _case()
    run_case(case, tmp_path / "default", compact=True)
    summary = json.loads((tmp_path / "default" / "summary.json").read_text())
    layers = json.loads((tmp_path / "default" / "mesh.json").read_text())
    thickness = layers["corridor"]["layer_thickness"]["sand"]
    assert summary["min_concentration"]["solvent"] >= -1e-10 * summary["extremes"][
        "solvent"]["highest"]
    for o in summary["observations"]:
        d = float(o["name"][1:])
        first = brentq(lambda t, d=d: exact(d, t) - LIMIT, 1.0, END, xtol=1e-6)
        assert o["first_above_limit"] / DAY == pytest.approx(first, rel=0.10), o["name"]
    finer = with_changes(case, mesh={"layer_cell_thickness": f"{thickness / 2} m"})
    run_case(finer, tmp_path / "finer", compact=True)
    coarse, fine = _ends(tmp_path / "default"), _ends(tmp_path / "finer")
    for d in DOWN:
        name, c = f"R{d:g}", exact(d, END)
        assert abs(fine[name] - c) < abs(coarse[name] - c), (name, coarse[name], fine[name], c)
