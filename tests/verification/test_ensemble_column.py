"""Ensembles on a 1D column against the Ogata & Banks solution, and against fe3d's own
deterministic run.

Reference: Ogata, A. & Banks, R.B. (1961), *A solution of the differential equation of
longitudinal dispersion in porous media*, USGS Professional Paper 411-A (constant
concentration c0 at the inlet of a semi-infinite column):

    c/c0 = ½ erfc[(x − vt)/(2√(Dt))] + ½ exp(vx/D) erfc[(x + vt)/(2√(Dt))],   D = α_L v.

With a lognormal conductivity K the seepage velocity v = K i/θ is lognormal with the same
ln-standard deviation, and c(x, t; v) grows with v at the point and time chosen here
(checked below), so the probability that c exceeds the limit L is P(V > v*) with
c(x, t; v*) = L: the integral of the lognormal density over v > v*, done here by quadrature.

Sampling: McKay, M.D., Beckman, R.J. & Conover, W.J. (1979), Technometrics 21, 239–245. With
one uncertain value, a Latin hypercube puts exactly one member in each of N equal-probability
strata, so the fraction of members above a threshold differs from its probability by less
than 1/N; the Monte Carlo standard error √(p(1−p)/N) of independent draws is larger.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
from scipy import integrate, stats
from scipy.optimize import brentq
from scipy.special import erfc, erfcx

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
from fe3d.case.schema import Case
from fe3d.pipeline import run_case
from fe3d.post.series_read import read_concentration_series, read_largest_over_run
from fe3d.studies.ensemble import run_ensemble
from fe3d.studies.ensemble_results import probability_fields, summarise_ensemble
from fe3d.studies.executors import SerialExecutor, StudyExecutor
from fe3d.studies.run_folder import read_histories

pytestmark = pytest.mark.verification

K_MEDIAN = 10.0  # [m/d]
GRADIENT = 1.0 / 40.0  # heads 1 m and 0 m over 40 m
POROSITY = 0.25
V_MEDIAN = K_MEDIAN * GRADIENT / POROSITY  # 1 m/d
ALPHA_L = 1.0  # [m]
LN_STD = 0.4
X_POINT, T_END = 8.0, 8.0  # [m], [d]
C0 = 1.0  # [kg/m³]
LIMIT = 0.5 * C0
H = 0.5  # cell size and thickness [m]: grid Péclet h/α_L = 0.5
N_MEMBERS = 16


def ogata_banks(x: float, t: float, v: float) -> float:
    """c/c0 of Ogata & Banks (1961) with D = α_L v (exp·erfc through erfcx: no overflow)."""
    d = ALPHA_L * v
    s = 2.0 * math.sqrt(d * t)
    b = (x + v * t) / s
    return 0.5 * erfc((x - v * t) / s) + 0.5 * math.exp(v * x / d - b * b) * erfcx(b)


def _column(uncertain: dict | None, *, k: float = K_MEDIAN) -> Case:
    sections = {} if uncertain is None else {"uncertain": uncertain}
    case = box_case(
        length=40.0, width=H, cell=H, dz=H, heads={"west": 1.0, "east": 0.0},
        layers=[Layer("sand", -H, Material(k, porosity=POROSITY,
                                             longitudinal_dispersivity=ALPHA_L))],
        species=[Species(limit=LIMIT * 1000.0)],  # mg/L
        sources=[Source("inlet", shape="face_patch", face="west",
                        concentration=f"{C0} kg/m^3")],
        observation_points=[ObservationPoint("P", X_POINT, H / 2, -H / 2)],
        time=Time(T_END, 0.125), sections=sections)
    # grid Péclet h/α_L = 0.5 everywhere already: the plume corridor would not refine
    return with_changes(case, mesh={"corridor": False})


def _serial() -> StudyExecutor:
    return StudyExecutor(SerialExecutor(), 1, "this process")


def test_reference_solution_satisfies_the_equation_and_grows_with_velocity():
    """Finite-difference residual of R=1 advection–dispersion ≤ 1e-5 (steps 1e-3: O(h²) ≈
    1e-6); c(x, t; v) increases with v over the sampled range (so P(c > L) = P(V > v*))."""
    v, hx, ht = 1.3, 1e-3, 1e-3
    xs = np.linspace(0.5, 20.0, 25)
    c = np.vectorize(lambda x, t: ogata_banks(x, t, v))
    t = 6.0
    c_t = (c(xs, t + ht) - c(xs, t - ht)) / (2 * ht)
    c_x = (c(xs + hx, t) - c(xs - hx, t)) / (2 * hx)
    c_xx = (c(xs + hx, t) - 2 * c(xs, t) + c(xs - hx, t)) / hx**2
    assert np.max(np.abs(c_t - (ALPHA_L * v * c_xx - v * c_x))) < 1e-5
    assert ogata_banks(1e-9, 3.0, v) == pytest.approx(1.0, abs=1e-6)
    vs = V_MEDIAN * np.exp(np.linspace(-4 * LN_STD, 4 * LN_STD, 200))
    assert np.all(np.diff([ogata_banks(X_POINT, T_END, x) for x in vs]) > 0)


def test_zero_variance_ensemble_equals_the_deterministic_run(tmp_path: Path):
    """Every member of an ensemble whose spreads are all zero has histories equal, value for
    value, to ``fe3d run`` of the case as written (both read from histories.csv, 8
    significant digits), and the probability field is that run's above-limit indicator at
    every node and output time: the ensemble machinery adds nothing."""
    zero = {"values": [
        {"name": "materials.sand.horizontal_conductivity", "distribution": "lognormal",
         "median": K_MEDIAN, "ln_std_dev": 0.0, "unit": "m/d"},
        {"name": "materials.sand.porosity", "distribution": "normal", "mean": POROSITY,
         "std_dev": 0.0, "low": 0.1}]}
    case = _column(zero)
    run_case(case, tmp_path / "run")
    times, history = read_histories(tmp_path / "run", case)
    ens = run_ensemble(case, tmp_path / "ensemble", n_members=3, executor=_serial())
    assert len(ens.results) == 3 and not ens.failures
    for member in ens.results:
        assert np.array_equal(member.times, times)
        assert np.array_equal(member.history["tracer"], history["tracer"])
    above = float(history["tracer"][-1, 0] > LIMIT)
    assert summarise_ensemble(ens).exceedance[0].probability[-1] == above
    # the probability field: at every node and output time, 1 where the run is above
    fields = probability_fields(ens)
    assert fields is not None and fields.n_members == 3
    out_times, series = read_concentration_series(
        tmp_path / "run", ["tracer"], time_unit="d", conc_unit="mg/L")
    assert np.array_equal(fields.output_times, out_times)
    assert np.array_equal(fields.at_times["tracer"], (series["tracer"] > LIMIT) * 1.0)
    assert fields.during_run["tracer"].max() == 1.0  # the inlet face is above the limit
    # during the run: 1 where the run's largest value over every step is above the limit
    largest = read_largest_over_run(tmp_path / "run", ["tracer"], conc_unit="mg/L")
    assert np.array_equal(fields.during_run["tracer"], (largest["tracer"] > LIMIT) * 1.0)
    assert np.all(fields.during_run["tracer"] >= fields.at_times["tracer"].max(axis=0))
    # members kept before the fields over every step (no ever_above arrays in their files)
    # count as above during the run where they were above at an output time
    members = sorted((tmp_path / "ensemble" / "members").glob("member_*.npz"))
    assert len(members) == 3
    for member in members:
        with np.load(member) as z:
            kept = {k: z[k] for k in z.files if not k.startswith("ever_above/")}
        np.savez(member, **kept)
    older = probability_fields(ens)
    assert older is not None
    assert np.array_equal(older.during_run["tracer"],
                          (series["tracer"] > LIMIT).any(axis=0) * 1.0)


@pytest.mark.slow
def test_exceedance_probability_matches_ogata_banks_over_lognormal_velocity(tmp_path: Path):
    """P(c(8 m, 8 d) > 0.5 c0) over 16 members with lognormal K (σ_ln 0.4) equals the
    probability from Ogata & Banks (1961) integrated over the lognormal velocity within
    1/N (one member per stratum, McKay et al. 1979) plus the discretisation's share; that
    is tighter than the three Monte Carlo standard errors 3√(p(1−p)/N) the issue asks for,
    which is asserted too.

    The discretisation's share is bounded by a separate deterministic run at the threshold
    velocity v*: its error |c_h(v*) − L| shifts the threshold by that over ∂c/∂v and the
    probability by the density of V times that shift (×2 for the linearisation, common
    practice, no source). The error itself is asserted ≤ 1 % of c0 (the column test's bound
    at grid Péclet ≤ 2, tests/verification/test_column.py). Measured when written: P 0.625
    from the members against 0.614, v* 0.89 m/d, c_h(v*) − L = 2.2e-3 c0, discretisation
    share 0.005.
    """
    v_star = brentq(lambda v: ogata_banks(X_POINT, T_END, v) - LIMIT / C0, 0.2, 5.0,
                    xtol=1e-12)
    velocity = stats.lognorm(s=LN_STD, scale=V_MEDIAN)
    p_ref, quad_err = integrate.quad(velocity.pdf, v_star, np.inf)
    assert quad_err < 1e-8
    assert p_ref == pytest.approx(velocity.sf(v_star), abs=1e-8)  # the quadrature itself

    # discretisation: the column at the threshold velocity
    k_star = v_star * POROSITY / GRADIENT
    run_case(_column(None, k=k_star), tmp_path / "threshold")
    _, history = read_histories(tmp_path / "threshold", _column(None, k=k_star))
    error = abs(history["tracer"][-1, 0] - LIMIT)
    assert error <= 0.01 * C0
    hv = 1e-4 * v_star
    slope = (ogata_banks(X_POINT, T_END, v_star + hv)
             - ogata_banks(X_POINT, T_END, v_star - hv)) / (2 * hv) * C0
    discretisation = 2.0 * velocity.pdf(v_star) * error / slope

    uncertain = {"seed": 11, "values": [
        {"name": "materials.sand.horizontal_conductivity", "distribution": "lognormal",
         "median": K_MEDIAN, "ln_std_dev": LN_STD, "unit": "m/d"}]}
    ens = run_ensemble(_column(uncertain), tmp_path / "ensemble", n_members=N_MEMBERS,
                       executor=_serial())
    assert len(ens.results) == N_MEMBERS, ens.failures
    p = summarise_ensemble(ens).exceedance[0].probability[-1]
    standard_error = math.sqrt(p_ref * (1 - p_ref) / N_MEMBERS)
    report = (f"P ensemble {p:.4f}, Ogata-Banks {p_ref:.4f}, v* {v_star:.4f} m/d, "
              f"c_h(v*) - L = {error:.2e} kg/m3, discretisation share {discretisation:.4f}")
    assert abs(p - p_ref) <= 1.0 / N_MEMBERS + discretisation, report
    assert abs(p - p_ref) <= 3.0 * standard_error, report
