"""Hydrodynamic dispersion tensor at cells or quadrature points; pure numpy."""

from __future__ import annotations

import numpy as np

from fe3d._typing import FloatArray

__all__ = ["dispersion_tensor"]


def dispersion_tensor(
    v: FloatArray, *, alpha_l: FloatArray, alpha_th: FloatArray, alpha_tv: FloatArray,
    d_eff: FloatArray,
) -> FloatArray:
    r"""Dispersion tensor with separate horizontal and vertical transverse dispersivities.

    Parameters
    ----------
    v
        Seepage velocity [m/s], shape ``(3, ...)``.
    alpha_l, alpha_th, alpha_tv
        Longitudinal, horizontal-transverse and vertical-transverse dispersivity [m],
        broadcastable to ``v[0]``.
    d_eff
        Effective molecular diffusion :math:`D_m\tau` [m²/s], broadcastable to ``v[0]``.

    Returns
    -------
    FloatArray
        :math:`D` [m²/s], shape ``(3, 3, ...)``, symmetric.

    Notes
    -----
    theory.md (T4): diagonal terms D_xx = (α_L v_x² + α_TH v_y² + α_TV v_z²)/|v| + D*,
    D_yy = (α_TH v_x² + α_L v_y² + α_TV v_z²)/|v| + D*, D_zz = (α_TV(v_x² + v_y²) + α_L v_z²)/|v|
    + D*; off-diagonal D_xy = (α_L − α_TH) v_x v_y/|v|, D_xz = (α_L − α_TV) v_x v_z/|v|,
    D_yz = (α_L − α_TV) v_y v_z/|v|. With α_TH = α_TV this is the usual
    α_T|v| I + (α_L − α_T) v vᵀ/|v| + D* I. Where v = 0 it returns D* I.
    """
    speed = np.sqrt(np.sum(v * v, axis=0))
    inv = np.divide(1.0, speed, out=np.zeros_like(speed), where=speed > 0)
    vx, vy, vz = v
    D = np.zeros((3, 3, *speed.shape))
    D[0, 0] = (alpha_l * vx**2 + alpha_th * vy**2 + alpha_tv * vz**2) * inv + d_eff
    D[1, 1] = (alpha_th * vx**2 + alpha_l * vy**2 + alpha_tv * vz**2) * inv + d_eff
    D[2, 2] = (alpha_tv * (vx**2 + vy**2) + alpha_l * vz**2) * inv + d_eff
    D[0, 1] = D[1, 0] = (alpha_l - alpha_th) * vx * vy * inv
    D[0, 2] = D[2, 0] = (alpha_l - alpha_tv) * vx * vz * inv
    D[1, 2] = D[2, 1] = (alpha_l - alpha_tv) * vy * vz * inv
    return D
