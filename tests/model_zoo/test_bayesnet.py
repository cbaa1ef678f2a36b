"""The bayesnet family: textbook answers, work counts, batching, sampling, errors."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from model_zoo.base import Level, Query, Size
from model_zoo.errors import InputError, ModelError, UnsupportedQuery

A, I = Level.ASSOCIATIONAL, Level.INTERVENTIONAL
T, F = 0, 1  # state 0 is "true" in the hand-built networks


def P(target, evidence=(), do=()):
    return Query(level=I if do else A, target=(target,), evidence=tuple(evidence),
                 intervention=tuple(do))


# -- outside references -------------------------------------------------------------------------
def test_burglary_posteriors_match_the_textbook(bn_family, burglary):
    """Russell & Norvig, AIMA 3rd ed., Fig. 14.2 / §14.4: P(B | j, m) = 0.284172 (book: 0.284);
    P(J | b) = 0.849017 (REFERENCES.md, recomputed by enumeration)."""
    q1 = P(("B", T), [("J", T), ("M", T)])
    q2 = P(("J", T), [("B", T)])
    assert bn_family.answer(burglary, q1, method="exact").value == pytest.approx(0.284172, abs=1e-6)
    assert bn_family.answer(burglary, q2, method="exact").value == pytest.approx(0.849017, abs=1e-6)
    # pgmpy as an independent engine agrees to 1e-12
    for q in (q1, q2):
        assert bn_family.reference(burglary, q) == pytest.approx(
            bn_family.answer(burglary, q, method="exact").value, abs=1e-12)


def test_state_names_are_accepted_as_values(bn_family, burglary):
    """Values may be state names ('true') as well as indices."""
    by_name = Query(level=A, target=(("B", "true"),), evidence=(("J", "true"), ("M", "true")))
    assert bn_family.answer(burglary, by_name, method="exact").value == pytest.approx(0.284172,
                                                                                      abs=1e-6)


@pytest.mark.parametrize("query,value", [
    (P(("lung", "yes"), [("dysp", "yes"), ("smoke", "yes")]), 0.148334),
    (P(("either", "yes")), 0.064828),
    (P(("xray", "yes")), 0.11029),
    (P(("dysp", "yes")), 0.435971),
    (P(("smoke", "yes"), [("dysp", "yes")]), 0.633997),
    (P(("tub", "yes"), [("asia", "yes"), ("xray", "yes")]), 0.337716),
])
def test_asia_marginals_match_lauritzen_spiegelhalter(bn_family, load_bundled, query, value):
    """Lauritzen & Spiegelhalter 1988, JRSS-B 50(2) — the chest-clinic network as shipped in
    pgmpy's asia.bif (states 'yes', 'no'); values from REFERENCES.md."""
    asia = load_bundled("asia")
    assert bn_family.answer(asia, query, method="exact").value == pytest.approx(value, abs=1e-5)


def test_intervening_differs_from_observing_on_the_confounded_example(bn_family, confounded):
    """Pearl 2009, Causality §3.3 (back-door adjustment; REFERENCES.md): P(y|x)=0.82 but
    P(y|do(x))=0.70; P(y|~x)=0.22 but P(y|do(~x))=0.40. pgmpy (via model.do) agrees."""
    cases = [(P(("Y", T), [("X", T)]), 0.82), (P(("Y", T), do=[("X", T)]), 0.70),
             (P(("Y", T), [("X", F)]), 0.22), (P(("Y", T), do=[("X", F)]), 0.40)]
    for q, value in cases:
        got = bn_family.answer(confounded, q, method="exact").value
        assert got == pytest.approx(value, abs=1e-12)
        assert bn_family.reference(confounded, q) == pytest.approx(value, abs=1e-12)


def test_do_with_evidence_conditions_in_the_mutilated_graph(bn_family, confounded):
    """P(y | do(x), z) = P(y | x, z) when Z is a parent of Y and not a descendant of X (Pearl
    2009 §3.2, truncated factorisation): here 0.9. pgmpy agrees."""
    q = P(("Y", T), [("Z", T)], do=[("X", T)])
    assert bn_family.answer(confounded, q, method="exact").value == pytest.approx(0.9, abs=1e-12)
    assert bn_family.reference(confounded, q) == pytest.approx(0.9, abs=1e-12)


# -- work counts ----------------------------------------------------------------------------------
def test_binary_chain_of_1000_nodes_multiplies_3998_entries(bn_family):
    """REFERENCES.md (Dechter 1999; Koller & Friedman 2009 §9.4): the sum of intermediate table
    entries on a 1000-node binary chain is 3998. The query is P(X999), the last node, without
    evidence: nothing is barren, so all 999 other variables are summed out, each step multiplying
    P(X_i | X_{i-1}) by the message over X_{i-1} (4 entries), plus the final 2-entry table."""
    chain = bn_family.build(Size(1000, 2), topology="chain", seed=0)
    q = P(("X999", 1))
    ans = bn_family.answer(chain, q, method="exact")
    assert ans.work == 3998
    assert bn_family.predicted_work(chain, q, method="exact") == 3998
    assert bn_family.predicted_bytes(chain, q, method="exact") == 4 * 8
    # P(X0) prunes every descendant (barren nodes): only the 2-entry prior remains.
    assert bn_family.answer(chain, P(("X0", 1)), method="exact").work == 2


@pytest.mark.parametrize("topology", ["chain", "tree", "grid", "random", "layered"])
@pytest.mark.parametrize("level", [A, I])
def test_predicted_work_equals_counted_work(bn_family, topology, level):
    """The graph-only cost formula equals the entries the engine's einsums actually multiply."""
    inst = bn_family.build(Size(20, 3), topology=topology, seed=2)
    for q in bn_family.queries(inst, level, n=10, seed=4):
        assert bn_family.predicted_work(inst, q, method="exact") == \
            bn_family.answer(inst, q, method="exact").work


# -- batching -------------------------------------------------------------------------------------
def _same_shape_batch(family, inst, n, seed):
    """n queries with the shape of one random 3-evidence query and varied evidence values."""
    base = next(q for q in family.queries(inst, A, n=200, seed=seed) if len(q.evidence) == 3)
    rng = np.random.default_rng(seed)
    out = []
    for _ in range(n):
        card = {v: inst.network.card(v) for v in inst.network.variables}
        ev = tuple((v, int(rng.integers(card[v]))) for v, _ in base.evidence)
        t = base.target[0][0]
        out.append(dataclasses.replace(base, target=((t, int(rng.integers(card[t]))),),
                                       evidence=ev))
    return out


@pytest.mark.parametrize("topology", ["grid", "random"])
def test_batched_answers_equal_single_answers(bn_family, topology):
    """answer_batch (plans cached by shape, evidence vectorised) equals answering one by one, to
    1e-12, on same-shape batches and on mixed-shape batches with interventions."""
    inst = bn_family.build(Size(25, 3), topology=topology, seed=7)
    batch = _same_shape_batch(bn_family, inst, 64, seed=1)
    batch += bn_family.queries(inst, I, n=20, seed=2) + bn_family.queries(inst, A, n=20, seed=3)
    together = bn_family.answer_batch(inst, batch, method="exact")
    fresh = bn_family.build(Size(25, 3), topology=topology, seed=7)  # empty plan cache
    alone = [bn_family.answer(fresh, q, method="exact") for q in batch]
    for a, b in zip(together, alone):
        assert a.value == pytest.approx(b.value, abs=1e-12) and a.work == b.work


def test_batch_reuses_one_plan_per_shape(bn_family):
    """A batch of one shape compiles exactly one plan (issue 9: plans cached per query shape)."""
    inst = bn_family.build(Size(16, 2), topology="grid", seed=1)
    batch = _same_shape_batch(bn_family, inst, 50, seed=3)
    bn_family.answer_batch(inst, batch, method="exact")
    assert len(inst._cache["plans"]) == 1


# -- sampling -------------------------------------------------------------------------------------
@pytest.mark.parametrize("topology,level", [("chain", A), ("grid", A), ("random", I),
                                            ("layered", I)])
def test_likelihood_weighting_lies_within_four_standard_errors(topology, level):
    """Likelihood weighting (Fung & Chang 1989) estimates lie within 4 stderr of the exact value
    (common practice: a z-test at ~1e-4 two-sided level), seeded."""
    from model_zoo.bayesnet import BayesNetFamily

    fam = BayesNetFamily(n_samples=4000, seed=5)
    inst = fam.build(Size(12, 3), topology=topology, seed=3)
    qs = fam.queries(inst, level, n=15, seed=6)
    for q, est in zip(qs, fam.answer_batch(inst, qs, method="sampling")):
        exact = fam.answer(inst, q, method="exact").value
        assert est.stderr > 0 and est.n_accepted == 4000 and not est.is_exact
        assert abs(est.value - exact) <= 4 * est.stderr, q.describe()
        assert est.work == fam.predicted_work(inst, q, method="sampling")


def test_likelihood_weighting_error_shrinks_with_samples():
    """The stated standard error falls roughly like 1/sqrt(n) (common practice)."""
    from model_zoo.bayesnet import BayesNetFamily

    inst = BayesNetFamily().build(Size(9, 2), topology="grid", seed=1)
    q = P(("X8", 0), [("X0", 1), ("X4", 0)])
    se = [BayesNetFamily(n_samples=n, seed=1).answer(inst, q, method="sampling").stderr
          for n in (1000, 16000)]
    assert 2.5 < se[0] / se[1] < 6.5


def test_sampling_is_reproducible_for_a_seed():
    """The same family seed gives the same estimate; another seed a different one."""
    from model_zoo.bayesnet import BayesNetFamily

    inst = BayesNetFamily().build(Size(9, 2), topology="grid", seed=1)
    q = P(("X8", 0), [("X0", 1)])
    a = BayesNetFamily(seed=3).answer(inst, q, method="sampling").value
    b = BayesNetFamily(seed=3).answer(inst, q, method="sampling").value
    c = BayesNetFamily(seed=4).answer(inst, q, method="sampling").value
    assert a == b != c


# -- errors and edge cases ----------------------------------------------------------------------
def test_zero_probability_evidence_raises_model_error(bn_family, load_bundled):
    """asia: 'either' is a deterministic OR of tub and lung, so either=no with lung=yes has
    probability zero: a ModelError saying so, never NaN (PGMPY-NOTES: pgmpy returns NaN)."""
    asia = load_bundled("asia")
    q = P(("xray", "yes"), [("either", "no"), ("lung", "yes")])
    with pytest.raises(ModelError, match="probability zero"):
        bn_family.answer(asia, q, method="exact")
    with pytest.raises(ModelError, match="probability zero"):
        bn_family.answer(asia, q, method="sampling")
    # (pgmpy itself answers 0.05 here: it drops 'lung' as d-separated from xray given either,
    # and never sees that the evidence is impossible.)


def test_unknown_variables_and_states_are_input_errors(bn_family, burglary):
    """A variable or state the network does not have is an InputError naming it."""
    with pytest.raises(InputError, match="'Q'"):
        bn_family.answer(burglary, P(("Q", 0)), method="exact")
    with pytest.raises(InputError, match="maybe"):
        bn_family.answer(burglary, P(("B", "maybe")), method="exact")
    with pytest.raises(InputError, match="'B'"):
        bn_family.answer(burglary, P(("B", 2)), method="exact")


def test_counterfactual_and_unknown_methods_are_unsupported(bn_family, confounded):
    """A Bayesian network expresses no counterfactuals (Pearl's third rung)."""
    q = Query(level=Level.COUNTERFACTUAL, target=(("Y", 0),), evidence=(("X", 1),),
              intervention=(("X", 0),))
    with pytest.raises(UnsupportedQuery):
        bn_family.answer(confounded, q, method="exact")
    with pytest.raises(UnsupportedQuery):
        bn_family.queries(confounded, Level.COUNTERFACTUAL, n=1, seed=0)
    with pytest.raises(UnsupportedQuery):
        bn_family.answer(confounded, P(("Y", 0)), method="magic")


def test_observed_or_intervened_target_is_an_indicator(bn_family, confounded):
    """P(X=x | do(X=x)) = 1 and P(X=x' | do(X=x)) = 0; conflicting evidence and do() is an
    event of probability zero."""
    assert bn_family.answer(confounded, P(("X", 0), do=[("X", 0)]), method="exact").value == 1.0
    assert bn_family.answer(confounded, P(("X", 1), do=[("X", 0)]), method="exact").value == 0.0
    with pytest.raises(ModelError, match="probability zero"):
        bn_family.answer(confounded, P(("Y", 0), [("X", 1)], do=[("X", 0)]), method="exact")


# -- instances, queries, profile, theory ---------------------------------------------------------
def test_generated_cpts_are_normalised_and_strictly_positive(bn_family):
    """Dirichlet draws mixed with a uniform floor: every column sums to 1, every entry >= floor/d."""
    inst = bn_family.build(Size(30, 4), topology="random", seed=8)
    for v in inst.network.variables:
        t = inst.network.cpts[v]
        assert np.allclose(t.sum(axis=0), 1.0, atol=1e-12)
        assert t.min() >= 0.05 / 4 - 1e-15


def test_queries_are_seeded_and_shaped_as_documented(bn_family):
    """Same seed same queries; 0-3 evidence variables; one do() variable, never the target."""
    inst = bn_family.build(Size(30, 3), topology="layered", seed=1)
    qs = bn_family.queries(inst, I, n=40, seed=5)
    assert qs == bn_family.queries(inst, I, n=40, seed=5)
    assert qs != bn_family.queries(inst, I, n=40, seed=6)
    for q in qs:
        (t, _), = q.target
        assert len(q.intervention) == 1 and q.intervention[0][0] != t
        assert 0 <= len(q.evidence) <= 3
        assert t not in {v for v, _ in q.evidence}
    assert {len(q.evidence) for q in qs} == {0, 1, 2, 3}


def test_profile_grows_with_both_axes_and_reports_width(bn_family):
    """Profile: more variables along the graph axis, more parameters along the mechanism axis;
    the min-fill width of a k x k grid's moral graph is at least k."""
    small = bn_family.profile(bn_family.build(Size(16, 2), topology="grid", seed=0))
    large = bn_family.profile(bn_family.build(Size(36, 2), topology="grid", seed=0))
    wide = bn_family.profile(bn_family.build(Size(16, 5), topology="grid", seed=0))
    assert large["n_variables"] == 36 > small["n_variables"] == 16
    assert large["treewidth_upper"] >= 6 > small["treewidth_upper"] >= 4
    assert wide["n_parameters"] > small["n_parameters"]
    # free parameters, d = 2: root 1, six border nodes with one parent 2 each, nine with two 4 each
    assert small["n_parameters"] == 1 + 6 * 2 + 9 * 4
    for key in ("n_edges", "max_in_degree", "n_states_max", "largest_table_entries"):
        assert key in small


def test_realizable_rounds_grids_and_enforces_two_states(bn_family):
    """Grids are k x k; one state per variable is raised to two."""
    assert bn_family.realizable(Size(50, 1), topology="grid") == Size(49, 2)
    assert bn_family.build(Size(50, 1), topology="grid", seed=0).size == Size(49, 2)


def test_expected_growth_follows_treewidth(bn_family):
    """O(n d^(w+1)) (Dechter 1999): polynomial on chains/trees, exponential on grids, silent on
    random graphs; polynomial on the mechanism axis."""
    eg = lambda axis, top, m="exact": bn_family.expected_growth(axis=axis, topology=top,
                                                                 level=A, method=m)
    assert eg("graph", "chain") == eg("graph", "tree") == "polynomial"
    assert eg("graph", "grid") == "exponential"
    assert eg("graph", "random") is None
    assert eg("mechanism", "grid") == "polynomial"
    assert eg("graph", "grid", "sampling") == "polynomial"


def test_exact_cost_grows_exponentially_on_grids_but_linearly_on_chains(bn_family):
    """Work per query: ~linear in n on a chain, ~d^k on a k x k grid (ratio of successive
    sizes grows)."""
    def work(top, n):
        inst = bn_family.build(Size(n, 2), topology=top, seed=0)
        last = inst.network.variables[-1]
        return bn_family.answer(inst, P((last, 0)), method="exact").work

    assert work("chain", 400) == pytest.approx(2 * work("chain", 200), rel=0.01)
    g = [work("grid", k * k) for k in (4, 6, 8)]
    assert g[2] / g[1] > g[1] / g[0] * 1.2 or g[2] / g[1] > 4
