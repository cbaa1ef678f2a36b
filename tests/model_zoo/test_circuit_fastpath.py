"""The thin-batch and K = 1 routes of the region engine give the circuit's root values.

References: a node-by-node evaluation in plain Python floats (the definition of a circuit's
value, ``_plain_root`` of test_circuit_regions) on small circuits; the layered engine (itself
checked against brute-force enumeration in test_circuit.py) on long ones.
"""

from __future__ import annotations

import numpy as np
import pytest

from model_zoo.circuit import regions
from model_zoo.circuit.core import CircuitBuilder, _region_plan, forward
from model_zoo.circuit.vtree import vtree_circuit
from tests.model_zoo.test_circuit_regions import _plain_root


def _thin(c, states):
    """Root log-values by the thin engine itself (not through the dispatch)."""
    rp = _region_plan(c)
    assert rp.thin is not None
    return regions.thin_root_log_values(rp.thin, c._plan.leaf_var,
                                        np.asarray(states, dtype=np.int64))


@pytest.mark.parametrize("topology", ["balanced", "right_linear"])
@pytest.mark.parametrize("k", [2, 3, 5])
@pytest.mark.parametrize("batch", [1, 4])
def test_thin_engine_matches_the_definition(topology, k, batch):
    """Linear-space, stack-last evaluation equals a plain node-by-node evaluation."""
    n = 11 if k < 5 else 9       # 9 variables still give chains of >= 8 links at K = 5
    c = vtree_circuit(n, k, topology=topology, seed=k + batch, n_states=3,
                      leaf_concentration=0.5)
    rng = np.random.default_rng(k * 10 + batch)
    states = rng.integers(-1, 3, size=(n, batch))
    want = [_plain_root(c, states[:, j]) for j in range(batch)]
    assert np.allclose(_thin(c, states), want, rtol=0, atol=1e-10)
    assert np.allclose(forward(c, states), want, rtol=0, atol=1e-10)


@pytest.mark.parametrize("topology,n,k", [("right_linear", 1500, 2), ("right_linear", 1200, 5),
                                          ("balanced", 1500, 3), ("balanced", 1200, 4)])
def test_thin_engine_matches_layers_on_long_circuits(topology, n, k):
    """Root values below exp(-745), the smallest double: the per-block scales keep linear space
    from underflowing."""
    c = vtree_circuit(n, k, topology=topology, seed=5, leaf_concentration=0.2)
    rng = np.random.default_rng(1)
    states = rng.integers(0, 2, size=(n, 3))
    states[:20, 0] = -1
    got = _thin(c, states)
    want = forward(c, states, engine="layers")
    assert np.all(np.isfinite(got)) and want.max() < -745
    assert np.allclose(got, want, rtol=1e-12, atol=1e-9)


@pytest.mark.parametrize("topology", ["balanced", "right_linear"])
@pytest.mark.parametrize("batch", [1, 100])
def test_k1_circuit_is_a_sum_of_logs(topology, batch):
    """K = 1: one sum of leaf logs (any batch) equals the definition and the layered pass."""
    c = vtree_circuit(13, 1, topology=topology, seed=2, n_states=3)
    assert _region_plan(c).log_linear is not None
    rng = np.random.default_rng(batch)
    states = rng.integers(-1, 3, size=(13, batch))
    got = forward(c, states)
    want = forward(c, states, engine="layers")
    assert np.allclose(got, want, rtol=0, atol=1e-10)
    plain = [_plain_root(c, states[:, j]) for j in range(min(batch, 5))]
    assert np.allclose(got[:len(plain)], plain, rtol=0, atol=1e-10)


def _two_variable_circuit(weights, leaves_a=((1.0, 0.0), (0.3, 0.7))):
    b = CircuitBuilder(["A", "B"], [["0", "1"], ["0", "1"]])
    la = b.leaves([0, 0], np.array(leaves_a))
    lb = b.leaves([1, 1], np.array([[0.5, 0.5], [0.2, 0.8]]))
    prods = b.products(np.array([[la[i], lb[j]] for i in range(2) for j in range(2)]))
    sums = b.sums(np.tile(prods, (2, 1)), np.asarray(weights, dtype=float))
    root = b.sums(sums[None, :], np.array([[0.5, 0.5]]))[0]
    return b.build(int(root), normalised=True, name="two")


def test_zero_leaf_values_give_minus_infinity_on_the_thin_engine():
    """A block that is all zero stays zero in linear space and ends as -inf (not nan); one zero
    leaf among positive ones changes nothing."""
    weights = [[0.1, 0.2, 0.3, 0.4], [0.25] * 4]
    states = np.array([[1, 0, -1], [0, 1, 1]])
    some = _two_variable_circuit(weights)
    assert np.allclose(_thin(some, states), forward(some, states, engine="layers"), atol=1e-12)
    allzero = _two_variable_circuit(weights, leaves_a=((1.0, 0.0), (1.0, 0.0)))
    got = _thin(allzero, states)
    assert got[0] == -np.inf and np.all(np.isfinite(got[1:]))
    assert np.allclose(got, forward(allzero, states, engine="layers"), atol=1e-12)


def test_zero_weight_keeps_log_space():
    """A zero sum weight makes linear space unsafe: no thin plan, same answers."""
    c = _two_variable_circuit([[0.0, 0.2, 0.3, 0.5], [0.25] * 4])
    rp = _region_plan(c)
    assert rp is not None and rp.thin is None
    states = np.array([[1, 0, -1], [0, 1, 1]])
    assert np.allclose(forward(c, states), forward(c, states, engine="layers"), atol=1e-12)


def test_out_of_range_states_behave_as_on_the_layered_engine():
    """-2 counts as marginalised and a state past the last raises, as on the layered pass."""
    c = vtree_circuit(10, 2, topology="balanced", seed=0)
    states = np.full((10, 1), -2)
    states[3, 0] = 1
    assert np.allclose(forward(c, states), forward(c, states, engine="layers"), atol=1e-12)
    states[4, 0] = 2
    with pytest.raises(IndexError):
        forward(c, states, engine="layers")
    with pytest.raises(IndexError):
        forward(c, states)
