"""Decay networks with yields: parent → daughter links between species.

A link (parent p, daughter d, yield y) means: each kilogram of p lost by its own reaction
makes y kilograms of d (y = branching fraction × molar mass of d / molar mass of p). With
per-species loss rates r_p ≤ 0 the reaction vector is

    R_i = r_i − Σ_{links p→i} y_{p→i} r_p,   i.e.  R = (I − P) r,  P[d, p] = y_{p→d}

(theory.md R11), and its Jacobian is (I − P) ∂r/∂c (R12). For first-order laws r = −k c this
is the linear system dc/dt = A c with A = −(I − P) diag(k) (R13), whose solution for a
sequential chain is given by Bateman (1910).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp

from fe3d._typing import FloatArray
from fe3d.errors import CaseError

__all__ = ["DecayNetwork", "chain_matrix"]


def _check_non_negative(key_path: str, values: Sequence[float], what: str) -> FloatArray:
    arr = np.asarray(values, dtype=float)
    if arr.ndim != 1:
        raise CaseError(key_path, list(values), f"{what} must be a list of numbers")
    for i, v in enumerate(arr):
        if not math.isfinite(v) or v < 0.0:
            where = f"{key_path}[{i}]"
            raise CaseError(where, float(v), f"{what} must be finite and ≥ 0")
    return arr


def chain_matrix(
    rates: Sequence[float], yields: Sequence[float], *, key_path: str = "reactions.chain",
    sparse: bool = False,
) -> FloatArray | sp.csr_matrix:
    """Rate matrix A of a sequential first-order chain, dc/dt = A c (R13).

    ``rates`` k_1 … k_n [1/s] ≥ 0 for the n members (parent first); ``yields`` y_1 … y_{n−1}
    ≥ 0, y_i being the mass of member i+1 made per mass of member i decayed. A is lower
    bidiagonal: A[i, i] = −k_i, A[i+1, i] = y_i k_i. Negative or non-finite values and a
    wrong number of yields raise :class:`CaseError` naming ``<key_path>.rates[i]`` /
    ``<key_path>.yields[i]``.
    """
    rates_key, yields_key = f"{key_path}.rates", f"{key_path}.yields"
    k = _check_non_negative(rates_key, rates, "decay rates")
    y = _check_non_negative(yields_key, yields, "yields")
    if k.size == 0:
        raise CaseError(rates_key, list(rates), "a chain needs at least one member")
    if y.size != k.size - 1:
        raise CaseError(yields_key, list(yields),
                        f"a chain of {k.size} members needs {k.size - 1} yields")
    a = np.diag(-k)
    idx = np.arange(k.size - 1)
    a[idx + 1, idx] = y * k[:-1]
    return sp.csr_matrix(a) if sparse else a


@dataclass(frozen=True)
class DecayNetwork:
    """Species linked by parent → daughter yields; build with :meth:`from_links`.

    ``production[d, p]`` = y_{p→d} (the matrix P of R11).
    """

    species: tuple[str, ...]
    production: FloatArray

    @classmethod
    def from_links(
        cls, species: Sequence[str], links: Sequence[tuple[str, str, float]], *,
        key_path: str = "reactions.links",
    ) -> DecayNetwork:
        """Check the links (known species, no self-link, no repeated link, yield ≥ 0).

        Each problem raises :class:`CaseError` naming ``<key_path>[i]`` in one line.
        """
        names = tuple(species)
        if len(set(names)) != len(names):
            raise CaseError(key_path, list(names), "species names must be unique")
        index = {name: i for i, name in enumerate(names)}
        prod = np.zeros((len(names), len(names)))
        seen: set[tuple[str, str]] = set()
        for i, link in enumerate(links):
            where = f"{key_path}[{i}]"
            if len(link) != 3:
                raise CaseError(where, link, "a link is (parent, daughter, yield)")
            parent, daughter, y = link
            for name in (parent, daughter):
                if name not in index:
                    raise CaseError(where, name,
                                    f"unknown species; known species: {', '.join(names)}")
            if parent == daughter:
                raise CaseError(where, parent, "a species cannot be its own daughter")
            if (parent, daughter) in seen:
                raise CaseError(where, f"{parent} -> {daughter}", "this link is given twice")
            seen.add((parent, daughter))
            yv = float(y)
            if not math.isfinite(yv) or yv < 0.0:
                where_yield = f"{where}.yield"
                raise CaseError(where_yield, y, "a yield must be finite and ≥ 0")
            prod[index[daughter], index[parent]] = yv
        return cls(species=names, production=prod)

    def reactions(
        self, r: FloatArray, dr_dc: FloatArray,
    ) -> tuple[FloatArray, FloatArray]:
        """Reaction vector R = (I − P) r and Jacobian J = (I − P) ∂r/∂c at points (R11, R12).

        ``r`` has shape (n_species, n_points): each species' own rate (≤ 0 for a loss).
        ``dr_dc`` is (n_species, n_points) when each r_i depends only on c_i, or the full
        (n_species, n_species, n_points). Returns R (n, p) and J (n, n, p) with
        J[i, j] = ∂R_i/∂c_j.
        """
        r = np.asarray(r, dtype=float)
        dr = np.asarray(dr_dc, dtype=float)
        n = len(self.species)
        if r.ndim != 2 or r.shape[0] != n:
            msg = f"rates must have shape ({n}, n_points), got {r.shape}"
            raise ValueError(msg)
        g = np.eye(n) - self.production
        big_r = g @ r
        if dr.shape == r.shape:
            jac = g[:, :, None] * dr[None, :, :]
        elif dr.shape == (n, n, r.shape[1]):
            jac = np.einsum("ik,kjp->ijp", g, dr)
        else:
            msg = f"derivatives must have shape {r.shape} or {(n, n, r.shape[1])}, got {dr.shape}"
            raise ValueError(msg)
        return big_r, jac

    def first_order_matrix(self, rates: Sequence[float], *,
                           key_path: str = "reactions.rates") -> FloatArray:
        """A = −(I − P) diag(k) for first-order laws (R13); rates k_i ≥ 0 [1/s]."""
        k = _check_non_negative(key_path, rates, "decay rates")
        if k.size != len(self.species):
            raise CaseError(key_path, list(rates),
                            f"give one rate per species ({len(self.species)})")
        return -(np.eye(k.size) - self.production) * k[None, :]
