"""Weak-form terms of the advection–dispersion–decay equation, one term each (theory.md T)."""

from __future__ import annotations

from typing import Any

from skfem import BilinearForm, LinearForm
from skfem.helpers import dot, grad, mul

__all__ = [
    "advection",
    "decay",
    "dispersion",
    "outflow",
    "outflow_weight",
    "shock_diffusion",
    "storage",
    "supg_advection",
    "supg_decay",
    "supg_storage",
]


@BilinearForm
def storage(u: Any, v: Any, w: Any) -> Any:
    r"""Storage :math:`\int_\Omega \theta R\, c\, v\,dx` (theory.md T1)."""
    return w.m * u * v


@BilinearForm
def advection(u: Any, v: Any, w: Any) -> Any:
    r"""Advection, conservative form :math:`-\int_\Omega c\,q\cdot\nabla v\,dx` (theory.md T2)."""
    return -u * dot(w.q, grad(v))


@BilinearForm
def outflow(u: Any, v: Any, w: Any) -> Any:
    r"""Advective outflow :math:`\int_{\Gamma_h} (q\cdot n)^+ c\, v\,ds` (theory.md T3)."""
    return w.qn * u * v


@LinearForm
def outflow_weight(v: Any, w: Any) -> Any:
    r"""Outflow per unit concentration :math:`\int_{\Gamma_h}(q\cdot n)^+ v\,ds` (theory.md T3)."""
    return w.qn * v


@BilinearForm
def dispersion(u: Any, v: Any, w: Any) -> Any:
    r"""Dispersion :math:`\int_\Omega \theta D\nabla c\cdot\nabla v\,dx` (theory.md T4)."""
    return dot(mul(w.thetaD, grad(u)), grad(v))


@BilinearForm
def decay(u: Any, v: Any, w: Any) -> Any:
    r"""First-order decay :math:`\int_\Omega k\, c\, v\,dx`, k = θλ(R or 1) (theory.md T5)."""
    return w.k * u * v


@BilinearForm
def supg_storage(u: Any, v: Any, w: Any) -> Any:
    r"""SUPG storage :math:`\int_\Omega \tau (a\cdot\nabla v)\,\theta R\, c\,dx` (theory.md T6)."""
    return w.tau * dot(w.a, grad(v)) * w.m * u


@BilinearForm
def supg_advection(u: Any, v: Any, w: Any) -> Any:
    r"""SUPG advection :math:`\int_\Omega\tau(a\cdot\nabla v)(q\cdot\nabla c)dx` (theory.md T6)."""
    return w.tau * dot(w.a, grad(v)) * dot(w.q, grad(u))


@BilinearForm
def supg_decay(u: Any, v: Any, w: Any) -> Any:
    r"""SUPG decay :math:`\int_\Omega \tau (a\cdot\nabla v)\, k\, c\,dx` (theory.md T6)."""
    return w.tau * dot(w.a, grad(v)) * w.k * u


@BilinearForm
def shock_diffusion(u: Any, v: Any, w: Any) -> Any:
    r"""Shock-capturing diffusion :math:`\sum_e\int_{\Omega_e} \nu_e \nabla c\cdot\nabla v\,dx`
    (theory.md T15); ``w.nu`` [m²/s] per cell."""
    return w.nu * dot(grad(u), grad(v))
