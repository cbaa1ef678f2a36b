"""The region engine (model_zoo.circuit.regions) gives the layered engine's root values.

References: a node-by-node evaluation in plain Python floats (the definition of a circuit's
value, common practice) on small circuits; the layered engine (itself checked against
brute-force enumeration in test_circuit.py) on large ones.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from model_zoo.circuit.core import LEAF, PRODUCT, _region_plan, forward
from model_zoo.circuit.vtree import vtree_circuit


def _plain_root(c, column) -> float:
    """ln of the root value by the definition: leaves p[x] (sum p when free), products,
    weighted sums; node ids are a topological order."""
    val = [0.0] * c.n_nodes
    for i in range(c.n_nodes):
        kind = int(c.node_type[i])
        if kind == LEAF:
            v = int(c.leaf_var[i])
            p = c.leaf_probs[i][:c.cards[v]]
            val[i] = float(p.sum()) if column[v] < 0 else float(p[column[v]])
        elif kind == PRODUCT:
            val[i] = math.prod(val[j] for j in c.children(i))
        else:
            val[i] = sum(w * val[j] for w, j in zip(c.weights(i), c.children(i)))
    return math.log(val[c.root]) if val[c.root] > 0 else -math.inf


@pytest.mark.parametrize("topology", ["balanced", "right_linear"])
@pytest.mark.parametrize("k", [1, 2, 3])
def test_region_engine_matches_the_definition(topology, k):
    """Root log-values of the region engine equal a plain node-by-node evaluation."""
    c = vtree_circuit(12, k, topology=topology, seed=k, n_states=3, leaf_concentration=0.5)
    assert _region_plan(c) is not None
    rng = np.random.default_rng(k)
    states = rng.integers(-1, 3, size=(12, 6))
    got = forward(c, states)
    want = [_plain_root(c, states[:, j]) for j in range(6)]
    assert np.allclose(got, want, rtol=0, atol=1e-10)


def test_right_linear_uses_a_chain():
    """A right-linear vtree is contracted as one chain (not n layers)."""
    c = vtree_circuit(40, 2, topology="right_linear", seed=0)
    plan = _region_plan(c)
    assert plan.n_chains == 1 and plan.n_chain_links >= 30


@pytest.mark.parametrize("topology,n,k", [("right_linear", 1500, 2), ("right_linear", 300, 5),
                                          ("right_linear", 2000, 1), ("balanced", 1500, 3)])
def test_region_engine_matches_layers_on_long_circuits(topology, n, k):
    """Thousands of variables (root log-values near -1000): no underflow, same values."""
    c = vtree_circuit(n, k, topology=topology, seed=3, leaf_concentration=0.2)
    rng = np.random.default_rng(0)
    states = rng.integers(-1, 2, size=(n, 9))
    got = forward(c, states)
    want = forward(c, states, engine="layers")
    assert np.all(np.isfinite(got))
    assert np.allclose(got, want, rtol=1e-12, atol=1e-9)


def test_zero_probability_gives_minus_infinity():
    """A leaf state of probability zero makes the likelihood -inf (not nan) on both engines."""
    from model_zoo.circuit.core import CircuitBuilder

    b = CircuitBuilder(["A", "B"], [["0", "1"], ["0", "1"]])
    la = b.leaves([0, 0], np.array([[1.0, 0.0], [1.0, 0.0]]))
    lb = b.leaves([1, 1], np.array([[0.5, 0.5], [0.2, 0.8]]))
    prods = b.products(np.array([[la[i], lb[j]] for i in range(2) for j in range(2)]))
    sums = b.sums(np.tile(prods, (2, 1)), np.array([[0.1, 0.2, 0.3, 0.4], [0.25] * 4]))
    root = b.sums(sums[None, :], np.array([[0.5, 0.5]]))[0]
    c = b.build(int(root), normalised=True, name="zero")
    states = np.array([[1, 0, -1], [0, 1, 1]])
    got, want = forward(c, states), forward(c, states, engine="layers")
    assert got[0] == -np.inf and np.isfinite(got[1])
    assert np.allclose(got, want, atol=1e-12)


def test_compiled_network_falls_back_to_layers():
    """A compiled arithmetic circuit has no region structure; forward still answers."""
    from model_zoo.circuit.compile import compile_network
    from model_zoo.discrete import DiscreteNetwork

    net = DiscreteNetwork(
        variables=("A", "B"), states={"A": ("0", "1"), "B": ("0", "1")},
        parents={"A": (), "B": ("A",)},
        cpts={"A": np.array([0.3, 0.7]), "B": np.array([[0.9, 0.2], [0.1, 0.8]])},
        name="two")
    cc = compile_network(net)
    c = cc.circuit
    states = np.full((c.n_variables, 1), -1)
    assert np.allclose(forward(c, states), forward(c, states, engine="layers"))
