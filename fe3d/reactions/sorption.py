"""Equilibrium sorption isotherms: sorbed concentration and its exact derivative.

Units (SI, as everywhere in fe3d): dissolved concentration ``c`` [kg/m³ of water], sorbed
concentration ``s`` [kg sorbed per kg of solids], bulk density ρ_b [kg/m³], porosity θ [-].

Every isotherm is a pure function of an array ``c`` returning ``(s, ds_dc)`` with the same
shape. Negative concentrations (small undershoots are normal with SUPG) are continued
linearly with the slope at c = 0, so s and ds/dc stay finite and continuous there
(theory.md R4; common practice, no source).

First-order decay of the sorbed phase is a *rate*, not an isotherm: see
:func:`sorbed_decay`, which returns it per bulk volume together with its derivative.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from fe3d._typing import FloatArray

__all__ = [
    "FREUNDLICH_C_EPS",
    "Isotherm",
    "freundlich",
    "langmuir",
    "linear",
    "retardation",
    "sorbed_decay",
]

Isotherm = Callable[[FloatArray], tuple[FloatArray, FloatArray]]
"""An isotherm with its parameters bound, e.g. ``functools.partial(langmuir, s_max=…, k_l=…)``."""

FREUNDLICH_C_EPS = 1e-12
"""Default regularisation concentration for Freundlich with N < 1 [kg/m³] (1 pg/L).

Far below any regulatory limit (µg/L = 1e-6 kg/m³); chosen, not from a source."""


def linear(c: FloatArray, kd: float | FloatArray) -> tuple[FloatArray, FloatArray]:
    """Linear isotherm (R1): s = K_d c, ds/dc = K_d.

    ``kd`` is the distribution coefficient K_d [m³/kg].
    """
    c = np.asarray(c, dtype=float)
    kd_arr = np.broadcast_to(np.asarray(kd, dtype=float), c.shape)
    return kd_arr * c, np.array(kd_arr, dtype=float)


def freundlich(
    c: FloatArray, k_f: float | FloatArray, n: float | FloatArray, *,
    c_eps: float = FREUNDLICH_C_EPS,
) -> tuple[FloatArray, FloatArray]:
    """Freundlich isotherm (R2): s = K_F c^N, ds/dc = N K_F c^(N−1).

    ``k_f`` is K_F in SI units of c, i.e. [(kg/kg)/(kg/m³)^N]; ``n`` is the exponent N > 0.

    For N < 1 the derivative is unbounded at c = 0. Below ``c_eps`` the power law is then
    replaced by the quadratic s = a c + b c² with a = (2 − N) K_F c_eps^(N−1) and
    b = (N − 1) K_F c_eps^(N−2), which matches s and ds/dc at c_eps (C¹), passes through
    the origin and stays increasing (ds/dc goes from a at c = 0 down to N K_F c_eps^(N−1)).
    Regularising the power law near zero is common practice (no source); the quadratic is
    our choice. For N ≥ 1 nothing is regularised. Below zero s is continued linearly with
    the slope at zero (R4).
    """
    c = np.asarray(c, dtype=float)
    k_f_a = np.broadcast_to(np.asarray(k_f, dtype=float), c.shape)
    n_a = np.broadcast_to(np.asarray(n, dtype=float), c.shape)
    regularise = n_a < 1.0
    # Quadratic below c_eps (only where N < 1); slope at 0 for the negative continuation.
    a = np.where(regularise, (2.0 - n_a) * k_f_a * c_eps ** (n_a - 1.0), 0.0)
    b = np.where(regularise, (n_a - 1.0) * k_f_a * c_eps ** (n_a - 2.0), 0.0)
    slope0 = np.where(regularise, a, np.where(n_a == 1.0, k_f_a, 0.0))
    power_zone = c >= np.where(regularise, c_eps, 0.0)
    cp = np.where(power_zone, c, 1.0)  # keep the power law away from c ≤ 0
    s_pow = k_f_a * cp**n_a
    ds_pow = n_a * k_f_a * cp ** (n_a - 1.0)
    quad_zone = ~power_zone & (c >= 0.0)
    s = np.where(power_zone, s_pow, np.where(quad_zone, a * c + b * c * c, slope0 * c))
    ds = np.where(power_zone, ds_pow, np.where(quad_zone, a + 2.0 * b * c, slope0))
    return s, ds


def langmuir(
    c: FloatArray, s_max: float | FloatArray, k_l: float | FloatArray,
) -> tuple[FloatArray, FloatArray]:
    """Langmuir isotherm (R3): s = S_max K_L c/(1 + K_L c), ds/dc = S_max K_L/(1 + K_L c)².

    ``s_max`` is the sorption capacity S_max [kg/kg], ``k_l`` the affinity K_L [m³/kg].
    Below zero s is continued linearly with the slope S_max K_L at zero (R4).
    """
    c = np.asarray(c, dtype=float)
    s_max_a = np.broadcast_to(np.asarray(s_max, dtype=float), c.shape)
    k_l_a = np.broadcast_to(np.asarray(k_l, dtype=float), c.shape)
    cp = np.maximum(c, 0.0)
    denom = 1.0 + k_l_a * cp
    s = np.where(c >= 0.0, s_max_a * k_l_a * cp / denom, s_max_a * k_l_a * c)
    ds = s_max_a * k_l_a / (denom * denom)
    return s, ds


def retardation(
    c: FloatArray, isotherm: Isotherm, *, bulk_density: float | FloatArray,
    porosity: float | FloatArray,
) -> FloatArray:
    """Retardation factor R(c) = 1 + (ρ_b/θ) ds/dc (R5) for any isotherm.

    For the linear isotherm this is the constant 1 + ρ_b K_d/θ of theory.md T0. For
    nonlinear isotherms it is the *local* (tangent) factor: the speed at which a given
    concentration level moves, v/R(c), in smooth parts of a front.
    """
    _, ds = isotherm(np.asarray(c, dtype=float))
    return 1.0 + np.asarray(bulk_density, dtype=float) / np.asarray(porosity, dtype=float) * ds


def sorbed_decay(
    c: FloatArray, isotherm: Isotherm, *, rate: float | FloatArray,
    bulk_density: float | FloatArray,
) -> tuple[FloatArray, FloatArray]:
    """First-order loss of the sorbed phase per bulk volume (R6) and its derivative in c.

    r_s = −λ_s ρ_b s(c) [kg/(m³ bulk · s)], dr_s/dc = −λ_s ρ_b ds/dc, with λ_s = ``rate``
    [1/s] ≥ 0. Add it to θ times the dissolved-phase rate (R7–R9, which are per volume of
    water) to get the total reaction term per bulk volume.
    """
    s, ds = isotherm(np.asarray(c, dtype=float))
    factor = np.asarray(rate, dtype=float) * np.asarray(bulk_density, dtype=float)
    return -factor * s, -factor * ds
