"""The neural_scm family: exact engine, sampling engine and the pgmpy / twin-network reference."""

from __future__ import annotations

import math

import networkx as nx
import numpy as np
import pytest

from model_zoo.base import Level, Query, Size, make_rng
from model_zoo.errors import InputError, ModelError
from model_zoo.neural_scm import (
    NeuralSCMFamily,
    build_scm,
    evaluate_worlds,
    from_dict,
    mechanism_table,
    to_bayesian_network,
    to_dict,
    twin_network,
)


# -- a hand-built SCM: X = U_X, Y = X xor U_Y ------------------------------------------------
P_UX1, P_UY1 = 0.3, 0.2


def _xor_document() -> dict:
    """X copies U_X (identity MLP); Y = X xor U_Y with two ReLU units:
    h1 = relu(x1 + u1 - 1) (both one), h2 = relu(x0 + u0 - 1) (both zero);
    logit(Y=0) = h1 + h2, logit(Y=1) = 0.5."""
    x_layers = [{"weights": [[1, 0], [0, 1]], "bias": [0, 0]},
                {"weights": [[1, 0], [0, 1]], "bias": [0, 0]}]
    # inputs of Y: [x0, x1, u0, u1]
    y_layers = [{"weights": [[0, 1], [1, 0], [0, 1], [1, 0]], "bias": [-1, -1]},
                {"weights": [[1, 0], [1, 0]], "bias": [0, 0.5]}]
    return {"family": "neural_scm", "format_version": 1, "name": "xor",
            "variables": [
                {"name": "X", "states": ["0", "1"], "parents": [],
                 "exogenous": {"name": "U_X", "probabilities": [1 - P_UX1, P_UX1]},
                 "mechanism": {"layers": x_layers}},
                {"name": "Y", "states": ["0", "1"], "parents": ["X"],
                 "exogenous": {"name": "U_Y", "probabilities": [1 - P_UY1, P_UY1]},
                 "mechanism": {"layers": y_layers}}],
            "confounders": []}


@pytest.fixture(scope="module")
def xor():
    return from_dict(_xor_document(), where="xor.json")


def test_xor_mechanisms_are_the_intended_functions(xor):
    """The hand-written weights compute X = U_X and Y = X xor U_Y on every input."""
    assert mechanism_table(xor, 0).tolist() == [0, 1]
    assert mechanism_table(xor, 1).tolist() == [[0, 1], [1, 0]]


def test_xor_counterfactual_is_the_hand_computed_value(xor):
    """Hand-computed: P(Y=1) = 0.7*0.2 + 0.3*0.8 = 0.38; P(Y=1 | do(X=1)) = P(U_Y=0) = 0.8;
    P(Y_{X=1}=1 | Y=1): the worlds with Y=1 are (U_X,U_Y) = (0,1) with 0.14 and (1,0) with 0.24;
    under X=1 they give Y = 0 and 1, so the answer is 0.24 / 0.38. With evidence X=0, Y=1 the
    world is (0,1) and Y_{X=1} = 1 xor 1 = 0."""
    fam = NeuralSCMFamily()
    cases = [
        (Query(Level.ASSOCIATIONAL, (("Y", 1),)), 0.38),
        (Query(Level.INTERVENTIONAL, (("Y", 1),), intervention=(("X", 1),)), 0.8),
        (Query(Level.COUNTERFACTUAL, (("Y", 1),), (("Y", 1),), (("X", 1),)), 0.24 / 0.38),
        (Query(Level.COUNTERFACTUAL, (("Y", 1),), (("X", 0), ("Y", 1)), (("X", 1),)), 0.0),
        (Query(Level.COUNTERFACTUAL, (("Y", 0),), (("X", 0), ("Y", 1)), (("X", 1),)), 1.0),
    ]
    for q, hand in cases:
        assert fam.answer(xor, q, method="exact").value == pytest.approx(hand, abs=1e-12), q.describe()
        assert fam.reference(xor, q) == pytest.approx(hand, abs=1e-9), q.describe()
        s = fam.answer(xor, q, method="sampling")
        assert abs(s.value - hand) <= 4 * s.stderr + 1e-9, q.describe()


def test_zero_probability_evidence_is_reported_not_nan(xor):
    """Evidence contradicting the intervention has probability zero: a ModelError, never NaN."""
    fam = NeuralSCMFamily()
    q = Query(Level.INTERVENTIONAL, (("Y", 1),), (("X", 0),), (("X", 1),))
    with pytest.raises(ModelError, match="evidence has probability zero"):
        fam.answer(xor, q, method="exact")
    with pytest.raises(ModelError, match="no sample matched the evidence"):
        fam.answer(xor, q, method="sampling")


# -- random instances against the pgmpy reference ------------------------------------------
@pytest.fixture(scope="module")
def small_instances():
    out = []
    for topology, kw in (("chain", {}), ("random", {}), ("layered", {"n_states": 3, "depth": 2})):
        fam = NeuralSCMFamily(**kw)
        out.append((fam, fam.build(Size(5, 4), topology=topology, seed=21)))
    return out


@pytest.mark.parametrize("level", list(Level))
def test_exact_equals_pgmpy_reference(small_instances, level):
    """Exact answers equal pgmpy variable elimination on the deterministic-CPT network (twin
    network for counterfactuals) to 1e-9, on 20 random queries per level and instance."""
    for fam, scm in small_instances:
        for q in fam.queries(scm, level, n=20, seed=4):
            ref = fam.reference(scm, q)
            assert ref is not None
            assert abs(fam.answer(scm, q, method="exact").value - ref) <= 1e-9, q.describe()


@pytest.mark.parametrize("level", list(Level))
def test_sampling_within_four_standard_errors(small_instances, level):
    """Rejection-sampling estimates lie within 4 standard errors of the exact answer and report
    the accepted-sample count."""
    for fam, scm in small_instances:
        for q in fam.queries(scm, level, n=20, seed=5):
            exact = fam.answer(scm, q, method="exact").value
            s = fam.answer(scm, q, method="sampling")
            assert 0 < s.n_accepted <= 2000 and s.stderr > 0 and not s.is_exact
            assert abs(s.value - exact) <= 4 * s.stderr + 1e-9, (q.describe(), s, exact)


def test_twin_network_agrees_with_abduction_action_prediction_on_50_scms():
    """Acceptance check: the twin network of Balke & Pearl (1994), queried with pgmpy, equals
    abduction-action-prediction over enumerated worlds on 50 random small SCMs."""
    n_checked = 0
    for k in range(50):
        kw = {"n_states": 3} if k % 5 == 0 else {}
        fam = NeuralSCMFamily(**kw)
        topology = ("random", "chain", "layered", "tree", "grid")[k % 5]
        n = 4 if topology == "grid" else 3 + k % 3
        scm = fam.build(fam.realizable(Size(n, 3), topology=topology), topology=topology, seed=100 + k)
        q = fam.queries(scm, Level.COUNTERFACTUAL, n=1, seed=k)[0]
        assert abs(fam.answer(scm, q, method="exact").value - fam.reference(scm, q)) <= 1e-9
        n_checked += 1
    assert n_checked == 50


def test_pruning_does_not_change_exact_answers(small_instances):
    """Restricting enumeration to the query's ancestral set gives the brute-force answer over the
    whole exogenous space (prune=False) and never more work."""
    for fam, scm in small_instances:
        brute = NeuralSCMFamily(**{**fam.params, "prune": False})
        for level in Level:
            for q in fam.queries(scm, level, n=5, seed=6):
                a, b = fam.answer(scm, q, method="exact"), brute.answer(scm, q, method="exact")
                assert abs(a.value - b.value) <= 1e-12
                assert a.work <= b.work


def test_engine_path_matches_plain_tabulation():
    """The batched folded-bias evaluation gives the same states as tabulating each mechanism."""
    fam = NeuralSCMFamily(n_states=3, depth=2)
    scm = fam.build(Size(6, 5), topology="random", seed=2)
    rng = make_rng(0, "worlds")
    u = np.stack([rng.integers(0, scm.exogenous_card(j), 500) for j in range(len(scm.exogenous))], 1)
    v = evaluate_worlds(scm, u)
    for i in range(scm.n_variables):
        table = mechanism_table(scm, i)
        idx = tuple(v[:, p] for p in scm.parents[i]) + tuple(u[:, j] for j in scm.exogenous_inputs[i])
        assert np.array_equal(table[idx], v[:, i])


def test_bayesian_network_conversions_are_valid():
    """The converters give valid networks: deterministic CPTs, the twin network has both copies
    and the intervened counterfactual copy has no parents."""
    fam = NeuralSCMFamily()
    scm = fam.build(Size(4, 3), topology="random", seed=8)
    bn = to_bayesian_network(scm).validate()
    assert len(bn.variables) == len(scm.exogenous) + scm.n_variables
    for v in scm.variables:
        assert set(np.unique(bn.cpts[v])) <= {0.0, 1.0}
    twin = twin_network(scm, {"X1": 0}).validate()
    assert twin.parents["X1*"] == () and "U_X1" in twin.parents["X1"]
    assert len(twin.variables) == len(scm.exogenous) + 2 * scm.n_variables
    mutilated = to_bayesian_network(scm, {"X2": 1}).validate()
    assert mutilated.parents["X2"] == () and mutilated.cpts["X2"].tolist() == [0.0, 1.0]


# -- building, profile, cost -----------------------------------------------------------------
def test_mechanisms_are_not_degenerate():
    """Every drawn mechanism is non-constant and depends on each of its inputs, so queries are
    not trivially 0 or 1 (module docstring: centred output bias plus redraws)."""
    for topology in ("chain", "random", "grid"):
        fam = NeuralSCMFamily()
        scm = fam.build(fam.realizable(Size(9, 2), topology=topology), topology=topology, seed=3)
        assert scm.meta["n_degenerate_mechanisms"] == 0
        for i in range(scm.n_variables):
            t = mechanism_table(scm, i)
            for axis in range(t.ndim):
                assert np.any(np.ptp(t, axis=axis) > 0), (topology, i, axis)
        values = [fam.answer(scm, q, method="exact").value
                  for q in fam.queries(scm, Level.ASSOCIATIONAL, n=10, seed=1)]
        assert sum(0.0 < v < 1.0 for v in values) >= 5


def test_same_seed_same_instance_different_seed_different():
    """Same size, topology and seed give the same document; another seed changes the weights."""
    fam = NeuralSCMFamily()
    a, b = (fam.build(Size(5, 4), topology="random", seed=7) for _ in range(2))
    c = fam.build(Size(5, 4), topology="random", seed=8)
    assert to_dict(a) == to_dict(b)
    assert to_dict(a)["variables"] != to_dict(c)["variables"]


@pytest.mark.parametrize("axis", ["graph", "mechanism"])
def test_profile_grows_along_each_axis(axis):
    """More variables give more worlds and multiply-adds; a wider mechanism more parameters."""
    fam = NeuralSCMFamily()
    small, large = ((Size(4, 4), Size(8, 4)) if axis == "graph" else (Size(4, 4), Size(4, 16)))
    p, q = (fam.profile(fam.build(s, topology="chain", seed=1)) for s in (small, large))
    assert q["mechanism_multiply_adds"] > p["mechanism_multiply_adds"]
    assert q["n_parameters"] > p["n_parameters"]
    if axis == "graph":
        assert q["n_variables"] > p["n_variables"] and q["n_edges"] > p["n_edges"]
        assert q["log10_exogenous_worlds"] > p["log10_exogenous_worlds"]
        assert q["n_exogenous_worlds"] == pytest.approx(3.0 ** 8)
    else:
        assert q["hidden_width"] == 16 and q["log10_exogenous_worlds"] == p["log10_exogenous_worlds"]


def test_predicted_work_equals_reported_work():
    """predicted_work (computed without inference) equals Answer.work for both engines; the
    exact work is the enumerated worlds times the evaluated mechanisms' multiply-adds."""
    fam = NeuralSCMFamily(n_samples=500)
    scm = fam.build(Size(6, 3), topology="random", seed=4)
    for level in Level:
        for q in fam.queries(scm, level, n=5, seed=2):
            for method in ("exact", "sampling"):
                assert fam.answer(scm, q, method=method).work == fam.predicted_work(scm, q, method=method)
                assert fam.predicted_bytes(scm, q, method=method) > 0
    # full enumeration of a chain's last variable: all 3^6 worlds, every mechanism once
    q = Query(Level.ASSOCIATIONAL, (("X5", 1),))
    chain = fam.build(Size(6, 3), topology="chain", seed=4)
    macs = sum(m.multiply_adds for m in chain.mechanisms)
    assert fam.predicted_work(chain, q, method="exact") == 3 ** 6 * macs
    assert fam.predicted_work(chain, q, method="sampling") == 500 * macs


def test_expected_growth_statements():
    """Exact enumeration is exponential on the graph axis (polynomial on out-trees, whose
    ancestral sets are root paths); everything is polynomial on the mechanism axis."""
    fam = NeuralSCMFamily()
    g = lambda **kw: fam.expected_growth(level=Level.COUNTERFACTUAL, **kw)  # noqa: E731
    assert g(axis="graph", topology="chain", method="exact") == "exponential"
    assert g(axis="graph", topology="tree", method="exact") == "polynomial"
    assert g(axis="graph", topology="chain", method="sampling") == "polynomial"
    assert g(axis="mechanism", topology="grid", method="exact") == "polynomial"


def test_exact_enumeration_beyond_the_limit_is_refused():
    """Beyond max_worlds the exact engine raises ModelError before allocating anything, while
    predicted_work still says how large the job would be."""
    fam = NeuralSCMFamily(max_worlds=100)
    scm = fam.build(Size(6, 3), topology="chain", seed=1)
    q = Query(Level.ASSOCIATIONAL, (("X5", 1),))
    with pytest.raises(ModelError, match="max_worlds"):
        fam.answer(scm, q, method="exact")
    assert fam.predicted_work(scm, q, method="exact") > 100


def test_two_thousand_variables_stay_finite():
    """A 2,000-variable neural SCM: sampling answers are finite probabilities at every level,
    exact enumeration is refused with a clear ModelError, and the profile's log10 world count
    is finite although the count itself overflows."""
    fam = NeuralSCMFamily(n_samples=1000)
    scm = fam.build(Size(2000, 4), topology="random", seed=1)
    prof = fam.profile(scm)
    assert math.isfinite(prof["log10_exogenous_worlds"]) and prof["log10_exogenous_worlds"] > 900
    for level in Level:
        q = fam.queries(scm, level, n=1, seed=3)[0]
        s = fam.answer(scm, q, method="sampling")
        assert 0.0 <= s.value <= 1.0 and math.isfinite(s.stderr) and s.n_accepted > 0
        with pytest.raises(ModelError, match="exogenous worlds"):
            fam.answer(scm, q, method="exact")


def test_bad_queries_raise_input_errors(xor):
    """Unknown variables and out-of-range states are InputErrors naming what was wrong."""
    fam = NeuralSCMFamily()
    with pytest.raises(InputError, match="Z"):
        fam.answer(xor, Query(Level.ASSOCIATIONAL, (("Z", 1),)), method="exact")
    with pytest.raises(InputError, match="state index"):
        fam.answer(xor, Query(Level.ASSOCIATIONAL, (("Y", 2),)), method="exact")


def test_build_from_a_graph_with_confounders():
    """build_scm accepts any DAG; a confounder feeds both named variables."""
    g = nx.DiGraph([("A", "B"), ("B", "C")])
    scm = build_scm(g, hidden_width=3, confounders=[("A", "C")], seed=2)
    assert scm.exogenous[-1] == "C0"
    assert scm.exogenous_inputs[0][-1] == scm.exogenous_inputs[2][-1] == 3
