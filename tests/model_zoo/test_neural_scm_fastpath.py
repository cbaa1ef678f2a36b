"""The neural_scm exact engine's fast path: transposed one-hot inputs, shared work buffers,
cached plans and enumeration layouts, chunked enumeration. Every check is against an
independent path: pgmpy on the deterministic-CPT / twin network, or plain tabulation."""

from __future__ import annotations

import numpy as np
import pytest

import model_zoo.neural_scm as nscm
from model_zoo.base import Level, Query, Size, make_rng
from model_zoo.neural_scm import (
    NeuralSCMFamily,
    evaluate_worlds,
    from_dict,
    mechanism_table,
    to_dict,
)


def _matches_tabulation(scm, n_worlds: int, seed: int) -> None:
    rng = make_rng(seed, "worlds")
    u = np.stack([rng.integers(0, scm.exogenous_card(j), n_worlds)
                  for j in range(len(scm.exogenous))], axis=1)
    v = evaluate_worlds(scm, u)
    for i in range(scm.n_variables):
        table = mechanism_table(scm, i)
        idx = (tuple(v[:, p] for p in scm.parents[i])
               + tuple(u[:, j] for j in scm.exogenous_inputs[i]))
        assert np.array_equal(table[idx], v[:, i]), scm.variables[i]


def _single_layer(scm, seed: int):
    """``scm`` with every mechanism replaced by one random dense layer (no hidden units)."""
    doc = to_dict(scm)
    rng = make_rng(seed, "single layer")
    for var in doc["variables"]:
        n_in = len(var["mechanism"]["layers"][0]["weights"])
        n_out = len(var["states"])
        var["mechanism"]["layers"] = [{"weights": rng.normal(size=(n_in, n_out)).tolist(),
                                       "bias": rng.normal(size=n_out).tolist()}]
    return from_dict(doc)


@pytest.mark.parametrize("kw", [{"depth": 3}, {"depth": 3, "n_states": 3},
                                {"depth": 2, "n_states": 3}])
def test_deep_mechanisms_match_plain_tabulation(kw):
    """Three hidden layers alternate between two work buffers of one width; the states still
    equal a plain tabulation of each MLP, for chunks of several sizes in a row."""
    fam = NeuralSCMFamily(**kw)
    scm = fam.build(Size(7, 6), topology="random", seed=3)
    for n_worlds, seed in ((300, 0), (7, 1), (300, 2), (1, 3)):
        _matches_tabulation(scm, n_worlds, seed)


@pytest.mark.parametrize("level", list(Level))
def test_single_layer_mechanisms_equal_the_reference(level):
    """Mechanisms without hidden layers (the logits come straight from the one-hot product)."""
    fam = NeuralSCMFamily()
    scm = _single_layer(fam.build(Size(5, 3), topology="chain", seed=8), seed=1)
    _matches_tabulation(scm, 200, 0)
    for q in fam.queries(scm, level, n=8, seed=2):
        assert abs(fam.answer(scm, q, method="exact").value - fam.reference(scm, q)) <= 1e-9


@pytest.mark.parametrize("level", list(Level))
def test_many_chunks_equal_the_reference(monkeypatch, level):
    """With chunks of 256 rows the leading exogenous inputs are fixed per chunk and the buffers
    are reused across chunks; answers still equal pgmpy and the one-chunk engine."""
    fam = NeuralSCMFamily()
    one_chunk = fam.build(Size(7, 5), topology="chain", seed=4)
    queries = fam.queries(one_chunk, level, n=8, seed=3)
    whole = [fam.answer(one_chunk, q, method="exact").value for q in queries]
    monkeypatch.setattr(nscm, "_chunk_rows", lambda scm, plan: 256)
    scm = fam.build(Size(7, 5), topology="chain", seed=4)  # fresh: no cached layouts
    n_multi = 0
    for q, value in zip(queries, whole):
        n_chunks, shapes = nscm.enumeration_shapes(scm, q)
        n_multi += n_chunks > 1
        got = fam.answer(scm, q, method="exact").value
        assert abs(got - fam.reference(scm, q)) <= 1e-9, q.describe()
        assert abs(got - value) <= 1e-12
    assert n_multi > 0


def test_sampling_with_an_uneven_last_chunk(monkeypatch):
    """A last chunk shorter than the others gets its own buffers; estimates stay within four
    standard errors of the exact answer."""
    monkeypatch.setattr(nscm, "_chunk_rows", lambda scm, plan: 256)
    fam = NeuralSCMFamily(n_samples=1000)
    scm = fam.build(Size(6, 4), topology="random", seed=5)
    for level in Level:
        for q in fam.queries(scm, level, n=5, seed=6):
            exact = fam.answer(scm, q, method="exact").value
            s = fam.answer(scm, q, method="sampling")
            assert abs(s.value - exact) <= 4 * s.stderr + 1e-9, q.describe()


def test_cached_answers_equal_fresh_ones():
    """A repeated query (cached plan and layout) gets the same answer and work as on a fresh
    instance, with and without pruning, and predicted work still equals the reported work."""
    for prune in (True, False):
        fam = NeuralSCMFamily(prune=prune)
        scm = fam.build(Size(6, 4), topology="tree", seed=9)
        for level in Level:
            for q in fam.queries(scm, level, n=5, seed=1):
                first = fam.answer(scm, q, method="exact")
                again = fam.answer(scm, q, method="exact")
                fresh = fam.answer(fam.build(Size(6, 4), topology="tree", seed=9), q,
                                   method="exact")
                assert first.value == again.value == fresh.value
                assert first.work == again.work == fam.predicted_work(scm, q, method="exact")
    assert scm._cache["plan"] and scm._cache["layout"]


def test_layout_cache_is_bounded(monkeypatch):
    """Cached layouts never hold more than the byte bound; past it, nothing is kept and the
    answers are unchanged."""
    fam = NeuralSCMFamily()
    scm = fam.build(Size(7, 4), topology="chain", seed=2)
    queries = fam.queries(scm, Level.ASSOCIATIONAL, n=10, seed=0)
    want = [fam.answer(scm, q, method="exact").value for q in queries]
    bound = 3 * max(layout.nbytes for layout in scm._cache["layout"].values())
    monkeypatch.setattr(nscm, "_LAYOUT_CACHE_BYTES", bound)
    small = fam.build(Size(7, 4), topology="chain", seed=2)
    for q, value in zip(queries, want):
        assert fam.answer(small, q, method="exact").value == value
        assert sum(layout.nbytes for layout in small._cache["layout"].values()) <= bound
    monkeypatch.setattr(nscm, "_LAYOUT_CACHE_BYTES", 1)
    tiny = fam.build(Size(7, 4), topology="chain", seed=2)
    assert [fam.answer(tiny, q, method="exact").value for q in queries] == want
    assert not tiny._cache.get("layout")


def test_unhashable_keys_are_not_cached():
    """A key that cannot be hashed is computed each time, never stored."""
    scm = NeuralSCMFamily().build(Size(3, 2), topology="chain", seed=0)
    calls = []
    for _ in range(2):
        assert nscm._cached(scm, "test", ([1],), lambda: calls.append(1) or "v") == "v"
    assert len(calls) == 2 and not scm._cache.get("test")


def test_the_same_query_object_with_new_values_is_a_new_plan():
    """Plans are keyed by the query's value, so equal queries share a plan and different
    targets do not."""
    fam = NeuralSCMFamily()
    scm = fam.build(Size(4, 3), topology="chain", seed=1)
    q0 = Query(level=Level.ASSOCIATIONAL, target=(("X3", 0),))
    q1 = Query(level=Level.ASSOCIATIONAL, target=(("X3", 1),))
    a0, a1 = (fam.answer(scm, q, method="exact").value for q in (q0, q1))
    assert abs(a0 + a1 - 1.0) <= 1e-12
    assert abs(a0 - fam.reference(scm, q0)) <= 1e-9
    assert nscm._plan(scm, Query(level=Level.ASSOCIATIONAL, target=(("X3", 0),))) \
        is nscm._plan(scm, q0)


def test_pickled_instances_leave_the_cache_behind():
    """Plans, layouts and pooled buffers do not travel with a pickled instance (workers rebuild
    them); the unpickled instance answers the same."""
    import pickle

    fam = NeuralSCMFamily()
    scm = fam.build(Size(5, 4), topology="chain", seed=0)
    q = fam.queries(scm, Level.COUNTERFACTUAL, n=1, seed=0)[0]
    value = fam.answer(scm, q, method="exact").value
    assert scm._cache
    copy = pickle.loads(pickle.dumps(scm))
    assert copy._cache == {}
    assert fam.answer(copy, q, method="exact").value == value
