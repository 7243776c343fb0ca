"""Weak-form terms of steady Darcy flow (docs/theory.md, F-labels)."""

from __future__ import annotations

from typing import Any

from skfem import BilinearForm
from skfem.helpers import dot, grad, mul

__all__ = ["conductance"]


@BilinearForm
def conductance(u: Any, v: Any, w: Any) -> Any:
    r"""Darcy conductance :math:`\int_\Omega K\nabla h\cdot\nabla v\,dx` (theory.md F1)."""
    return dot(mul(w.K, grad(u)), grad(v))
