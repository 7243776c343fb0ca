"""SUPG parameter τ per cell; pure numpy."""

from __future__ import annotations

import numpy as np

from fe3d._typing import FloatArray

__all__ = ["element_length_along_flow", "supg_tau"]


def element_length_along_flow(a: FloatArray, grads: FloatArray) -> FloatArray:
    """Element length in the flow direction, h = 2|a| / Σ_i |a·∇φ_i| [m] (theory.md T7).

    ``a`` has shape ``(3, n_cells)``; ``grads`` shape ``(n_cells, 4, 3)``. Where a = 0 the
    result falls back to 2 / max_i |∇φ_i| (twice the smallest height of the tetrahedron).
    """
    speed = np.sqrt(np.sum(a * a, axis=0))
    proj = np.abs(np.einsum("ke,eik->ei", a, grads)).sum(axis=1)
    fallback = 2.0 / np.sqrt((grads**2).sum(axis=2)).max(axis=1)
    return np.where(proj > 0, 2.0 * speed / np.where(proj > 0, proj, 1.0), fallback)


def supg_tau(
    a: FloatArray, kappa: FloatArray, sigma: FloatArray, h: FloatArray, dt: float,
) -> FloatArray:
    r"""Stabilisation time scale τ [s] per cell (theory.md T8).

    For the normalised equation :math:`c_t + a\cdot\nabla c - \nabla\cdot(\kappa\nabla c)
    + \sigma c = 0`:
    :math:`\tau = [(2/\Delta t)^2 + (2|a|/h)^2 + 9(4\kappa/h^2)^2 + \sigma^2]^{-1/2}`
    (the transient form of Shakib, Hughes & Johan 1991 and Tezduyar & Osawa 2000).

    Parameters
    ----------
    a
        Retarded advective velocity q/(θR) [m/s], shape ``(3, n)``.
    kappa
        Dispersion along the flow divided by R [m²/s], shape ``(n,)``.
    sigma
        Decay rate of the normalised equation [1/s], shape ``(n,)``.
    h
        Element length along the flow [m], shape ``(n,)``.
    dt
        Time step [s].
    """
    speed = np.sqrt(np.sum(a * a, axis=0))
    return 1.0 / np.sqrt((2.0 / dt) ** 2 + (2.0 * speed / h) ** 2
                         + 9.0 * (4.0 * kappa / h**2) ** 2 + sigma**2)
