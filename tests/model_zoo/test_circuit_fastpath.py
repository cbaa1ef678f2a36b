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
    _check_out_of_range(c, states, (4, 0), atol=1e-12)


def _check_out_of_range(c, states, past_last, atol):
    """``states`` (with -2 entries) match the layered pass; setting the entry ``past_last`` to
    the number of states makes both engines raise IndexError."""
    assert np.allclose(forward(c, states), forward(c, states, engine="layers"), atol=atol)
    states = states.copy()
    states[past_last] = 2
    with pytest.raises(IndexError):
        forward(c, states, engine="layers")
    with pytest.raises(IndexError):
        forward(c, states)


# -- the lean program of the thin engine (block tree, bound-driven renormalisation) ------------
def _old_thin(c, states):
    """The thin engine with its lean program switched off (per-op renormalisation, scales)."""
    import dataclasses

    tp = dataclasses.replace(_region_plan(c).thin, lean=None)
    return regions.thin_root_log_values(tp, c._plan.leaf_var,
                                        np.asarray(states, dtype=np.int64))


def _with_tiny(c, tiny, seed):
    """The same structure with one weight of every sum, and one entry of every leaf, set to
    ``tiny`` (rows renormalised): bounds near the thin engine's safety limit."""
    import dataclasses

    from model_zoo.circuit.core import SUM

    rng = np.random.default_rng(seed)
    w = c.edge_weight.copy()
    for node in np.flatnonzero(c.node_type == SUM):
        lo, hi = c.child_ptr[node], c.child_ptr[node + 1]
        w[lo + rng.integers(hi - lo)] = tiny
        w[lo:hi] /= w[lo:hi].sum()
    probs = c.leaf_probs.copy()
    for node in np.flatnonzero(c.leaf_var >= 0):
        probs[node, rng.integers(2)] = tiny
        probs[node] /= probs[node].sum()
    return dataclasses.replace(c, edge_weight=w, leaf_probs=probs, normalised=False, _cache={})


@pytest.mark.parametrize("topology,n,k", [("balanced", 300, 2), ("balanced", 70, 3),
                                          ("balanced", 40, 4), ("right_linear", 300, 2),
                                          ("right_linear", 60, 3), ("right_linear", 30, 4),
                                          ("right_linear", 12, 8)])
@pytest.mark.parametrize("batch", [1, 5])
def test_lean_program_matches_layers_and_the_old_thin_engine(topology, n, k, batch):
    """Merged levels (K = 2), folded chain ends, odd-sized chain tails and skipped
    renormalisations give the layered engine's values."""
    c = vtree_circuit(n, k, topology=topology, seed=n + k)
    lean = _region_plan(c).thin.lean
    assert lean is not None
    if topology == "balanced" and k == 2:          # some levels merged into four-set ops
        assert any(st[0] is not None and st[5] == 4 for st in lean.steps)
    rng = np.random.default_rng(batch)
    states = rng.integers(-1, 2, size=(n, batch))
    want = forward(c, states, engine="layers")
    assert np.allclose(_thin(c, states), want, rtol=1e-12, atol=1e-9)
    assert np.allclose(_old_thin(c, states), want, rtol=1e-12, atol=1e-9)


@pytest.mark.parametrize("topology,n,k", [("balanced", 400, 2), ("balanced", 200, 3),
                                          ("right_linear", 400, 2), ("right_linear", 150, 3)])
def test_lean_program_near_the_safety_bound(topology, n, k):
    """Weights and leaf probabilities of 1e-55 (just above the 1e-60 the thin engine accepts):
    the bounds force frequent renormalisation and the root is far below exp(-745)."""
    c = _with_tiny(vtree_circuit(n, k, topology=topology, seed=3), 1e-55, seed=n)
    tp = _region_plan(c).thin
    assert tp is not None and tp.lean is not None and tp.lean.n_renorm > 1
    rng = np.random.default_rng(0)
    states = rng.integers(0, 2, size=(n, 3))
    states[: n // 3, 1] = -1
    want = forward(c, states, engine="layers")
    assert want.max() < -745
    got = _thin(c, states)
    assert np.all(np.isfinite(got)) and np.allclose(got, want, rtol=1e-12, atol=1e-9)


def test_forced_renormalisation_everywhere_changes_nothing():
    """Renormalising every op (the fallback used when a chain's base is too wide) is exact."""
    import dataclasses

    for topology, n in (("balanced", 100), ("right_linear", 100)):
        c = vtree_circuit(n, 2, topology=topology, seed=1)
        tp = _region_plan(c).thin
        every = regions._lean_program(tp, frozenset(range(len(tp.ops))))
        states = np.random.default_rng(2).integers(-1, 2, size=(n, 2))
        got = regions.thin_root_log_values(dataclasses.replace(tp, lean=every),
                                           c._plan.leaf_var, states)
        assert np.allclose(got, forward(c, states, engine="layers"), rtol=1e-12, atol=1e-9)


def test_zero_leaf_blocks_give_minus_infinity_in_the_lean_program():
    """All K leaves of one variable zero for a state (in a chain link, the chain's base, or a
    merged balanced level): the root is exactly zero, -inf, never nan; other columns keep their
    values."""
    import dataclasses

    for topology, n in (("balanced", 64), ("right_linear", 64)):
        c = vtree_circuit(n, 2, topology=topology, seed=4)
        tp = _region_plan(c).thin
        assert tp.lean is not None
        s = tp.n_states
        for var in (0, n // 2, n - 1):
            table = tp.leaf_table.copy().reshape(tp.n_leaves, s + 1)
            leaves = np.flatnonzero(c._plan.leaf_var == var)
            table[leaves, 1 + 1] = 0.0                 # state 1 of `var` has probability 0
            zeroed = dataclasses.replace(tp, leaf_table=table.reshape(-1), lean=None)
            # the program is planned from the leaf table (state tables of chain links)
            zeroed = dataclasses.replace(zeroed, lean=regions._lean_program(zeroed))
            assert zeroed.lean is not None
            states = np.random.default_rng(var).integers(-1, 2, size=(n, 3))
            states[var] = [1, 0, -1]
            got = regions.thin_root_log_values(zeroed, c._plan.leaf_var, states)
            want = forward(c, states, engine="layers")
            assert got[0] == -np.inf
            assert np.allclose(got[1:], want[1:], atol=1e-9)   # state 0, marginalised


def test_lean_program_with_small_chunks(monkeypatch):
    """Chains split into several chunks, and ops evaluated in slices of blocks, when the chunk
    size is small."""
    monkeypatch.setattr(regions, "_CHUNK_ELEMENTS", 256)
    for topology, n, k in (("right_linear", 90, 2), ("right_linear", 40, 3), ("balanced", 90, 2)):
        c = vtree_circuit(n, k, topology=topology, seed=6)
        tp = _region_plan(c).thin
        assert tp.lean is not None
        chains = [st for st in tp.lean.steps if st[0] is None]
        if topology == "right_linear":
            assert chains and len(chains[0][4]) > 1
        states = np.random.default_rng(7).integers(-1, 2, size=(n, 4))
        assert np.allclose(_thin(c, states), forward(c, states, engine="layers"),
                           rtol=1e-12, atol=1e-9)


@pytest.mark.parametrize("n,k,s", [(300, 2, 2), (60, 3, 2), (30, 4, 2), (12, 8, 2), (80, 2, 3),
                                   (50, 3, 4)])
def test_chain_links_by_state_table(n, k, s):
    """Right-linear chains look their link matrices (and the folded base's leaves) up by state:
    no leaf rows are filled. Also the leaf-row route, forced by a leaf-to-variable map under
    which links mix variables, gives the same values."""
    import dataclasses

    c = vtree_circuit(n, k, topology="right_linear", seed=n, n_states=s)
    tp = _region_plan(c).thin
    chains = [st for st in tp.lean.steps if st[0] is None]
    assert chains and all(ch[6] is not None for st in chains for ch in st[4])
    assert len(chains) == len(tp.lean.steps) and not tp.lean.needs_leaves
    mixed = dataclasses.replace(tp, leaf_var=np.roll(tp.leaf_var, 1), lean=None)
    mixed = dataclasses.replace(mixed, lean=regions._lean_program(mixed))
    assert mixed.lean.needs_leaves
    assert all(ch[6] is None for st in mixed.lean.steps if st[0] is None for ch in st[4])
    states = np.random.default_rng(k).integers(-1, s, size=(n, 3))
    want = forward(c, states, engine="layers")
    assert np.allclose(_thin(c, states), want, rtol=1e-12, atol=1e-9)
    assert np.allclose(regions.thin_root_log_values(mixed, c._plan.leaf_var, states), want,
                       rtol=1e-12, atol=1e-9)


def test_chain_links_with_many_states_keep_the_leaf_rows():
    """Past S + 1 > 2 K a link table would outgrow the link weights: the chain gathers leaf rows
    as before, with the same values."""
    c = vtree_circuit(60, 2, topology="right_linear", seed=5, n_states=4)
    tp = _region_plan(c).thin
    assert tp.lean.needs_leaves
    assert all(ch[6] is None for st in tp.lean.steps if st[0] is None for ch in st[4])
    states = np.random.default_rng(5).integers(-1, 4, size=(60, 2))
    assert np.allclose(_thin(c, states), forward(c, states, engine="layers"),
                       rtol=1e-12, atol=1e-9)


def test_balanced_root_op_is_folded_into_the_op_below():
    """The one-unit root of a balanced K = 2 circuit is computed by the last merged op itself
    (its weights pre-multiplied by the root's): no separate root step."""
    c = vtree_circuit(626, 2, topology="balanced", seed=0)
    tp = _region_plan(c).thin
    last = tp.lean.steps[-1]
    assert last[0] is not None and last[1] == tp.root_row and last[2] == 1 and last[5] == 4
    states = np.random.default_rng(1).integers(-1, 2, size=(626, 2))
    assert np.allclose(_thin(c, states), forward(c, states, engine="layers"),
                       rtol=1e-12, atol=1e-9)


@pytest.mark.parametrize("topology", ["balanced", "right_linear"])
def test_out_of_range_states_on_the_lean_program(topology):
    """-2 is marginalised and a state past the last raises, as on the layered pass."""
    c = vtree_circuit(40, 2, topology=topology, seed=0)
    assert _region_plan(c).thin.lean is not None
    states = np.random.default_rng(0).integers(-1, 2, size=(40, 3))
    states[5, 1] = -2
    _check_out_of_range(c, states, (7, 2), atol=1e-9)

