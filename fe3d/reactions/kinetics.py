"""Reaction rate laws at points: the rate and its exact derivative.

A rate law returns ``(r, dr_dc)``: r is the rate of change of the dissolved concentration
caused by the reaction [kg/(m³ water · s)] (negative for a loss) and dr_dc its derivative
[1/s]. Multiply by the porosity θ to get a rate per bulk volume (theory.md R7–R10).

Negative concentrations (SUPG undershoots) are handled so that a reaction never pushes a
negative value further down: second-order uses r = −k c|c|, Monod continues linearly with
its slope at zero (R7–R9; common practice, no source).

Parameters are checked by the ``make_*`` factories, which raise :class:`CaseError` with the
key path of the offending value; the plain functions assume valid parameters.
"""

from __future__ import annotations

import functools
import importlib
import inspect
import math
import sys
from collections.abc import Callable, Sequence
from pathlib import Path

import numpy as np

from fe3d._typing import FloatArray
from fe3d.errors import CaseError

__all__ = [
    "RateLaw",
    "UserKinetics",
    "decay_rate",
    "first_order",
    "make_first_order",
    "make_monod",
    "make_second_order",
    "monod",
    "second_order",
    "user_kinetics",
]

RateLaw = Callable[[FloatArray], tuple[FloatArray, FloatArray]]
"""A single-species rate law with its parameters bound: c ↦ (r, dr/dc)."""

UserKinetics = Callable[[FloatArray], tuple[FloatArray, FloatArray]]
"""A validated user function: c (n_species, n_points) ↦ (r (n, p), J (n, n, p))."""


def first_order(c: FloatArray, rate: float | FloatArray) -> tuple[FloatArray, FloatArray]:
    """First-order decay (R7): r = −λ c, dr/dc = −λ, with λ = ``rate`` [1/s]."""
    c = np.asarray(c, dtype=float)
    lam = np.broadcast_to(np.asarray(rate, dtype=float), c.shape)
    return -lam * c, -np.array(lam, dtype=float)


def second_order(c: FloatArray, rate: float | FloatArray) -> tuple[FloatArray, FloatArray]:
    """Second-order decay in one species (R8): r = −k c², dr/dc = −2 k c.

    ``rate`` is k [m³/(kg · s)]. For c < 0 the law is continued as r = −k c|c| (odd, C¹), so
    a negative undershoot decays back towards zero instead of growing.
    """
    c = np.asarray(c, dtype=float)
    k = np.asarray(rate, dtype=float)
    return -k * c * np.abs(c), -2.0 * k * np.abs(c)


def monod(
    c: FloatArray, max_rate: float | FloatArray, half_saturation: float | FloatArray,
) -> tuple[FloatArray, FloatArray]:
    """Monod (saturating) degradation (R9): r = −μ_max c/(K_s + c), dr/dc = −μ_max K_s/(K_s + c)².

    ``max_rate`` μ_max [kg/(m³ · s)] is the largest loss rate (reached for c ≫ K_s);
    ``half_saturation`` K_s [kg/m³] > 0 is the concentration at half that rate. For c < 0 the
    law is continued linearly with the slope −μ_max/K_s at zero.
    """
    c = np.asarray(c, dtype=float)
    mu = np.asarray(max_rate, dtype=float)
    ks = np.asarray(half_saturation, dtype=float)
    cp = np.maximum(c, 0.0)
    denom = ks + cp
    r = np.where(c >= 0.0, -mu * cp / denom, -mu * c / ks)
    return r, -mu * ks / (denom * denom)


# --- validated factories -------------------------------------------------------------


def _non_negative(key_path: str, value: float, what: str) -> float:
    v = float(value)
    if not math.isfinite(v) or v < 0.0:
        raise CaseError(key_path, value, f"{what} must be a finite number ≥ 0")
    return v


def _positive(key_path: str, value: float, what: str) -> float:
    v = float(value)
    if not math.isfinite(v) or v <= 0.0:
        raise CaseError(key_path, value, f"{what} must be a finite number > 0")
    return v


def decay_rate(
    *, key_path: str, rate: float | None = None, half_life: float | None = None,
) -> float:
    """The first-order rate λ [1/s] from either a rate or a half-life (λ = ln 2 / T½).

    Exactly one must be given; a negative rate or a half-life ≤ 0 raises :class:`CaseError`
    naming ``key_path`` (``<key_path>.rate`` or ``<key_path>.half_life``).
    """
    if (rate is None) == (half_life is None):
        raise CaseError(key_path, {"rate": rate, "half_life": half_life},
                        "give exactly one of rate or half_life")
    if rate is not None:
        return _non_negative(f"{key_path}.rate", rate, "a decay rate")
    assert half_life is not None
    return math.log(2.0) / _positive(f"{key_path}.half_life", half_life, "a half-life")


def make_first_order(
    *, key_path: str, rate: float | None = None, half_life: float | None = None,
) -> RateLaw:
    """First-order law (R7) with λ from :func:`decay_rate`."""
    return functools.partial(first_order, rate=decay_rate(key_path=key_path, rate=rate,
                                                          half_life=half_life))


def make_second_order(*, key_path: str, rate: float) -> RateLaw:
    """Second-order law (R8); ``rate`` k ≥ 0 [m³/(kg · s)]."""
    return functools.partial(second_order,
                             rate=_non_negative(f"{key_path}.rate", rate, "a rate constant"))


def make_monod(*, key_path: str, max_rate: float, half_saturation: float) -> RateLaw:
    """Monod law (R9); ``max_rate`` ≥ 0, ``half_saturation`` > 0."""
    mu = _non_negative(f"{key_path}.max_rate", max_rate, "a maximum rate")
    ks = _positive(f"{key_path}.half_saturation", half_saturation,
                   "a half-saturation concentration")
    return functools.partial(monod, max_rate=mu, half_saturation=ks)


# --- user kinetics ---------------------------------------------------------------------

_PROBE = np.array([0.0, 1e-6, 1e-3, 1.0])  # kg/m³: zero, µg/L, mg/L, g/L


def _one_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return f"{type(exc).__name__}: {text[0]}" if text else type(exc).__name__


def _checked_output(
    out: object, n_species: int, n_points: int, key_path: str, spec: str,
) -> tuple[FloatArray, FloatArray]:
    """Rates and full Jacobian from a user function's output, or a one-line CaseError."""
    if not isinstance(out, tuple | list) or len(out) != 2:
        raise CaseError(key_path, spec, "the function must return a pair (rates, derivatives)")
    try:
        r = np.asarray(out[0], dtype=float)
        jac = np.asarray(out[1], dtype=float)
    except (TypeError, ValueError) as exc:
        raise CaseError(key_path, spec,
                        f"the function must return numeric arrays ({_one_line(exc)})") from exc
    n, p = n_species, n_points
    if r.shape != (n, p):
        raise CaseError(key_path, spec,
                        f"rates must have shape (n_species, n_points) = {(n, p)}, got {r.shape}")
    if jac.shape == (n, p):  # uncoupled: diagonal derivatives only
        full = np.zeros((n, n, p))
        full[np.arange(n), np.arange(n)] = jac
        jac = full
    elif jac.shape != (n, n, p):
        raise CaseError(key_path, spec,
                        f"derivatives must have shape {(n, n, p)} (or {(n, p)} when each rate "
                        f"depends only on its own species), got {jac.shape}")
    if not (np.all(np.isfinite(r)) and np.all(np.isfinite(jac))):
        raise CaseError(key_path, spec,
                        "the function returned a non-finite rate or derivative")
    return r, jac


def user_kinetics(
    spec: str, *, n_species: int, key_path: str, search_dirs: Sequence[Path] = (),
) -> UserKinetics:
    """Load user rate laws named ``"module:function"`` (R10); never evaluates a string.

    The module is imported with :func:`importlib.import_module` (``search_dirs``, e.g. the
    case folder, are put at the front of ``sys.path`` during the import only). The function
    must accept one argument, the concentrations ``c`` with shape (n_species, n_points)
    [kg/m³], and return ``(r, dr_dc)``: r with the same shape [kg/(m³ · s)] and dr_dc either
    the full Jacobian (n_species, n_species, n_points), dr_dc[i, j] = ∂r_i/∂c_j, or
    (n_species, n_points) when each rate depends only on its own species.

    It is called once on a probe (every species at 0, 1e-6, 1e-3 and 1 kg/m³); a module that
    cannot be imported, a missing or non-callable attribute, a wrong signature, an exception,
    wrong shapes or non-finite values raise :class:`CaseError` naming ``key_path`` in one
    line. The returned wrapper checks the shapes on every call and always gives the full
    Jacobian.
    """
    if not isinstance(spec, str) or spec.count(":") != 1:
        raise CaseError(key_path, spec, "give the function as 'module:function'")
    module_name, attr_path = (part.strip() for part in spec.split(":"))
    if not module_name or not attr_path:
        raise CaseError(key_path, spec, "give the function as 'module:function'")
    added = [str(Path(d)) for d in search_dirs]
    sys.path[:0] = added
    try:
        module = importlib.import_module(module_name)
    except Exception as exc:  # any failure while importing user code is a case problem
        raise CaseError(key_path, spec,
                        f"module {module_name!r} cannot be imported ({_one_line(exc)})") from exc
    finally:
        for d in added:
            sys.path.remove(d)
    obj: object = module
    for part in attr_path.split("."):
        if not hasattr(obj, part):
            raise CaseError(key_path, spec, f"module {module_name!r} has no {attr_path!r}")
        obj = getattr(obj, part)
    if not callable(obj):
        raise CaseError(key_path, spec, f"{attr_path!r} is not a function")
    func: Callable[[FloatArray], object] = obj
    try:
        inspect.signature(func).bind(np.zeros((n_species, 1)))
    except TypeError as exc:
        raise CaseError(key_path, spec,
                        "the function must take one argument, the concentrations") from exc
    except ValueError:  # no signature available (some builtins): rely on the probe call
        pass
    probe = np.tile(_PROBE, (n_species, 1))
    try:
        with np.errstate(all="ignore"):
            out = func(probe.copy())
    except Exception as exc:  # user code: report the failure in one line
        raise CaseError(key_path, spec,
                        f"the function failed on a probe input ({_one_line(exc)})") from exc
    _checked_output(out, n_species, probe.shape[1], key_path, spec)

    def wrapped(c: FloatArray) -> tuple[FloatArray, FloatArray]:
        c = np.asarray(c, dtype=float)
        if c.ndim != 2 or c.shape[0] != n_species:
            msg = f"expected concentrations of shape ({n_species}, n_points), got {c.shape}"
            raise ValueError(msg)
        return _checked_output(func(c), n_species, c.shape[1], key_path, spec)

    return wrapped
