"""Decay networks with yields: rate matrix, reaction vector and Jacobian, bad input."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp

from fe3d.errors import CaseError
from fe3d.reactions.chains import DecayNetwork, chain_matrix
from fe3d.reactions.kinetics import monod, second_order


def test_chain_matrix_is_the_sequential_decay_system():
    """dc1/dt = −k1 c1, dc2/dt = y1 k1 c1 − k2 c2, dc3/dt = y2 k2 c2 − k3 c3 (Bateman 1910,
    Proc. Cambridge Phil. Soc. 15, 423; yields as in Sun, Petersen & Clement 1999, J.
    Contam. Hydrol. 36, from memory). Exact entries; sparse form equal."""
    a = chain_matrix([0.3, 0.2, 0.1], [0.8, 0.5])
    expected = np.array([[-0.3, 0.0, 0.0], [0.8 * 0.3, -0.2, 0.0], [0.0, 0.5 * 0.2, -0.1]])
    np.testing.assert_array_equal(a, expected)
    s = chain_matrix([0.3, 0.2, 0.1], [0.8, 0.5], sparse=True)
    assert sp.issparse(s)
    np.testing.assert_array_equal(s.toarray(), expected)


def test_network_first_order_matrix_equals_chain_matrix():
    """The general network with links A→B→C reproduces the chain matrix (same definition)."""
    net = DecayNetwork.from_links(["A", "B", "C"], [("A", "B", 0.8), ("B", "C", 0.5)])
    np.testing.assert_allclose(net.first_order_matrix([0.3, 0.2, 0.1]),
                               chain_matrix([0.3, 0.2, 0.1], [0.8, 0.5]), rtol=1e-15)


def test_network_jacobian_by_central_differences():
    """Branching network (A → B and A → C, B → C) with second-order and Monod laws: the
    Jacobian (I − P) ∂r/∂c against central differences, relative 1e-6 (R12)."""
    net = DecayNetwork.from_links(["A", "B", "C"],
                                  [("A", "B", 0.6), ("A", "C", 0.3), ("B", "C", 0.9)])

    def rates(c):
        ra, da = second_order(c[0], 2e-3)
        rb, db = monod(c[1], 1e-4, 0.05)
        rc, dc = -1e-5 * c[2], np.full_like(c[2], -1e-5)
        return net.reactions(np.stack([ra, rb, rc]), np.stack([da, db, dc]))

    c = np.array([[0.2, 1.0], [0.01, 0.3], [0.0, 0.7]])
    big_r, jac = rates(c)
    assert big_r.shape == (3, 2) and jac.shape == (3, 3, 2)
    for j in range(3):
        h = 1e-6 * np.maximum(np.abs(c[j]), 1e-3)
        cp, cm = c.copy(), c.copy()
        cp[j] += h
        cm[j] -= h
        fd = (rates(cp)[0] - rates(cm)[0]) / (2 * h)
        np.testing.assert_allclose(fd, jac[:, j, :], rtol=1e-6, atol=1e-14)
    # Mass made equals yield × mass lost: with all yields 1 along A→B only, the sum is zero.
    one = DecayNetwork.from_links(["A", "B"], [("A", "B", 1.0)])
    r, _ = one.reactions(np.array([[-2.0], [0.0]]), np.array([[-1.0], [0.0]]))
    assert r.sum() == 0.0


def test_full_jacobian_input_is_multiplied_through():
    """A coupled (n, n, p) ∂r/∂c is premultiplied by (I − P) (R12); checked by hand."""
    net = DecayNetwork.from_links(["A", "B"], [("A", "B", 0.5)])
    dr = np.zeros((2, 2, 1))
    dr[0, 1, 0] = -3.0  # A's loss depends on B
    _, jac = net.reactions(np.zeros((2, 1)), dr)
    np.testing.assert_allclose(jac[:, :, 0], [[0.0, -3.0], [0.0, 1.5]])


@pytest.mark.parametrize(("build", "key", "fragment"), [
    (lambda: chain_matrix([0.1, -0.2], [0.5]), "reactions.chain.rates[1]", "≥ 0"),
    (lambda: chain_matrix([0.1, 0.2], [-0.5]), "reactions.chain.yields[0]", "≥ 0"),
    (lambda: chain_matrix([0.1, 0.2], [0.5, 0.5]), "reactions.chain.yields", "needs 1 yields"),
    (lambda: chain_matrix([0.1, float("inf")], [0.5]), "reactions.chain.rates[1]", "finite"),
    (lambda: DecayNetwork.from_links(["A", "B"], [("A", "X", 0.5)]), "reactions.links[0]",
     "unknown species; known species: A, B"),
    (lambda: DecayNetwork.from_links(["A", "B"], [("A", "B", -0.1)]),
     "reactions.links[0].yield", "≥ 0"),
    (lambda: DecayNetwork.from_links(["A", "B"], [("A", "A", 0.1)]), "reactions.links[0]",
     "own daughter"),
    (lambda: DecayNetwork.from_links(["A", "B"], [("A", "B", 0.1), ("A", "B", 0.2)]),
     "reactions.links[1]", "given twice"),
    (lambda: DecayNetwork.from_links(["A", "B"], []).first_order_matrix([0.1, -1.0]),
     "reactions.rates[1]", "≥ 0"),
])
def test_bad_networks_give_one_line(build, key, fragment):
    """Negative rates or yields, unknown species, self links, repeated links: one line naming
    the key path (behaviour requirement of issue 5, no source)."""
    with pytest.raises(CaseError) as err:
        build()
    assert err.value.key_path == key
    assert "\n" not in str(err.value)
    assert fragment in str(err.value)
