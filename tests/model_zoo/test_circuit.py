"""The circuit family: worked examples, brute-force agreement, structural checks, numerics."""

from __future__ import annotations

import itertools
import json

import numpy as np
import pytest

import model_zoo
from model_zoo.base import Level, Query, Size
from model_zoo.circuit import (CircuitBuilder, checks, compile_network, determinism,
                               dump_circuit, is_decomposable, is_smooth, load_circuit,
                               log_values, mpe_assignment, vtree_circuit, vtree_edges)
from model_zoo.circuit.family import CircuitFamily, CircuitInstance, ZeroProbabilityEvidence
from model_zoo.discrete import DiscreteNetwork

A = Level.ASSOCIATIONAL


def bernoulli(p: float) -> list[float]:
    return [1.0 - p, p]


def s_circuit_dict() -> dict:
    """REFERENCES.md "Smooth, decomposable, not deterministic":
    S = 0.4·[B(X1;.9)·B(X2;.3)] + 0.6·[B(X1;.2)·B(X2;.7)]."""
    return {
        "family": "circuit", "format_version": 1,
        "variables": [{"name": "X1", "states": ["0", "1"]}, {"name": "X2", "states": ["0", "1"]}],
        "nodes": [
            {"id": "a1", "type": "leaf", "variable": "X1", "probabilities": bernoulli(.9)},
            {"id": "a2", "type": "leaf", "variable": "X2", "probabilities": bernoulli(.3)},
            {"id": "b1", "type": "leaf", "variable": "X1", "probabilities": bernoulli(.2)},
            {"id": "b2", "type": "leaf", "variable": "X2", "probabilities": bernoulli(.7)},
            {"id": "pa", "type": "product", "children": ["a1", "a2"]},
            {"id": "pb", "type": "product", "children": ["b1", "b2"]},
            {"id": "S", "type": "sum", "children": ["pa", "pb"], "weights": [0.4, 0.6]},
        ],
        "root": "S",
    }


@pytest.fixture()
def s_instance(tmp_path) -> CircuitInstance:
    path = tmp_path / "s.json"
    path.write_text(json.dumps(s_circuit_dict()))
    return CircuitFamily().load(path)


# -- REFERENCES.md worked examples ---------------------------------------------------------------
def test_reference_circuit_joint_marginals_and_conditional(s_instance):
    """The hand-computable circuit of REFERENCES.md (Probabilistic circuits): joint, marginals by
    setting leaves to 1, and a conditional as a ratio of two passes."""
    c = s_instance.circuit
    joint = np.exp(log_values(c, np.array([[0, 0], [0, 1], [1, 0], [1, 1]])))
    np.testing.assert_allclose(joint, [.172, .348, .288, .192], atol=1e-12)
    f = CircuitFamily()
    p1 = f.answer(s_instance, Query(level=A, target=(("X1", 1),)), method="exact")
    p2 = f.answer(s_instance, Query(level=A, target=(("X2", 1),)), method="exact")
    cond = f.answer(s_instance, Query(level=A, target=(("X1", 1),), evidence=(("X2", 1),)),
                    method="exact")
    assert p1.value == pytest.approx(.48, abs=1e-12)
    assert p2.value == pytest.approx(.54, abs=1e-12)
    assert cond.value == pytest.approx(.355556, abs=1e-6)
    assert cond.work == 2 * c.n_edges == 2 * p1.work          # ratio of two passes
    assert p1.is_exact and cond.is_exact


def test_reference_circuit_mpe_flagged_not_exact(s_instance):
    """REFERENCES.md: true MPE is (0,1) with 0.348; max-product reports the right state with
    the wrong value 0.336 because the circuit is not deterministic."""
    f = CircuitFamily()
    c = s_instance.circuit
    ans = f.answer(s_instance, Query(level=A, target=(), kind="mpe"), method="exact")
    assert ans.value == pytest.approx(0.336, abs=1e-12)
    assert not ans.is_exact and "not deterministic" in ans.note
    state, log_value = mpe_assignment(c)
    assert state == {"X1": 0, "X2": 1}
    assert np.exp(log_value) == pytest.approx(0.336, abs=1e-12)
    assert float(checks.joint_table(c).max()) == pytest.approx(0.348, abs=1e-12)
    assert is_smooth(c) and is_decomposable(c)
    det = determinism(c)
    assert det.exact and not det.is_deterministic
    assert f.tractable_queries(s_instance) == ["likelihood", "probability", "conditional"]
    # the reference of a non-deterministic MPE recomputes what max-product reports
    assert f.reference(s_instance, Query(level=A, target=(), kind="mpe")) == pytest.approx(.336)


def two_node_network() -> DiscreteNetwork:
    """Darwiche 2003 (JACM 50(3)) A->B: theta_a=.3, theta_b|a=.9, theta_b|~a=.2."""
    return DiscreteNetwork(
        variables=("A", "B"), states={"A": ("0", "1"), "B": ("0", "1")},
        parents={"A": (), "B": ("A",)},
        cpts={"A": np.array([.7, .3]), "B": np.array([[.8, .1], [.2, .9]])}, name="a-b")


@pytest.mark.parametrize("order", [("A", "B"), ("B", "A"), None])
def test_darwiche_network_polynomial(order):
    """REFERENCES.md (Darwiche 2003): P(b)=.41, P(a|b)=.658537, and df/dlambda_{a=1} at evidence
    b=1 equals P(a,b)=0.27. No backward pass is implemented: the derivative is checked through
    multilinearity (f is linear in lambda_a, so the derivative is f with lambda_a=(0,1))."""
    cc = compile_network(two_node_network(), order=order)
    c = cc.circuit
    pb = np.exp(log_values(c, np.array([[-1, 1]])))[0]
    pab = np.exp(log_values(c, np.array([[1, 1]])))[0]
    assert pb == pytest.approx(.41, abs=1e-12)
    assert pab / pb == pytest.approx(.658537, abs=1e-6)
    assert pab == pytest.approx(0.27, abs=1e-12)
    assert cc.width == 1 and cc.n_edges == c.n_edges > 0
    assert is_smooth(c) and is_decomposable(c)
    det = determinism(c)
    assert det.exact and det.is_deterministic       # what the exhaustive test finds


# -- numerics ------------------------------------------------------------------------------------
def test_two_thousand_variables_with_near_zero_leaves_stay_finite():
    """Issue 8: 2,000 variables and near-zero probabilities give a finite log-likelihood; the
    mixture of two products whose likelihoods differ by 200,000 orders of magnitude is
    evaluated by log-sum-exp to its analytic value."""
    n = 2000
    names = [f"V{i}" for i in range(n)]
    b = CircuitBuilder(names, [("0", "1")] * n)
    first = b.leaves(np.arange(n), np.tile(bernoulli(1e-300), (n, 1)))
    second = b.leaves(np.arange(n), np.tile(bernoulli(1e-200), (n, 1)))
    prods = b.products(np.stack([first, second]))
    root = b.sums(prods[None, :], np.array([[.5, .5]]))[0]
    c = b.build(int(root), normalised=True, name="tiny")
    ones = np.ones((1, n), dtype=np.int64)
    ll = log_values(c, ones)[0]
    expected = np.log(.5) + n * np.log(1e-200)     # the other term is 1e-200000 times smaller
    assert np.isfinite(ll) and ll == pytest.approx(expected, rel=1e-12)
    assert log_values(c, np.full((1, n), -1))[0] == pytest.approx(0.0, abs=1e-12)
    assert np.isfinite(log_values(c, ones, mode="max")[0])


def test_two_thousand_variable_vtree_circuit_family_likelihood_finite():
    """A scaled 2,000-variable circuit with near-zero leaves (Dirichlet 0.05) answers its
    likelihood queries with finite log values."""
    f = CircuitFamily(leaf_concentration=0.05)
    inst = f.build(Size(2000, 2), topology="balanced", seed=4)
    qs = [q for q in f.queries(inst, A, n=8, seed=2) if q.kind == "likelihood"]
    answers = f.answer_batch(inst, qs, method="exact")
    assert qs and all(np.isfinite(a.value) and a.value < -100 for a in answers)


def test_zero_probability_evidence_is_reported_not_nan(tmp_path):
    """Evidence of probability zero raises a clear error instead of returning NaN."""
    d = s_circuit_dict()
    d["nodes"][0]["probabilities"] = [1.0, 0.0]
    d["nodes"][2]["probabilities"] = [1.0, 0.0]
    path = tmp_path / "zero.json"
    path.write_text(json.dumps(d))
    f = CircuitFamily()
    inst = f.load(path)
    with pytest.raises(ZeroProbabilityEvidence, match="probability 0"):
        f.answer(inst, Query(level=A, target=(("X2", 1),), evidence=(("X1", 1),)),
                 method="exact")
    like = f.answer(inst, Query(level=A, target=(("X1", 1), ("X2", 0)), kind="likelihood"),
                    method="exact")
    assert like.value == -np.inf


# -- engine against brute force ------------------------------------------------------------------
@pytest.mark.parametrize("topology", ["balanced", "right_linear", "chain", "tree"])
@pytest.mark.parametrize("n, k, n_states", [(1, 2, 2), (5, 3, 2), (7, 2, 3), (10, 4, 2)])
def test_layered_engine_equals_brute_force(topology, n, k, n_states):
    """Brute-force enumeration (an independent plain-space recursion) agrees with the layered
    log-space engine to 1e-9 on 20 random queries of every kind, batched and one by one."""
    f = CircuitFamily(n_states=n_states)
    inst = f.build(Size(n, k), topology=topology, seed=11)
    qs = f.queries(inst, A, n=20, seed=5)
    assert {q.kind for q in qs} == {"likelihood", "probability", "mpe"}
    assert any(q.evidence and q.kind == "probability" for q in qs) or n == 1
    batch = f.answer_batch(inst, qs, method="exact")
    for q, a in zip(qs, batch):
        r = f.reference(inst, q)
        assert r is not None
        assert abs(a.value - r) <= 1e-9 * max(1.0, abs(r)), q.describe()
        assert f.answer(inst, q, method="exact").value == pytest.approx(a.value, abs=1e-12)
        assert a.work == f.predicted_work(inst, q, method="exact")
    joint = checks.joint_table(inst.circuit)
    assert joint.sum() == pytest.approx(1.0, abs=1e-12)


def test_vtree_circuit_size_formula_and_properties():
    """Edges follow (n-1)(K^3+2K^2)+K; built instances are smooth and decomposable and (with
    positive leaves) not deterministic, found exhaustively at 10 variables and by sampling at
    40."""
    for n, k in [(1, 3), (2, 1), (9, 2), (16, 5)]:
        c = vtree_circuit(n, k, topology="balanced", seed=0)
        assert c.n_edges == vtree_edges(n, k)
        assert is_smooth(c) and is_decomposable(c)
    small = determinism(vtree_circuit(10, 2, topology="right_linear", seed=1))
    big = determinism(vtree_circuit(40, 2, topology="right_linear", seed=1))
    assert small.exact and not small.is_deterministic
    assert not big.exact and not big.is_deterministic


def test_broken_circuits_fail_the_structural_checks(tmp_path):
    """Hand-broken circuits: a sum over different scopes is not smooth; a product of two leaves
    on one variable is not decomposable; the list of tractable kinds shrinks accordingly."""
    d = s_circuit_dict()
    d["nodes"][6]["children"] = ["pa", "b1"]               # scopes {X1,X2} vs {X1}
    p1 = tmp_path / "nonsmooth.json"
    p1.write_text(json.dumps(d))
    c1 = load_circuit(p1)
    assert not is_smooth(c1) and is_decomposable(c1)
    d = s_circuit_dict()
    d["nodes"][4]["children"] = ["a1", "b1"]               # X1 twice under one product
    d["nodes"][5]["children"] = ["a2", "b2"]
    p2 = tmp_path / "nondecomposable.json"
    p2.write_text(json.dumps(d))
    c2 = load_circuit(p2)
    assert not is_decomposable(c2)
    assert not is_smooth(c2)                               # the sum now mixes {X1} and {X2}
    f = CircuitFamily()
    inst = f.load(p2)
    assert f.tractable_queries(inst) == ["likelihood"]
    a = f.answer(inst, Query(level=A, target=(("X1", 1),)), method="exact")
    assert not a.is_exact


# -- compilation against pgmpy ---------------------------------------------------------------------
def to_pgmpy(net: DiscreteNetwork):
    from pgmpy.factors.discrete import TabularCPD
    from pgmpy.models import DiscreteBayesianNetwork
    model = DiscreteBayesianNetwork([(p, v) for v in net.variables for p in net.parents[v]])
    model.add_nodes_from(net.variables)
    for v in net.variables:
        ps = list(net.parents[v])
        table = np.asarray(net.cpts[v]).reshape(net.card(v), -1)
        model.add_cpds(TabularCPD(v, net.card(v), table, evidence=ps or None,
                                  evidence_card=[net.card(p) for p in ps] or None,
                                  state_names={u: list(net.states[u]) for u in [v] + ps}))
    return model


def pgmpy_probability(model, net, target, evidence) -> float:
    from pgmpy.inference import VariableElimination
    ve = VariableElimination(model)
    ev = {v: net.states[v][x] for v, x in evidence.items()}
    q = ve.query(list(target), evidence=ev or None, joint=True, show_progress=False)
    return float(q.get_value(**{v: net.states[v][x] for v, x in target.items()}))


def burglary() -> DiscreteNetwork:
    """Russell & Norvig, AIMA 3rd ed., Fig. 14.2 (REFERENCES.md)."""
    T = ("0", "1")
    a = np.array([[[.999, .71], [.06, .05]], [[.001, .29], [.94, .95]]])
    return DiscreteNetwork(
        variables=("B", "E", "A", "J", "M"), states={v: T for v in "BEAJM"},
        parents={"B": (), "E": (), "A": ("B", "E"), "J": ("A",), "M": ("A",)},
        cpts={"B": np.array([.999, .001]), "E": np.array([.998, .002]), "A": a,
              "J": np.array([[.95, .1], [.05, .9]]), "M": np.array([[.99, .3], [.01, .7]])},
        name="burglary")


def compiled_instance(net: DiscreteNetwork, **kw) -> CircuitInstance:
    cc = compile_network(net, **kw)
    return CircuitInstance(size=Size(len(net.variables), 2), topology="file", seed=0,
                           name=net.name, circuit=cc.circuit, source="bayesnet", compiled=cc)


def test_compiled_burglary_matches_book_and_pgmpy():
    """AIMA Fig. 14.2 values from REFERENCES.md (P(B|j,m)=0.284172, P(J|b)=0.849017,
    P(j,m,a,~b,~e)=0.00062811) and pgmpy's VariableElimination on the same network."""
    net = burglary()
    inst = compiled_instance(net)
    f = CircuitFamily()
    ans = lambda t, e=(), kind="probability": f.answer(  # noqa: E731
        inst, Query(level=A, target=t, evidence=e, kind=kind), method="exact").value
    assert ans((("B", 1),), (("J", 1), ("M", 1))) == pytest.approx(0.284172, abs=1e-6)
    assert ans((("J", 1),), (("B", 1),)) == pytest.approx(0.849017, abs=1e-6)
    full = (("B", 0), ("E", 0), ("A", 1), ("J", 1), ("M", 1))
    assert np.exp(ans(full, kind="likelihood")) == pytest.approx(0.00062811, abs=5e-9)
    model = to_pgmpy(net)
    for t, e in [({"B": 1}, {"J": 1, "M": 1}), ({"A": 1}, {}), ({"E": 1}, {"M": 0}),
                 ({"J": 1, "M": 0}, {"E": 1})]:
        mine = ans(tuple(t.items()), tuple(e.items()))
        assert mine == pytest.approx(pgmpy_probability(model, net, t, e), abs=1e-12)
    c = inst.circuit
    assert is_smooth(c) and is_decomposable(c) and determinism(c).is_deterministic
    assert f.tractable_queries(inst) == ["likelihood", "probability", "conditional", "mpe"]
    mpe = f.answer(inst, Query(level=A, target=(), evidence=(("J", 1),), kind="mpe"),
                   method="exact")
    assert mpe.is_exact and mpe.value == pytest.approx(
        f.reference(inst, Query(level=A, target=(), evidence=(("J", 1),), kind="mpe")), abs=1e-12)


def random_network(n: int, seed: int, max_parents: int = 2, max_card: int = 3) -> DiscreteNetwork:
    rng = np.random.default_rng(seed)
    names = tuple(f"V{i}" for i in range(n))
    cards = {v: int(rng.integers(2, max_card + 1)) for v in names}
    parents, cpts = {}, {}
    for i, v in enumerate(names):
        ps = tuple(sorted(rng.choice(i, size=min(i, int(rng.integers(0, max_parents + 1))),
                                     replace=False).tolist())) if i else ()
        parents[v] = tuple(names[j] for j in ps)
        shape = (cards[v],) + tuple(cards[p] for p in parents[v])
        t = rng.dirichlet(np.ones(cards[v]), size=int(np.prod(shape[1:], dtype=int))).T
        cpts[v] = t.reshape(shape)
    return DiscreteNetwork(variables=names, states={v: tuple(map(str, range(cards[v])))
                                                    for v in names},
                           parents=parents, cpts=cpts, name=f"random{seed}")


@pytest.mark.parametrize("seed", [0, 1, 2, 3])
def test_compiled_random_networks_match_pgmpy(seed):
    """Compiled circuits of random small networks answer the family's random queries as pgmpy
    does (marginals and conditionals), and likelihoods as the product of CPT entries; the
    exhaustive determinism test finds every compiled circuit deterministic."""
    net = random_network(7, seed)
    inst = compiled_instance(net)
    f = CircuitFamily()
    model = to_pgmpy(net)
    qs = f.queries(inst, A, n=20, seed=seed)
    for q, a in zip(qs, f.answer_batch(inst, qs, method="exact")):
        r = f.reference(inst, q)
        assert abs(a.value - r) <= 1e-9 * max(1.0, abs(r)), q.describe()
        if q.kind == "probability":
            t = {v: x for v, x in q.target}
            e = {v: x for v, x in q.evidence}
            assert a.value == pytest.approx(pgmpy_probability(model, net, t, e), abs=1e-9)
    c = inst.circuit
    assert is_smooth(c) and is_decomposable(c)
    det = determinism(c)
    assert det.exact and det.is_deterministic


def test_intervention_is_compiled_from_the_mutilated_network():
    """REFERENCES.md observational vs interventional (Pearl 2009 §3.3): P(y|x)=0.82 but
    P(y|do(x))=0.70; P(y|do(~x))=0.40."""
    T = ("0", "1")
    y1 = np.array([[.1, .7], [.5, .9]])                    # P(y=1 | x, z), indexed [x, z]
    net = DiscreteNetwork(
        variables=("Z", "X", "Y"), states={v: T for v in "ZXY"},
        parents={"Z": (), "X": ("Z",), "Y": ("X", "Z")},
        cpts={"Z": np.array([.5, .5]), "X": np.array([[.8, .2], [.2, .8]]),
              "Y": np.stack([1 - y1, y1])},
        name="zxy")
    obs = compile_network(net).circuit
    p = np.exp(log_values(obs, np.array([[-1, 1, 1]])) - log_values(obs, np.array([[-1, 1, -1]])))
    assert p[0] == pytest.approx(0.82, abs=1e-12)
    for x, want in [(1, 0.70), (0, 0.40)]:
        do = compile_network(net, intervention={"X": x}).circuit
        assert np.exp(log_values(do, np.array([[-1, -1, 1]])))[0] == pytest.approx(want, abs=1e-12)


def test_bayesnet_source_compiles_family_instances():
    """With source="bayesnet" the family compiles the bayesnet family's instances; answers
    agree with that family's reference (pgmpy)."""
    try:
        model_zoo.get("bayesnet")
    except Exception as exc:  # the bayesnet family is written by another engineer
        pytest.skip(f"bayesnet family not importable yet: {exc}")
    f = CircuitFamily(source="bayesnet")
    for topology, seed in [("chain", 1), ("tree", 2), ("random", 3)]:
        size = f.realizable(Size(8, 2), topology=topology)
        inst = f.build(size, topology=topology, seed=seed)
        assert inst.compiled is not None and inst.compiled.n_edges == inst.circuit.n_edges
        qs = f.queries(inst, A, n=12, seed=seed)
        for q, a in zip(qs, f.answer_batch(inst, qs, method="exact")):
            r = f.reference(inst, q)
            if r is not None:
                assert abs(a.value - r) <= 1e-9 * max(1.0, abs(r)), q.describe()
        assert f.profile(inst)["is_deterministic"] == 1.0


# -- family contract -------------------------------------------------------------------------------
def test_same_seed_same_instance_and_profile_grows():
    """Same seed -> identical circuit; the profile grows along both axes; theory says
    polynomial on both."""
    f = CircuitFamily()
    a = f.build(Size(6, 3), topology="balanced", seed=9)
    b = f.build(Size(6, 3), topology="balanced", seed=9)
    assert np.array_equal(a.circuit.child_idx, b.circuit.child_idx)
    assert np.array_equal(a.circuit.edge_weight, b.circuit.edge_weight)
    assert np.array_equal(a.circuit.leaf_probs, b.circuit.leaf_probs)
    assert f.queries(a, A, n=10, seed=1) == f.queries(b, A, n=10, seed=1)
    small = f.profile(f.build(Size(6, 2), topology="right_linear", seed=1))
    wide = f.profile(f.build(Size(6, 4), topology="right_linear", seed=1))
    tall = f.profile(f.build(Size(12, 2), topology="right_linear", seed=1))
    for key in ("n_edges", "n_nodes", "n_parameters"):
        assert wide[key] > small[key] and tall[key] > small[key]
    for axis in ("graph", "mechanism"):
        assert f.expected_growth(axis=axis, topology="balanced", level=A,
                                 method="exact") == "polynomial"
    with pytest.raises(model_zoo.base.InputError, match="topology"):
        f.build(Size(4, 2), topology="grid", seed=0)


def test_dump_load_round_trip(tmp_path):
    """A dumped circuit loads back with the same answers."""
    f = CircuitFamily(n_states=3)
    inst = f.build(Size(5, 2), topology="balanced", seed=2)
    path = tmp_path / "c.json"
    f.dump(inst, path)
    back = f.load(path)
    qs = f.queries(inst, A, n=12, seed=3)
    for x, y in zip(f.answer_batch(inst, qs, method="exact"), f.answer_batch(back, qs, method="exact")):
        assert x.value == pytest.approx(y.value, abs=1e-12)
    cc = compile_network(burglary())
    dump_circuit(cc.circuit, tmp_path / "ac.json")
    ac = load_circuit(tmp_path / "ac.json")
    assert not ac.normalised and ac.n_edges == cc.circuit.n_edges


# -- bad files -------------------------------------------------------------------------------------
def _mutate(d, path, value):
    obj = d
    for key in path[:-1]:
        obj = obj[key]
    if value is _DELETE:
        del obj[path[-1]]
    else:
        obj[path[-1]] = value


_DELETE = object()


@pytest.mark.parametrize("path, value, field", [
    (("nodes", 6, "children"), ["pa", "nope"], "children"),
    (("nodes", 6, "weights"), [0.4, 0.5], "weights"),
    (("nodes", 6, "weights"), [1.4, -0.4], "weights"),
    (("nodes", 6, "weights"), [0.4], "weights"),
    (("nodes", 0, "probabilities"), [0.5, 0.6], "probabilities"),
    (("nodes", 0, "probabilities"), [0.5], "probabilities"),
    (("nodes", 0, "probabilities"), [1.5, -0.5], "probabilities"),
    (("nodes", 0, "variable"), "X9", "variable"),
    (("nodes", 4, "type"), "mixture", "type"),
    (("nodes", 4, "children"), ["a1", "S"], "cycle"),
    (("root",), "missing", "root"),
    (("family",), "bayesnet", "family"),
    (("format_version",), 2, "format_version"),
    (("variables",), [], "variables"),
    (("variables", 1, "name"), "X1", "name"),
    (("nodes", 1, "id"), "a1", "id"),
])
def test_bad_files_name_the_field(tmp_path, path, value, field):
    """Each malformed file raises one InputError line naming the file and the field."""
    d = s_circuit_dict()
    _mutate(d, path, value)
    p = tmp_path / "bad.json"
    p.write_text(json.dumps(d))
    with pytest.raises(model_zoo.base.InputError) as info:
        load_circuit(p)
    msg = str(info.value)
    assert "bad.json" in msg and field in msg and "\n" not in msg


def test_not_json_and_missing_file(tmp_path):
    p = tmp_path / "broken.json"
    p.write_text("{\"family\": \"circuit\", ")
    with pytest.raises(model_zoo.base.InputError, match="broken.json: not valid JSON"):
        load_circuit(p)
    with pytest.raises(model_zoo.base.InputError, match="cannot read"):
        load_circuit(tmp_path / "absent.json")
