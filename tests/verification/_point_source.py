"""Steady concentration around a continuous point source in uniform flow with decay.

References: Hunt, B. (1978), *Dispersive sources in uniform ground-water flow*, Journal of the
Hydraulics Division, ASCE 104(HY1), 75–85; Wexler, E.J. (1992), *Analytical solutions for
one-, two-, and three-dimensional solute transport in ground-water systems with uniform
flow*, USGS Techniques of Water-Resources Investigations, book 3, chapter B7 (the
continuous point source, whose long-time limit is the formula below). Both citations are
from memory; the formula is derived here and checked numerically by the tests in
``test_point_source_steady.py`` (PDE residual by finite differences, and the flux through
a shrinking box around the source), so it does not rest on the transcription.

Problem, in an unbounded medium with seepage velocity v along +x, porosity θ, principal
dispersion coefficients D_x, D_y, D_z (D_x = α_L v + D*, D_y = α_TH v + D*,
D_z = α_TV v + D*) and first-order decay λ of the dissolved phase::

    θ (v ∂c/∂x − D_x ∂²c/∂x² − D_y ∂²c/∂y² − D_z ∂²c/∂z² + λ c) = Ṁ δ(x) δ(y) δ(z),

c → 0 far away. Retardation does not appear: at steady state the storage term vanishes,
and with decay in the dissolved phase only the decay term is θλc whatever the sorption.

Derivation. Put c = exp(βx) u with β = v/(2D_x). Then
v c_x − D_x c_xx = exp(βx) (−D_x u_xx + (v²/(4D_x)) u), so the first-order term disappears:

    −D_x u_xx − D_y u_yy − D_z u_zz + (v²/(4D_x) + λ) u = (Ṁ/θ) δ(x) δ(y) δ(z)

(exp(−βx) δ(x) = δ(x)). Stretch the axes, X = x/√D_x, Y = y/√D_y, Z = z/√D_z: the
operator becomes −∇²_X + k² with k² = v²/(4D_x) + λ, and
δ(x)δ(y)δ(z) = δ(X)δ(Y)δ(Z)/√(D_x D_y D_z). The decaying fundamental solution of
−∇² + k² in 3D is exp(−kρ)/(4πρ) (the screened-Coulomb or Yukawa kernel), ρ = |X|. With the
stretched radius r' = √D_x ρ = √(x² + y² D_x/D_y + z² D_x/D_z)::

    c = Ṁ / (4π θ r' √(D_y D_z)) · exp( βx − r' √(β² + λ/D_x) ),   β = v/(2D_x).

Growing plume. With storage θR (retardation R, decay of the dissolved phase only) the
transient equation divided by θR is the same problem with u = v/R, D_i/R, λ/R and source
Ṁ/(θR); its solution from c = 0 at t = 0 is the time integral of the instantaneous point
source (Carslaw & Jaeger 1959, *Conduction of heat in solids*, §10.4, continuous point
source, with a moving medium; Wexler 1992 as above; from memory)::

    c = Ṁ / (8π θ r' √(D_y D_z)) · exp(βx) · [ exp(−r'w) erfc((r' − U t/R)/(2√(D_x t/R)))
                                             + exp(r'w) erfc((r' + U t/R)/(2√(D_x t/R))) ],

w = √(β² + λ/D_x), U = 2 D_x w = √(v² + 4λD_x); at t → ∞ the bracket tends to 2 exp(−r'w)
and c to the steady formula. :func:`point_source_growing` evaluates it, and
``test_site_defaults_point.py`` checks it against a numerical time integral of the
instantaneous source and against the steady formula before trusting it.

Image method. A plane x_i = const with no normal flux and the flow parallel to it is a
mirror: the solution for a source near it is the free-space solution of the source plus its
reflection. Between two parallel no-flux planes the images repeat with period twice the
gap. :func:`mirrored` sums them for the no-flux faces of a box.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import Any

import numpy as np

__all__ = ["mirrored", "point_source", "point_source_growing"]


def point_source(x: np.ndarray, y: np.ndarray, z: np.ndarray, *, mass_rate: float,
                 porosity: float, velocity: float, dispersion: tuple[float, float, float],
                 decay: float) -> np.ndarray:
    """Steady concentration [kg/m³] of a point source of ``mass_rate`` [kg/s] at the origin.

    ``x, y, z`` [m] are positions relative to the source (any matching shapes), ``velocity``
    [m/s] is the seepage velocity along +x, ``dispersion`` = (D_x, D_y, D_z) [m²/s] and
    ``decay`` = λ [1/s]. The value at the source itself is infinite.
    """
    dx, dy, dz = dispersion
    beta = velocity / (2.0 * dx)
    rate = math.sqrt(beta**2 + decay / dx)
    r = np.sqrt(x**2 + y**2 * (dx / dy) + z**2 * (dx / dz))
    with np.errstate(divide="ignore"):
        return mass_rate / (4.0 * math.pi * porosity * r * math.sqrt(dy * dz)) * np.exp(
            beta * x - r * rate)


def mirrored(targets: np.ndarray, sources: np.ndarray, weights: np.ndarray, *,
             y_walls: tuple[float, float], z_walls: tuple[float, float], n_images: int,
             kernel: Callable[..., np.ndarray] = point_source,
             **params: Any) -> np.ndarray:
    """Sum of point sources and their images in two pairs of no-flux planes.

    Parameters
    ----------
    targets
        Where the concentration is wanted [m], shape ``(3, k)``.
    sources
        Source positions [m], shape ``(3, s)``, between the walls.
    weights
        Mass rate of each source [kg/s], shape ``(s,)``.
    y_walls, z_walls
        The planes y = a, y = b and z = c, z = d [m] (no-flux, parallel to the flow).
    n_images
        Periods kept on each side: images at ±(y_s − a) + a + 2n(b − a) for |n| ≤ n_images,
        and the same in z, so (2 (2 n_images + 1))² copies of every source.
    kernel
        :func:`point_source` (steady) or :func:`point_source_growing` (give ``time``).
    params
        Keyword arguments of ``kernel`` except ``mass_rate``.
    """
    out = np.zeros(targets.shape[1])
    (ya, yb), (za, zb) = y_walls, z_walls
    shifts = range(-n_images, n_images + 1)
    for (xs, ys, zs), rate in zip(sources.T, weights, strict=True):
        y_img = [ya + s * (ys - ya) + 2 * n * (yb - ya) for n in shifts for s in (1, -1)]
        z_img = [za + s * (zs - za) + 2 * n * (zb - za) for n in shifts for s in (1, -1)]
        for yi in y_img:
            for zi in z_img:
                out += kernel(targets[0] - xs, targets[1] - yi, targets[2] - zi,
                              mass_rate=rate, **params)
    return out


def point_source_growing(x: np.ndarray, y: np.ndarray, z: np.ndarray, *, time: np.ndarray,
                         mass_rate: float, porosity: float, velocity: float,
                         dispersion: tuple[float, float, float], decay: float,
                         retardation: float = 1.0) -> np.ndarray:
    """Concentration [kg/m³] at ``time`` [s] (broadcast with the positions) of a point
    source of ``mass_rate`` [kg/s] at the origin switched on at t = 0 in clean water; the
    other arguments as :func:`point_source`, ``retardation`` R [-]. The second term is
    formed with the scaled complementary error function, so it never overflows."""
    from scipy.special import erfc, erfcx

    dx, dy, dz = dispersion
    beta = velocity / (2.0 * dx)
    w = math.sqrt(beta**2 + decay / dx)
    u = 2.0 * dx * w / retardation  # U/R
    r = np.sqrt(x**2 + y**2 * (dx / dy) + z**2 * (dx / dz))
    spread = 2.0 * np.sqrt(dx * time / retardation)
    b1, b2 = (r - u * time) / spread, (r + u * time) / spread
    with np.errstate(divide="ignore", over="ignore", invalid="ignore"):
        bracket = (np.exp(beta * x - r * w) * erfc(b1)
                   + erfcx(b2) * np.exp(beta * x + r * w - b2**2))
        return mass_rate / (8.0 * math.pi * porosity * r * math.sqrt(dy * dz)) * bracket
