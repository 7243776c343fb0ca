"""Latin hypercube samples of the uncertain values, with rank correlations imposed.

References: McKay, M.D., Beckman, R.J. & Conover, W.J. (1979), *A comparison of three
methods for selecting values of input variables in the analysis of output from a computer
code*, Technometrics 21, 239–245 (Latin hypercube sampling, here scipy.stats.qmc); Iman,
R.L. & Conover, W.J. (1982), *A distribution-free approach to inducing rank correlation
among input variables*, Commun. Statist. Simul. Comput. 11, 311–334 (the rank method).

Iman & Conover rearrange each column of the sample so its ranks follow those of a matrix
of van der Waerden scores Φ⁻¹(i/(n+1)) whose correlation has been made the target. The
rearrangement only permutes values within a column, so each marginal keeps its Latin
hypercube strata exactly. The target given to the scores is the Pearson correlation of a
bivariate normal with the declared rank (Spearman) correlation ρ_s, ρ = 2 sin(π ρ_s / 6)
(Pearson's relation for the normal distribution, recalled from memory); with it the ranks
reach ρ_s up to sampling error instead of the slightly smaller value the scores would give.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats
from scipy.stats import qmc

from fe3d._typing import FloatArray
from fe3d.case.uncertain import UncertainInputs, UncertainValue, correlation_matrix
from fe3d.errors import CaseError

__all__ = ["Sample", "draw_sample", "impose_rank_correlation", "quantile"]


@dataclass(frozen=True)
class Sample:
    """The drawn values of every member: ``values[m, k]`` is member m's value of
    ``names[k]`` in ``units[k]`` (as the case declares them), shape ``(n_members, n_values)``;
    ``seed`` is the one the sample was drawn with."""

    names: tuple[str, ...]
    units: tuple[str, ...]
    values: FloatArray
    seed: int


def quantile(value: UncertainValue, u: FloatArray) -> FloatArray:
    """The declared distribution's quantile function at probabilities ``u`` in (0, 1).

    Truncated normal and lognormal values keep their shape inside [low, high]. A value
    without spread returns its centre exactly (no arithmetic touches it).
    """
    u = np.asarray(u, dtype=float)
    if value.is_fixed:
        return np.full(u.shape, value.centre)
    lo = -np.inf if value.low is None else value.low
    hi = np.inf if value.high is None else value.high
    if value.distribution == "normal":
        assert value.mean is not None and value.std_dev is not None
        m, s = value.mean, value.std_dev
        return m + s * stats.truncnorm.ppf(u, (lo - m) / s, (hi - m) / s)
    if value.distribution == "lognormal":
        assert value.median is not None and value.ln_std_dev is not None
        med, s = value.median, value.ln_std_dev
        a = -np.inf if lo <= 0 else np.log(lo / med) / s
        b = np.log(hi / med) / s
        return med * np.exp(s * stats.truncnorm.ppf(u, a, b))
    if value.distribution == "uniform":
        return lo + u * (hi - lo)
    assert value.mode is not None
    return stats.triang.ppf(u, (value.mode - lo) / (hi - lo), loc=lo, scale=hi - lo)


def _scores_correlation(rank_correlation: FloatArray) -> FloatArray:
    """Pearson correlation of normal scores that gives the rank correlation (module doc)."""
    return 2.0 * np.sin(np.pi * rank_correlation / 6.0)


def impose_rank_correlation(sample: FloatArray, target: FloatArray,
                            rng: np.random.Generator) -> FloatArray:
    """Rearrange each column of ``sample`` so its rank correlation approaches ``target``.

    Parameters
    ----------
    sample
        Values, shape ``(n, d)`` with n > d; each column is only permuted.
    target
        Rank correlation matrix, shape ``(d, d)``, positive definite.
    rng
        Random source for the initial order of the scores.

    Returns
    -------
    FloatArray
        The rearranged sample, shape ``(n, d)`` (Iman & Conover 1982, Section 3).
    """
    n, d = sample.shape
    base = stats.norm.ppf(np.arange(1, n + 1) / (n + 1))
    scores = np.column_stack([rng.permutation(base) for _ in range(d)])
    p = np.linalg.cholesky(_scores_correlation(target))
    q = np.linalg.cholesky(np.corrcoef(scores, rowvar=False))
    # scores whose correlation is the target: S Q⁻ᵀ Pᵀ
    wanted = np.linalg.solve(q, scores.T).T @ p.T
    out = np.empty_like(sample)
    for k in range(d):
        order = np.argsort(np.argsort(wanted[:, k], kind="stable"), kind="stable")
        out[:, k] = np.sort(sample[:, k])[order]
    return out


def draw_sample(inputs: UncertainInputs, n_members: int) -> Sample:
    """A Latin hypercube sample of ``n_members`` members of the declared distributions, with
    the declared rank correlations; the same seed and size give the same sample.

    Raises
    ------
    CaseError
        When correlations are declared and there are not more members than values (the
        rank method needs an invertible score correlation).
    """
    values = inputs.values
    d = len(values)
    rng = np.random.default_rng(inputs.seed)
    u = qmc.LatinHypercube(d=d, rng=rng).random(n_members)  # in (0, 1), one per stratum
    sample = np.column_stack([quantile(v, u[:, k]) for k, v in enumerate(values)])
    spread = [k for k, v in enumerate(values) if not v.is_fixed]
    if inputs.correlations and n_members <= len(spread):
        msg = (f"needs more members than uncertain values with a spread ({len(spread)}) to "
               "impose the rank correlations")
        err = CaseError("--members", n_members, msg)
        raise err
    if len(spread) >= 2 and n_members > len(spread):
        target = correlation_matrix(inputs)[np.ix_(spread, spread)]
        sample[:, spread] = impose_rank_correlation(sample[:, spread], target, rng)
    return Sample(tuple(v.name for v in values), tuple(v.unit for v in values), sample,
                  inputs.seed)
