"""Rate laws, their derivatives, parameter checks and user kinetics loaded by name."""

from __future__ import annotations

import functools
import math
import sys
import textwrap
import uuid

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from fe3d.errors import CaseError
from fe3d.reactions.kinetics import (
    decay_rate,
    first_order,
    make_first_order,
    make_monod,
    make_second_order,
    monod,
    second_order,
    user_kinetics,
)

concentrations = st.one_of(
    st.just(0.0),
    st.floats(min_value=-15.0, max_value=1.0).map(lambda e: 10.0**e),
    st.floats(min_value=0.0, max_value=10.0).map(lambda c: c if c > 1e-30 else 0.0),
)
FD_RTOL, FD_ATOL = 1e-6, 1e-20
"""Central difference, step h = 1e-6 c (1e-21 at c = 0); these laws are smooth (C¹ at 0 and
polynomial or rational elsewhere), so the truncation error is O(h²) ≈ 1e-12 relative; the
round-off of the quotient, 8 ε |r|/h, is added (it dominates for Monod when c ≫ K_s)."""


def _check(fun, c: float) -> None:
    h = 1e-6 * c if c > 0.0 else 1e-21
    fd = (fun(np.array([c + h]))[0][0] - fun(np.array([c - h]))[0][0]) / (2.0 * h)
    r, exact = (v[0] for v in fun(np.array([c])))
    round_off = 8.0 * np.finfo(float).eps * abs(r) / h
    assert abs(fd - exact) <= FD_RTOL * abs(exact) + round_off + FD_ATOL, (c, fd, exact)


@settings(max_examples=150, deadline=None)
@given(c=concentrations, k=st.floats(min_value=0.0, max_value=1e-3))
def test_first_and_second_order_derivatives(c, k):
    """r = −λc and r = −kc² (Fetter 1999, Contaminant Hydrogeology, ch. 3 and 7, from
    memory): dr/dc against a central difference, FD_RTOL."""
    _check(functools.partial(first_order, rate=k), c)
    _check(functools.partial(second_order, rate=k), c)


@settings(max_examples=150, deadline=None)
@given(c=concentrations, mu=st.floats(min_value=0.0, max_value=1e-3),
       ks=st.floats(min_value=1e-6, max_value=10.0))
def test_monod_derivative(c, mu, ks):
    """r = −μ_max c/(K_s + c) (Monod 1949, Annu. Rev. Microbiol. 3, 371, from memory):
    dr/dc against a central difference, FD_RTOL."""
    _check(functools.partial(monod, max_rate=mu, half_saturation=ks), c)


def test_negative_concentrations_do_not_grow():
    """Below zero each loss law gives r ≥ 0 (pulls back to zero) and stays C¹ at 0 (design
    rule R8, R9; common practice, no source)."""
    c = np.array([-1e-3, -1e-8])
    assert np.all(second_order(c, 2.0)[0] > 0.0)
    assert np.all(monod(c, 1e-5, 1e-2)[0] > 0.0)
    np.testing.assert_allclose(monod(c, 1e-5, 1e-2)[1], -1e-5 / 1e-2, rtol=1e-14)
    assert second_order(np.array([0.0]), 2.0)[1][0] == 0.0


def test_half_life_gives_ln2_over_half_life():
    """λ = ln 2 / T½ (definition of half-life; e.g. Freeze & Cherry 1979, ch. 9)."""
    assert decay_rate(key_path="k", half_life=3.0e7) == pytest.approx(math.log(2) / 3.0e7,
                                                                       rel=1e-15)
    law = make_first_order(key_path="k", half_life=10.0)
    r, _ = law(np.array([1.0]))
    np.testing.assert_allclose(r, -math.log(2) / 10.0, rtol=1e-15)


@pytest.mark.parametrize(("build", "key"), [
    (lambda: decay_rate(key_path="reactions.tce", rate=-1e-8), "reactions.tce.rate"),
    (lambda: decay_rate(key_path="reactions.tce", half_life=0.0), "reactions.tce.half_life"),
    (lambda: decay_rate(key_path="reactions.tce"), "reactions.tce"),
    (lambda: decay_rate(key_path="reactions.tce", rate=1.0, half_life=1.0), "reactions.tce"),
    (lambda: make_second_order(key_path="reactions.b", rate=-2.0), "reactions.b.rate"),
    (lambda: make_second_order(key_path="reactions.b", rate=math.nan), "reactions.b.rate"),
    (lambda: make_monod(key_path="reactions.m", max_rate=-1.0, half_saturation=1.0),
     "reactions.m.max_rate"),
    (lambda: make_monod(key_path="reactions.m", max_rate=1.0, half_saturation=0.0),
     "reactions.m.half_saturation"),
])
def test_bad_rate_parameters_give_one_line(build, key):
    """Negative rates, a half-life ≤ 0, NaN: one line naming the key path (behaviour
    requirement of issue 5, no source)."""
    with pytest.raises(CaseError) as err:
        build()
    assert err.value.key_path == key
    assert "\n" not in str(err.value)
    assert str(err.value).startswith(key)


# --- user kinetics ------------------------------------------------------------------------

GOOD = """
import numpy as np

def rates(c):
    # species 0 decays first order into species 1 (yield 1)
    k = 1e-3
    r = np.stack([-k * c[0], k * c[0]])
    jac = np.zeros((2, 2, c.shape[1]))
    jac[0, 0] = -k
    jac[1, 0] = k
    return r, jac

def diagonal(c):
    return -2e-3 * c, -2e-3 * np.ones_like(c)

def wrong_shape(c):
    return c[:1], np.zeros((2, 2, c.shape[1]))

def wrong_jacobian(c):
    return -c, np.zeros((3, c.shape[1]))

def not_a_pair(c):
    return -c

def two_args(c, t):
    return -c, -np.ones_like(c)

def divides_by_c(c):
    return -1.0 / c, np.ones_like(c)

def raises(c):
    raise RuntimeError("boom\\nsecond line")

NOT_CALLABLE = 3
"""


@pytest.fixture
def kin_module(tmp_path):
    """A user module in its own folder under a unique name; removed from sys.modules after."""
    name = f"plume_kinetics_{uuid.uuid4().hex[:8]}"
    (tmp_path / f"{name}.py").write_text(textwrap.dedent(GOOD))
    yield name, tmp_path
    sys.modules.pop(name, None)


def test_user_kinetics_full_and_diagonal(kin_module):
    """A valid user function is loaded by name (importlib, no eval) and wrapped; the
    diagonal form is expanded to the full Jacobian. Values checked exactly against the
    function's own formula."""
    name, folder = kin_module
    f = user_kinetics(f"{name}:rates", n_species=2, key_path="reactions.user",
                      search_dirs=[folder])
    c = np.array([[1.0, 2.0], [0.0, 0.5]])
    r, jac = f(c)
    np.testing.assert_allclose(r, [[-1e-3, -2e-3], [1e-3, 2e-3]])
    assert jac.shape == (2, 2, 2) and jac[1, 0, 1] == 1e-3
    assert str(folder) not in sys.path
    g = user_kinetics(f"{name}:diagonal", n_species=2, key_path="reactions.user",
                      search_dirs=[folder])
    _, jac = g(c)
    np.testing.assert_allclose(jac[0, 0], -2e-3)
    assert np.all(jac[0, 1] == 0.0)


@pytest.mark.parametrize(("target", "fragment"), [
    ("no_such_module_fe3d_xyz:rates", "cannot be imported (ModuleNotFoundError"),
    ("{m}:missing", "has no 'missing'"),
    ("{m}:NOT_CALLABLE", "is not a function"),
    ("{m}:wrong_shape", "rates must have shape (n_species, n_points) = (2, 4), got (1, 4)"),
    ("{m}:wrong_jacobian", "derivatives must have shape (2, 2, 4)"),
    ("{m}:not_a_pair", "must return a pair"),
    ("{m}:two_args", "must take one argument"),
    ("{m}:divides_by_c", "non-finite"),
    ("{m}:raises", "failed on a probe input (RuntimeError: boom)"),
    ("{m}.rates", "give the function as 'module:function'"),
    ("{m}:", "give the function as 'module:function'"),
    ("a:b:c", "give the function as 'module:function'"),
])
def test_bad_user_kinetics_give_one_line(kin_module, target, fragment):
    """Unimportable module, missing or non-callable attribute, wrong signature, wrong output
    shape, non-finite output, exception: a CaseError with one line naming the key path
    (behaviour requirement of issue 5, no source)."""
    name, folder = kin_module
    spec = target.format(m=name)
    with pytest.raises(CaseError) as err:
        user_kinetics(spec, n_species=2, key_path="species.tce.user_kinetics",
                      search_dirs=[folder])
    text = str(err.value)
    assert "\n" not in text
    assert text.startswith("species.tce.user_kinetics = ")
    assert fragment in text, text


def test_module_with_syntax_error_gives_one_line(tmp_path):
    """A module that fails while importing (syntax error): one line, import error named."""
    name = f"plume_broken_{uuid.uuid4().hex[:8]}"
    (tmp_path / f"{name}.py").write_text("def rates(c:\n    return c\n")
    with pytest.raises(CaseError) as err:
        user_kinetics(f"{name}:rates", n_species=1, key_path="k", search_dirs=[tmp_path])
    assert "\n" not in str(err.value)
    assert "SyntaxError" in str(err.value)
    sys.modules.pop(name, None)
