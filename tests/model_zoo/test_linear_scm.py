"""The linear-Gaussian SCM family: closed-form answers at all three levels, checked outside.

Outside checks: the Primer's worked linear counterfactual (Pearl, Glymour & Jewell 2016,
*Causal Inference in Statistics: A Primer*, §4.2.3, REFERENCES.md) and a second exact path (dense
inverse + textbook Gaussian conditioning + twin network, Balke & Pearl 1994) that shares no
algebra with the engine. The Monte Carlo check lives in test_linear_scm_mc.py.
"""

from __future__ import annotations

import numpy as np
import pytest

import model_zoo
from model_zoo.base import Level, Query, Size, make_rng
from model_zoo.errors import InputError, UnsupportedQuery
from model_zoo.linear_scm import (
    LinearSCM,
    LinearSCMFamily,
    closed_form_reference,
    make_linear_scm,
    simulate,
)

LEVELS = (Level.ASSOCIATIONAL, Level.INTERVENTIONAL, Level.COUNTERFACTUAL)


def primer() -> LinearSCM:
    """Primer §4.2.3: X = U_X; H = 0.5 X + U_H; Y = 0.7 X + 0.4 H + U_Y (zero-mean noise)."""
    return make_linear_scm(["X", "H", "Y"], [{}, {"X": 0.5}, {"X": 0.7, "H": 0.4}],
                           [0.0, 0.0, 0.0], [1.0, 1.0, 1.0], name="primer")


def random_scm(seed: int, n: int, k: int) -> LinearSCM:
    """A random DAG built here (not by the family) with up to k parents per variable."""
    rng = make_rng(seed, "test-linear-scm")
    names = [f"V{i}" for i in range(n)]
    parents = []
    for i in range(n):
        pa = rng.choice(i, size=min(k, i), replace=False) if i else []
        parents.append({names[j]: float(rng.uniform(-1, 1)) for j in pa})
    # shuffled file order: make_linear_scm must sort topologically
    perm = rng.permutation(n)
    return make_linear_scm([names[i] for i in perm], [parents[i] for i in perm],
                           rng.normal(size=n).tolist(), rng.uniform(0.3, 2.0, size=n).tolist())


FACTUAL = (("X", 0.5), ("H", 1.0), ("Y", 1.5))


def cf(target: str, do: tuple, kind: str = "expectation", t: float = 0.0) -> Query:
    return Query(level=Level.COUNTERFACTUAL, target=((target, t),), evidence=FACTUAL,
                 intervention=do, kind=kind)


# -- the Primer's worked example ----------------------------------------------------------------
def test_primer_counterfactual_y_had_h_been_2() -> None:
    """Primer §4.2.3: with X=0.5, H=1, Y=1.5 observed, Y_{H=2} = 1.90 (a point mass)."""
    fam = LinearSCMFamily()
    ans = fam.answer(primer(), cf("Y", (("H", 2.0),)))
    assert ans.value == pytest.approx(1.90, abs=1e-12)
    assert "point mass" in ans.note
    # fully observed: the counterfactual is deterministic, so exceedance is 0/1, not 0.5-ish
    assert fam.answer(primer(), cf("Y", (("H", 2.0),), "exceedance", 1.85)).value == 1.0
    assert fam.answer(primer(), cf("Y", (("H", 2.0),), "exceedance", 1.95)).value == 0.0


def test_primer_abduction_recovers_the_noise() -> None:
    """Primer §4.2.3: abduction gives U = (0.5, 0.75, 0.75); read off by counterfactual queries.

    U_X = X_{do(H=0)} (X is no descendant of H), U_H = H_{do(X=0)}, U_Y = Y_{do(X=0, H=0)}.
    """
    fam, scm = LinearSCMFamily(), primer()
    assert fam.answer(scm, cf("X", (("H", 0.0),))).value == pytest.approx(0.5, abs=1e-12)
    assert fam.answer(scm, cf("H", (("X", 0.0),))).value == pytest.approx(0.75, abs=1e-12)
    assert fam.answer(scm, cf("Y", (("X", 0.0), ("H", 0.0)))).value == pytest.approx(0.75, abs=1e-12)


def test_primer_total_effect() -> None:
    """Primer §4.2.3: total effect of X on Y = 0.7 + 0.5 * 0.4 = 0.90 = E[Y|do(X=1)] - E[Y|do(X=0)]."""
    fam, scm = LinearSCMFamily(), primer()

    def do(x: float) -> float:
        q = Query(level=Level.INTERVENTIONAL, target=(("Y", 0.0),), intervention=(("X", x),),
                  kind="expectation")
        return fam.answer(scm, q).value

    assert do(1.0) - do(0.0) == pytest.approx(0.90, abs=1e-12)
    assert do(0.0) == pytest.approx(0.0, abs=1e-12)


def test_primer_reference_agrees() -> None:
    """The independent closed-form path gives the Primer's 1.90 as well (twin network)."""
    assert closed_form_reference(primer(), cf("Y", (("H", 2.0),))) == pytest.approx(1.90, abs=1e-12)


# -- exact engine == independent exact path -----------------------------------------------------
@pytest.mark.parametrize("level", LEVELS, ids=str)
@pytest.mark.parametrize("seed,n,k", [(1, 5, 2), (2, 9, 3), (3, 14, 1), (4, 12, 6)])
def test_engine_matches_independent_reference(level: Level, seed: int, n: int, k: int) -> None:
    """On 20 random queries per level the engine equals the dense twin-network path to 1e-9."""
    fam = LinearSCMFamily()
    scm = random_scm(seed, n, k)
    queries = fam.queries(scm, level, n=20, seed=seed)
    assert {q.kind for q in queries} == {"expectation", "exceedance"}
    for q in queries:
        got = fam.answer(scm, q, method="exact").value
        assert got == pytest.approx(fam.reference(scm, q), abs=1e-9), q.describe()


@pytest.mark.parametrize("level", LEVELS, ids=str)
@pytest.mark.parametrize("topology", ["chain", "tree", "grid", "random", "layered"])
def test_built_instances_match_reference(level: Level, topology: str) -> None:
    """Instances from build() (every topology, graph 12, in-degree 3) agree with the reference."""
    fam = LinearSCMFamily()
    size = fam.realizable(Size(graph=12, mechanism=3), topology=topology)
    scm = fam.build(size, topology=topology, seed=5)
    for q in fam.queries(scm, level, n=20, seed=11):
        assert fam.answer(scm, q).value == pytest.approx(fam.reference(scm, q), abs=1e-9)


def test_fully_observed_counterfactual_on_a_random_model() -> None:
    """With every variable observed U = (I - B) e exactly; the counterfactual is that U pushed
    through the mutilated mechanisms (computed here by plain simulation), with zero variance."""
    fam = LinearSCMFamily()
    scm = random_scm(8, 10, 3)
    rng = make_rng(3, "fully-observed")
    e = simulate(scm, (scm.noise_mean + rng.normal(size=(1, 10)) * np.sqrt(scm.noise_variance)))
    u = e - (e @ scm.dense_coefficients().T)
    do = {4: 2.5}
    expected = simulate(scm, u, do)[0]
    evidence = tuple((v, float(e[0, i])) for i, v in enumerate(scm.names))
    for y in range(10):
        q = Query(level=Level.COUNTERFACTUAL, target=((scm.names[y], 0.0),), evidence=evidence,
                  intervention=((scm.names[4], 2.5),), kind="expectation")
        ans = fam.answer(scm, q)
        assert ans.value == pytest.approx(expected[y], abs=1e-9)
        above = Query(level=q.level, target=((scm.names[y], expected[y] - 1e-6),),
                      evidence=evidence, intervention=q.intervention, kind="exceedance")
        below = Query(level=q.level, target=((scm.names[y], expected[y] + 1e-6),),
                      evidence=evidence, intervention=q.intervention, kind="exceedance")
        assert fam.answer(scm, above).value == 1.0
        assert fam.answer(scm, below).value == 0.0


def test_engine_uses_no_explicit_inverse(monkeypatch: pytest.MonkeyPatch) -> None:
    """Counterfactuals (and the rest) go through triangular solves and Cholesky, never an inverse."""
    import scipy.linalg

    def refuse(*args, **kwargs):
        raise AssertionError("explicit inverse called")

    monkeypatch.setattr(np.linalg, "inv", refuse)
    monkeypatch.setattr(scipy.linalg, "inv", refuse)
    fam = LinearSCMFamily()
    scm = random_scm(9, 12, 3)
    for level in LEVELS:
        for q in fam.queries(scm, level, n=6, seed=2):
            fam.answer(scm, q)
    with pytest.raises(AssertionError):
        closed_form_reference(scm, fam.queries(scm, Level.ASSOCIATIONAL, n=1, seed=2)[0])


# -- batching and work ----------------------------------------------------------------------------
@pytest.mark.parametrize("level", LEVELS, ids=str)
def test_batched_equals_single(level: Level) -> None:
    """answer_batch gives the single answers; rows sharing a shape share one plan (less work)."""
    fam = LinearSCMFamily()
    scm = random_scm(12, 15, 3)
    base = fam.queries(scm, level, n=6, seed=4)
    rng = make_rng(1, "rows")
    # ten evidence/intervention rows for each of the six shapes, mixed kinds and thresholds
    queries = []
    for q in base:
        for r in range(10):
            queries.append(Query(
                level=q.level, kind=("expectation", "exceedance")[r % 2],
                target=((q.target[0][0], float(rng.normal())),),
                evidence=tuple((v, x + float(rng.normal())) for v, x in q.evidence),
                intervention=tuple((v, x + float(rng.normal())) for v, x in q.intervention)))
    order = rng.permutation(len(queries))
    queries = [queries[i] for i in order]
    batch = fam.answer_batch(scm, queries, method="exact")
    single = [fam.answer(scm, q) for q in queries]
    for b, s, q in zip(batch, single, queries):
        assert b.value == pytest.approx(s.value, abs=1e-12)
        assert b.value == pytest.approx(fam.reference(scm, q), abs=1e-9)
    assert sum(a.work for a in batch) < 0.5 * sum(a.work for a in single)


@pytest.mark.parametrize("level", LEVELS, ids=str)
def test_predicted_work_is_the_counted_work(level: Level) -> None:
    """predicted_work (shapes only) equals the flops the engine counted while solving."""
    fam = LinearSCMFamily()
    scm = fam.build(Size(graph=30, mechanism=2), topology="random", seed=3)
    for q in fam.queries(scm, level, n=10, seed=8):
        assert fam.predicted_work(scm, q, method="exact") == pytest.approx(
            fam.answer(scm, q).work, rel=1e-12)
        assert fam.predicted_bytes(scm, q, method="exact") > 0


def test_work_grows_at_most_cubically_with_the_graph() -> None:
    """On a chain, the flops of a counterfactual grow polynomially (between linear and cubic)."""
    fam = LinearSCMFamily()
    works = []
    sizes = [20, 40, 80, 160]
    for n in sizes:
        scm = fam.build(Size(graph=n, mechanism=1), topology="chain", seed=0)
        q = Query(level=Level.COUNTERFACTUAL, target=((scm.names[-1], 0.0),),
                  evidence=((scm.names[0], 0.1), (scm.names[n // 2], 0.2), (scm.names[-1], 0.3)),
                  intervention=((scm.names[1], 1.0),), kind="expectation")
        works.append(fam.predicted_work(scm, q, method="exact"))
    slopes = np.diff(np.log(works)) / np.diff(np.log(sizes))
    assert np.all(slopes > 1.0) and np.all(slopes <= 3.0 + 1e-9)


# -- building -------------------------------------------------------------------------------------
def test_same_seed_same_instance() -> None:
    """build() is a function of (size, topology, seed)."""
    fam = LinearSCMFamily()
    one = fam.build(Size(graph=20, mechanism=3), topology="random", seed=4)
    two = fam.build(Size(graph=20, mechanism=3), topology="random", seed=4)
    other = fam.build(Size(graph=20, mechanism=3), topology="random", seed=5)
    assert one.names == two.names
    for a, b in zip(one.parents + one.coefficients, two.parents + two.coefficients):
        np.testing.assert_array_equal(a, b)
    np.testing.assert_array_equal(one.noise_variance, two.noise_variance)
    assert not np.array_equal(one.noise_variance, other.noise_variance)


@pytest.mark.parametrize("topology", ["chain", "tree", "grid", "random", "layered"])
@pytest.mark.parametrize("k", [1, 2, 5])
def test_in_degree_is_the_mechanism_size(topology: str, k: int) -> None:
    """Every variable has exactly min(k, number of earlier variables) parents."""
    fam = LinearSCMFamily()
    size = fam.realizable(Size(graph=16, mechanism=k), topology=topology)
    scm = fam.build(size, topology=topology, seed=1)
    assert [len(p) for p in scm.parents] == [min(k, i) for i in range(scm.n_variables)]
    assert all(np.all(p < i) for i, p in enumerate(scm.parents))


def test_variances_stay_bounded_as_the_graph_grows() -> None:
    """Coefficients' absolute sum <= 0.8 per mechanism bounds sd(X) by sd_max(U) / 0.2, so every
    marginal variance is <= 1.5 / 0.04 = 37.5 even on a dense, deep graph."""
    fam = LinearSCMFamily()
    scm = fam.build(Size(graph=300, mechanism=8), topology="random", seed=2)
    a = np.linalg.inv(np.eye(300) - scm.dense_coefficients())
    variances = np.einsum("ij,j,ij->i", a, scm.noise_variance, a)
    assert variances.max() <= 37.5


def test_profile_grows_on_both_axes() -> None:
    """More variables or more parents per variable give a larger structural profile."""
    fam = LinearSCMFamily()
    small = fam.profile(fam.build(Size(graph=10, mechanism=2), topology="random", seed=0))
    wide = fam.profile(fam.build(Size(graph=40, mechanism=2), topology="random", seed=0))
    deep = fam.profile(fam.build(Size(graph=10, mechanism=5), topology="random", seed=0))
    for key in ("n_variables", "n_edges", "n_parameters", "typical_query_flops"):
        assert wide[key] > small[key], key
    for key in ("n_edges", "n_parameters", "max_in_degree"):
        assert deep[key] > small[key], key
    assert small["n_parameters"] == small["n_edges"] + 2 * small["n_variables"]


def test_registry_and_theory() -> None:
    """The registry finds the family; theory says polynomial on both axes for exact answers."""
    fam_cls = model_zoo.get("linear_scm")
    assert fam_cls is LinearSCMFamily
    fam = fam_cls()
    for axis in ("graph", "mechanism"):
        for level in LEVELS:
            assert fam.expected_growth(axis=axis, topology="grid", level=level,
                                       method="exact") == "polynomial"


# -- bad queries ----------------------------------------------------------------------------------
def test_bad_queries_are_refused_with_a_clear_error() -> None:
    """Point probabilities, several targets, unknown variables, observing a set variable."""
    fam, scm = LinearSCMFamily(), primer()
    with pytest.raises(UnsupportedQuery, match="kind"):
        fam.answer(scm, Query(level=Level.ASSOCIATIONAL, target=(("Y", 1.0),)))
    with pytest.raises(UnsupportedQuery, match="target"):
        fam.answer(scm, Query(level=Level.ASSOCIATIONAL, target=(("Y", 1.0), ("H", 0.0)),
                              kind="expectation"))
    with pytest.raises(InputError, match="'Q'"):
        fam.answer(scm, Query(level=Level.ASSOCIATIONAL, target=(("Q", 1.0),), kind="expectation"))
    with pytest.raises(UnsupportedQuery, match="intervened"):
        fam.answer(scm, Query(level=Level.INTERVENTIONAL, target=(("Y", 0.0),),
                              evidence=(("X", 1.0),), intervention=(("X", 1.0),),
                              kind="expectation"))
    with pytest.raises(UnsupportedQuery, match="sampling"):
        fam.answer(scm, cf("Y", (("H", 2.0),)), method="sampling")


def test_realizable_sizes() -> None:
    """A grid rounds to k x k; the in-degree is capped by the earlier variables (n - 1)."""
    fam = LinearSCMFamily()
    assert fam.realizable(Size(graph=10, mechanism=2), topology="grid") == Size(9, 2)
    assert fam.realizable(Size(graph=6, mechanism=40), topology="random") == Size(6, 5)
    built = fam.build(Size(graph=6, mechanism=5), topology="random", seed=0)
    assert fam.profile(built)["n_edges"] == 15        # the complete DAG on 6 variables
