"""Sorption isotherms: exact derivatives, regularisation near zero, retardation (no mesh)."""

from __future__ import annotations

import functools

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from fe3d.reactions.sorption import (
    FREUNDLICH_C_EPS,
    freundlich,
    langmuir,
    linear,
    retardation,
    sorbed_decay,
)

# c ≥ 0 over 16 decades (log-uniform), uniform on [0, 10] and exact zero [kg/m³]
# (values below 1e-30 become 0: a difference quotient needs h = 1e-6 c to be a normal float).
concentrations = st.one_of(
    st.just(0.0),
    st.floats(min_value=-15.0, max_value=1.0).map(lambda e: 10.0**e),
    st.floats(min_value=0.0, max_value=10.0).map(lambda c: c if c > 1e-30 else 0.0),
)

FD_RTOL = 1e-5
"""Central differences with step h = 1e-6 c (1e-21 at c = 0): truncation O(h²) in smooth parts,
O(h·jump of s'') ≈ 5e-6 relative at the Freundlich switch c_eps, round-off ≈ 1e-10/N.
Absolute floor FD_ATOL = 1e-15 m³/kg (changes R by < 1e-11): at c = 0 with N > 1 the slope is
0 and the one-sided curvature gives a difference of K_F h/2."""
FD_ATOL = 1e-15


def _central_difference(fun, c: float) -> float:
    h = 1e-6 * c if c > 0.0 else 1e-21
    return float((fun(np.array([c + h]))[0][0] - fun(np.array([c - h]))[0][0]) / (2.0 * h))


def _check_derivative(fun, c: float) -> None:
    fd = _central_difference(fun, c)
    exact = float(fun(np.array([c]))[1][0])
    assert np.isfinite(exact)
    assert abs(fd - exact) <= FD_RTOL * abs(exact) + FD_ATOL, (c, fd, exact)


@settings(max_examples=200, deadline=None)
@given(c=concentrations, kd=st.floats(min_value=0.0, max_value=1.0))
def test_linear_derivative(c, kd):
    """s = K_d c (Fetter, Contaminant Hydrogeology, 2nd ed. 1999, ch. 3, from memory):
    ds/dc against a central difference, relative tolerance FD_RTOL."""
    _check_derivative(functools.partial(linear, kd=kd), c)


@settings(max_examples=300, deadline=None)
@given(c=concentrations, k_f=st.floats(min_value=1e-6, max_value=1.0),
       n=st.floats(min_value=0.2, max_value=2.0))
def test_freundlich_derivative(c, k_f, n):
    """s = K_F c^N (Freundlich 1909, Kapillarchemie; as given by Fetter 1999, ch. 3, from
    memory), including the C¹ quadratic below c_eps for N < 1: ds/dc against a central
    difference, relative tolerance FD_RTOL. At c = 0 with N > 1, s'' is unbounded and a
    difference quotient is off by K_F h^(N−1)/2, so there the exact value 0 is checked."""
    if c == 0.0 and n > 1.0:
        assert freundlich(np.array([0.0]), k_f, n)[1][0] == 0.0
        return
    _check_derivative(functools.partial(freundlich, k_f=k_f, n=n), c)


@settings(max_examples=200, deadline=None)
@given(c=concentrations, s_max=st.floats(min_value=1e-6, max_value=1e-2),
       k_l=st.floats(min_value=1e-3, max_value=1e3))
def test_langmuir_derivative(c, s_max, k_l):
    """s = S_max K_L c/(1 + K_L c) (Langmuir 1918, J. Am. Chem. Soc. 40, 1361; form as in
    Fetter 1999, ch. 3, from memory): ds/dc against a central difference, FD_RTOL."""
    _check_derivative(functools.partial(langmuir, s_max=s_max, k_l=k_l), c)


def test_freundlich_regularisation_is_c1_and_increasing():
    """Below c_eps (N < 1) the quadratic matches value and slope of the power law at c_eps,
    is 0 at 0, increases, and has a finite slope at 0 (design rule R2; common practice)."""
    k_f, n, eps = 2e-3, 0.5, FREUNDLICH_C_EPS
    s_lo, ds_lo = freundlich(np.array([eps * (1 - 1e-12)]), k_f, n)
    s_hi, ds_hi = freundlich(np.array([eps]), k_f, n)
    np.testing.assert_allclose(s_lo, s_hi, rtol=1e-10)
    np.testing.assert_allclose(ds_lo, ds_hi, rtol=1e-9)
    np.testing.assert_allclose(s_hi, k_f * eps**n, rtol=1e-14)
    c = np.linspace(0.0, eps, 101)
    s, ds = freundlich(c, k_f, n)
    assert s[0] == 0.0
    assert np.all(np.diff(s) > 0.0) and np.all(ds > 0.0) and np.all(np.isfinite(ds))
    np.testing.assert_allclose(ds[0], (2 - n) * k_f * eps ** (n - 1), rtol=1e-14)


@pytest.mark.parametrize("iso", [
    functools.partial(linear, kd=3e-4),
    functools.partial(freundlich, k_f=1e-3, n=0.6),
    functools.partial(freundlich, k_f=1e-3, n=1.4),
    functools.partial(langmuir, s_max=1e-3, k_l=50.0),
])
def test_negative_concentrations_continue_linearly(iso):
    """Below zero s = s'(0) c: finite, continuous, C¹ at 0 (design rule R4, common
    practice, no source)."""
    c = np.array([-1e-3, -1e-9, 0.0])
    s, ds = iso(c)
    assert np.all(np.isfinite(s)) and np.all(np.isfinite(ds))
    np.testing.assert_allclose(ds[:2], ds[2], rtol=1e-14)
    np.testing.assert_allclose(s[:2], ds[2] * c[:2], rtol=1e-14)


def test_linear_retardation_is_the_classical_constant():
    """R = 1 + ρ_b K_d/θ (Freeze & Cherry 1979, Groundwater, ch. 9), at any c."""
    c = np.array([0.0, 1e-6, 1.0])
    r = retardation(c, functools.partial(linear, kd=2e-4), bulk_density=1700.0, porosity=0.3)
    np.testing.assert_allclose(r, 1.0 + 1700.0 * 2e-4 / 0.3, rtol=1e-15)


def test_langmuir_retardation_falls_with_concentration():
    """R(c) = 1 + (ρ_b/θ) S_max K_L/(1 + K_L c)² (Fetter 1999, ch. 3, from memory): equals
    the linear value S_max K_L at c = 0 and falls monotonically."""
    iso = functools.partial(langmuir, s_max=1e-3, k_l=20.0)
    c = np.linspace(0.0, 1.0, 50)
    r = retardation(c, iso, bulk_density=1600.0, porosity=0.25)
    np.testing.assert_allclose(r[0], 1.0 + 1600.0 / 0.25 * 1e-3 * 20.0, rtol=1e-14)
    assert np.all(np.diff(r) < 0.0)


def test_sorbed_decay_rate_and_derivative():
    """r_s = −λ ρ_b s(c), dr_s/dc = −λ ρ_b ds/dc (definition R6); derivative by central
    difference within FD_RTOL."""
    iso = functools.partial(langmuir, s_max=1e-3, k_l=20.0)
    law = functools.partial(sorbed_decay, isotherm=iso, rate=1e-8, bulk_density=1600.0)
    r, _ = law(np.array([0.05]))
    np.testing.assert_allclose(r, -1e-8 * 1600.0 * iso(np.array([0.05]))[0], rtol=1e-15)
    for c in (0.0, 1e-5, 0.05, 2.0):
        _check_derivative(law, c)
