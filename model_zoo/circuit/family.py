"""The ``circuit`` family: probabilistic circuits over random vtrees, or compiled networks.

Sizes: the graph axis is the number of variables; the mechanism axis is K, the *components per
scope* (leaves per variable and sum units per vtree node). With ``source="bayesnet"`` the family
builds a ``bayesnet`` instance of the same size and topology and compiles it (variable
elimination traced into an arithmetic circuit), so a study measures compiled circuits; then the
mechanism axis is the bayesnet family's own knob.

Queries (associational only — a circuit has no causal semantics; a circuit compiled from a
causal network answers ``do(...)`` only when compiled from the mutilated network, see
:func:`model_zoo.circuit.compile.compile_network`):

================  ==========================================  ======  =========================
kind              value                                       passes  exact when
================  ==========================================  ======  =========================
``likelihood``    ``ln P(x)`` of the complete assignment in    1       always
                  ``target`` (natural log: finite at 2,000+
                  variables where the probability underflows)
``probability``   ``P(target)`` (no evidence) or              1 or 2  smooth and decomposable
                  ``P(target | evidence)`` = ratio of passes
``mpe``           ``max_x P(x, evidence)`` by max-product      1       also deterministic
================  ==========================================  ======  =========================

Work (``work_unit``): edges evaluated, i.e. ``passes x n_edges`` per query; a batch of B
queries costs B times that. ``predicted_work`` is the same formula from the structure alone.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Sequence

import numpy as np

from model_zoo.base import Answer, FamilyBase, Level, Query, Size, make_rng, register
from model_zoo.circuit import checks
from model_zoo.circuit.compile import CompiledCircuit, compile_network
from model_zoo.circuit.core import Circuit, _run, forward
from model_zoo.circuit.io import dump_circuit, load_circuit
from model_zoo.circuit.vtree import VTREE_TOPOLOGIES, canonical_topology, vtree_circuit
from model_zoo.discrete import DiscreteNetwork
from model_zoo.errors import InputError, ModelError, UnsupportedQuery

__all__ = ["CircuitFamily", "CircuitInstance", "ZeroProbabilityEvidence"]

#: Elements (nodes x batch columns) one evaluation chunk may hold: about 64 MB of float64.
_BATCH_ELEMENTS = 1 << 23
#: Work budget of the determinism test in profile() (edges x assignments).
_DETERMINISM_BUDGET = 1e8


class ZeroProbabilityEvidence(ModelError, InputError):
    """A conditional query whose evidence has probability zero (reported, never NaN)."""


@dataclass(frozen=True, eq=False)
class CircuitInstance:
    """One built (or loaded, or compiled) circuit.

    ``source`` is ``"vtree"``, ``"bayesnet"`` or ``"file"``; ``compiled`` holds the compilation
    record (order, width, compile seconds) and ``network_instance`` the bayesnet family's
    instance it came from (the reference asks that family).
    """

    size: Size
    topology: str
    seed: int
    name: str
    circuit: Circuit
    source: str = "vtree"
    compiled: CompiledCircuit | None = None
    network_instance: Any = None
    _cache: dict = field(default_factory=dict, repr=False)

    @property
    def network(self) -> DiscreteNetwork | None:
        return self.compiled.network if self.compiled is not None else None


def _network_of(bn_instance: Any) -> DiscreteNetwork:
    """The DiscreteNetwork inside a bayesnet-family instance (attribute ``network``)."""
    if isinstance(bn_instance, DiscreteNetwork):
        return bn_instance
    for attr in ("network", "net", "model"):
        net = getattr(bn_instance, attr, None)
        if isinstance(net, DiscreteNetwork):
            return net
    raise ModelError("bayesnet instance carries no DiscreteNetwork (expected attribute "
                     "'network'); cannot compile it")


@register
class CircuitFamily(FamilyBase):
    """Smooth, decomposable sum-product circuits (or compiled networks), exact by one pass.

    Parameters (keyword, stored only)
    ---------------------------------
    source : {"vtree", "bayesnet"}
        Random-vtree circuits (default) or compiled ``bayesnet`` instances.
    n_states : int
        States per variable of vtree circuits (default 2: Bernoulli leaves).
    leaf_concentration, weight_concentration : float
        Dirichlet concentrations of leaves and sum weights (default 1).
    determinism_samples : int
        Complete assignments the sampling determinism test draws beyond 16 binary variables.

    Notes
    -----
    Topologies: ``balanced`` and ``right_linear`` vtrees; the shared names ``tree`` and
    ``chain`` are accepted as aliases of them. With ``source="bayesnet"`` the topology is the
    bayesnet family's (chain, tree, grid, random, layered).

    References
    ----------
    Darwiche, A. (2003). A differential approach to inference in Bayesian networks. JACM 50(3).
    Poon, H. & Domingos, P. (2011). Sum-product networks: a new deep architecture. UAI.
    Choi, Y., Vergari, A. & Van den Broeck, G. (2020). Probabilistic circuits: a unifying
    framework for tractable probabilistic models.
    """

    name = "circuit"
    levels = frozenset({Level.ASSOCIATIONAL})
    methods = frozenset({"exact"})
    mechanism_knob = "components per scope"
    topologies = VTREE_TOPOLOGIES
    work_unit = "edges evaluated (passes x circuit edges)"

    # -- construction -------------------------------------------------------------------------
    def _source(self) -> str:
        source = self.params.get("source", "vtree")
        if source not in ("vtree", "bayesnet"):
            raise InputError.at("family 'circuit'", "source", "'vtree' or 'bayesnet'", source)
        return source

    def _bayesnet(self):
        import model_zoo
        return model_zoo.get("bayesnet")()

    def realizable(self, size: Size, *, topology: str) -> Size:
        if self._source() == "bayesnet":
            return self._bayesnet().realizable(size, topology=topology)
        canonical_topology(topology)
        return size

    def build(self, size: Size, *, topology: str, seed: int) -> CircuitInstance:
        """Build a vtree circuit (O(n K^3)) or build and compile a bayesnet instance
        (O(n d^(w+1)))."""
        if not isinstance(size, Size):
            raise InputError.at("family 'circuit'", "size", "a Size", size)
        if self._source() == "bayesnet":
            bn = self._bayesnet()
            bn_instance = bn.build(size, topology=topology, seed=seed)
            compiled = compile_network(_network_of(bn_instance))
            real = getattr(bn_instance, "size", size)
            return CircuitInstance(size=real, topology=topology, seed=int(seed),
                                   name=f"compiled {getattr(bn_instance, 'name', 'network')}",
                                   circuit=compiled.circuit, source="bayesnet",
                                   compiled=compiled, network_instance=bn_instance)
        shape = canonical_topology(topology)
        circuit = vtree_circuit(
            size.graph, size.mechanism, topology=shape, seed=int(seed),
            n_states=int(self.params.get("n_states", 2)),
            leaf_concentration=float(self.params.get("leaf_concentration", 1.0)),
            weight_concentration=float(self.params.get("weight_concentration", 1.0)))
        return CircuitInstance(size=size, topology=topology, seed=int(seed), name=circuit.name,
                               circuit=circuit, source="vtree")

    def load(self, source: str | Path) -> CircuitInstance:
        """Read a circuit JSON file (docs/formats/circuit.md); bad file -> InputError."""
        circuit = load_circuit(source)
        return CircuitInstance(size=Size(graph=max(1, circuit.n_variables), mechanism=1),
                               topology="file", seed=0, name=str(source), circuit=circuit,
                               source="file")

    def dump(self, instance: CircuitInstance, path: str | Path) -> None:
        """Write the instance's circuit as JSON."""
        dump_circuit(instance.circuit, path)

    # -- structure ----------------------------------------------------------------------------
    def _determinism(self, instance: CircuitInstance) -> checks.DeterminismResult:
        c = instance.circuit
        per = float(c.n_edges + c.n_nodes)
        n_samples = int(self.params.get("determinism_samples", 512))
        n_samples = int(min(n_samples, max(8, _DETERMINISM_BUDGET // max(per, 1))))
        with np.errstate(over="ignore"):             # past ~1000 binary variables: inf
            total = float(np.prod(c.cards, dtype=np.float64))
        limit = checks.EXHAUSTIVE_LIMIT if total * per <= 5 * _DETERMINISM_BUDGET else 0
        return checks.determinism(c, n_samples=n_samples, seed=instance.seed, limit=limit)

    def properties(self, instance: CircuitInstance) -> tuple[bool, bool, bool]:
        """(smooth, decomposable, deterministic) — the last by the stated test."""
        c = instance.circuit
        return (checks.is_smooth(c), checks.is_decomposable(c),
                self._determinism(instance).is_deterministic)

    def tractable_queries(self, instance: CircuitInstance) -> list[str]:
        """Query kinds one pass answers exactly here (Choi, Vergari & Van den Broeck 2020)."""
        return checks.tractable_kinds(*self.properties(instance))

    def profile(self, instance: CircuitInstance) -> dict[str, float]:
        """Structural profile: sizes, depth and the three properties (as 0/1).

        ``determinism_exact`` is 1 when the determinism verdict came from enumerating every
        complete assignment and 0 when from the one-sided sampling test.
        """
        c = instance.circuit
        smooth, decomposable, deterministic = self.properties(instance)
        det = self._determinism(instance)
        types = c.node_type
        out = {
            "n_variables": float(c.n_variables),
            "n_nodes": float(c.n_nodes),
            "n_edges": float(c.n_edges),
            "n_parameters": float(c.n_parameters()),
            "n_sum_nodes": float(np.sum(types == 2)),
            "n_product_nodes": float(np.sum(types == 1)),
            "n_leaves": float(np.sum(types == 0)),
            "depth": float(c.depth),
            "max_states": float(max(c.cards)),
            "is_smooth": float(smooth),
            "is_decomposable": float(decomposable),
            "is_deterministic": float(deterministic),
            "determinism_exact": float(det.exact),
            "n_tractable_kinds": float(len(checks.tractable_kinds(smooth, decomposable,
                                                                  deterministic))),
        }
        if instance.source == "vtree":
            out["components_per_scope"] = float(c.meta.get("k", instance.size.mechanism))
        if instance.compiled is not None:
            net = instance.compiled.network
            out["elimination_width"] = float(instance.compiled.width)
            out["network_edges"] = float(net.n_edges)
            out["network_parameters"] = float(net.n_free_parameters())
        return out

    # -- queries ------------------------------------------------------------------------------
    def _sample_assignments(self, instance: CircuitInstance, rng: np.random.Generator,
                            count: int) -> np.ndarray:
        """``(count, n_variables)`` complete assignments of nonzero probability."""
        c = instance.circuit
        net = instance.network
        if net is not None:
            # forward sampling from the source network: zero-probability states never appear
            index = {v: i for i, v in enumerate(c.variables)}
            out = np.zeros((count, c.n_variables), dtype=np.int64)
            for v in net.variables:
                table = np.asarray(net.cpts[v], dtype=np.float64)
                ps = net.parents[v]
                cols = tuple(out[:, index[p]] for p in ps)
                probs = (table[(slice(None),) + cols] if ps else
                         np.broadcast_to(table[:, None], (table.shape[0], count))).T
                cum = np.cumsum(probs, axis=1)
                u = rng.random(count)[:, None] * cum[:, -1:]
                out[:, index[v]] = np.minimum((u > cum).sum(axis=1), table.shape[0] - 1)
            return out
        cards = np.asarray(c.cards)
        out = np.zeros((count, c.n_variables), dtype=np.int64)
        todo = np.arange(count)
        sampler = checks.is_smooth(c) and checks.is_decomposable(c)
        for attempt in range(50):
            if sampler and attempt >= 2:
                out[todo] = _ancestral_samples(c, rng, todo.size)
            else:
                out[todo] = (rng.random((todo.size, c.n_variables)) * cards).astype(np.int64)
            lv = self._evaluate(c, [(dict(enumerate(row)), "sum") for row in out[todo]])
            todo = todo[~np.isfinite(lv)]
            if todo.size == 0:
                return out
        raise ModelError(f"{instance.name}: could not find assignments of nonzero probability "
                         "for random queries")

    def queries(self, instance: CircuitInstance, level: Level, *, n: int, seed: int
                ) -> list[Query]:
        """``n`` seeded queries cycling through likelihood, marginal, conditional and MPE; all
        evidence comes from assignments of nonzero probability."""
        level = self.check_level(level)
        c = instance.circuit
        rng = make_rng(seed, "circuit-queries")
        xs = self._sample_assignments(instance, rng, max(int(n), 0))
        names = c.variables
        kinds = ("likelihood", "probability", "conditional", "mpe")
        offset = int(rng.integers(len(kinds)))
        out: list[Query] = []
        for i in range(int(n)):
            kind = kinds[(i + offset) % len(kinds)]
            x = xs[i]
            nv = c.n_variables
            if kind == "likelihood":
                out.append(Query(level=level, kind="likelihood",
                                 target=tuple((names[v], int(x[v])) for v in range(nv))))
                continue
            pick = rng.permutation(nv)
            if kind == "probability" or (kind == "conditional" and nv < 2):
                t = pick[:int(rng.integers(1, min(2, nv) + 1))]
                out.append(Query(level=level, target=tuple((names[v], int(x[v])) for v in t)))
            elif kind == "conditional":
                n_e = int(rng.integers(1, min(3, nv - 1) + 1))
                t, e = pick[:1], pick[1:1 + n_e]
                out.append(Query(level=level, target=((names[t[0]], int(x[t[0]])),),
                                 evidence=tuple((names[v], int(x[v])) for v in e)))
            else:
                n_e = int(rng.integers(0, min(2, nv - 1) + 1))
                out.append(Query(level=level, kind="mpe", target=(),
                                 evidence=tuple((names[v], int(x[v])) for v in pick[:n_e])))
        return out

    def _parse(self, c: Circuit, query: Query) -> tuple[dict[int, int], dict[int, int], bool]:
        """(target, evidence, conflict) as {variable index: state}; validates names/states."""
        self.check_level(query.level)

        def conv(pairs, part: str) -> dict[int, int]:
            out: dict[int, int] = {}
            for name, value in pairs:
                v = c.var_index(name, where=f"query {part}")
                card = c.cards[v]
                if (isinstance(value, bool) or not isinstance(value, (int, np.integer))
                        or not 0 <= int(value) < card):
                    raise InputError.at(f"query {part}", f"value of {name!r}",
                                        f"a state index in 0..{card - 1}", value)
                if v in out and out[v] != int(value):
                    raise InputError.at(f"query {part}", name, "one value per variable",
                                        value)
                out[v] = int(value)
            return out

        target = conv(query.target, "target")
        evidence = conv(query.evidence, "evidence")
        conflict = any(evidence.get(v, x) != x for v, x in target.items())
        return target, evidence, conflict

    @staticmethod
    def _passes(query: Query) -> int:
        if query.kind == "probability" and query.evidence:
            return 2
        return 1

    def _evaluate(self, c: Circuit, jobs: Sequence[tuple[dict[int, int], str]]) -> np.ndarray:
        """Root log-values (minus log Z) of each (assignment, mode) job, batched per mode."""
        out = np.empty(len(jobs))
        width = max(1, _BATCH_ELEMENTS // max(c.n_nodes + c.max_op_edges, 1))
        for mode in ("sum", "max"):
            idx = [j for j, (_, m) in enumerate(jobs) if m == mode]
            for lo in range(0, len(idx), width):
                part = idx[lo:lo + width]
                states = np.full((c.n_variables, len(part)), -1, dtype=np.int64)
                for col, j in enumerate(part):
                    a = jobs[j][0]
                    if a:
                        states[list(a.keys()), col] = list(a.values())
                # root-only pass: the region engine where the circuit allows it
                out[part] = forward(c, states, mode=mode) - c.log_z
        return out

    def answer(self, instance: CircuitInstance, query: Query, *, method: str = "exact") -> Answer:
        return self.answer_batch(instance, [query], method=method)[0]

    def answer_batch(self, instance: CircuitInstance, queries: Sequence[Query], *,
                     method: str = "exact") -> list[Answer]:
        """Answer all queries with one batched pass per mode (sum, max). O(n_edges x passes)."""
        self.check_method(method)
        c = instance.circuit
        smooth, decomposable, _ = (checks.is_smooth(c), checks.is_decomposable(c), None)
        jobs: list[tuple[dict[int, int], str]] = []
        plans = []
        for q in queries:
            if q.kind not in ("likelihood", "probability", "mpe"):
                raise UnsupportedQuery(f"family 'circuit' answers kinds likelihood, probability "
                                       f"and mpe, not {q.kind!r}")
            target, evidence, conflict = self._parse(c, q)
            joint = {**evidence, **target}
            first = len(jobs)
            if q.kind == "mpe":
                jobs.append((joint, "max"))
            else:
                jobs.append((joint, "sum"))
                if q.kind == "probability" and evidence:
                    jobs.append((evidence, "sum"))
            plans.append((q, first, conflict, len(joint) == c.n_variables))
        values = self._evaluate(c, jobs)
        deterministic = None
        answers = []
        for q, first, conflict, complete in plans:
            work = float(self._passes(q) * c.n_edges)
            note = ""
            exact = True
            if q.kind == "likelihood":
                value = float(values[first]) if not conflict else -np.inf
                note = "natural log of the probability"
                exact = complete or (smooth and decomposable)
            elif q.kind == "mpe":
                if deterministic is None:
                    deterministic = self._mpe_exact(instance)
                value = 0.0 if conflict else float(np.exp(values[first]))
                exact = bool(smooth and decomposable and deterministic)
                if not exact:
                    note = ("max-product on a circuit that is not deterministic: a lower bound on "
                            "the MPE probability, not its value")
            else:
                exact = bool(smooth and decomposable)
                if q.evidence:
                    den = values[first + 1]
                    if not np.isfinite(den):
                        raise ZeroProbabilityEvidence(
                            f"{instance.name}: {q.describe()}: the evidence has probability 0, "
                            "so the conditional is undefined")
                    value = 0.0 if conflict else float(np.exp(values[first] - den))
                else:
                    value = 0.0 if conflict else float(np.exp(values[first]))
                if not exact:
                    note = "circuit is not smooth and decomposable: one pass is not a marginal"
            answers.append(Answer(value=value, work=work, is_exact=exact, note=note))
        return answers

    def _mpe_exact(self, instance: CircuitInstance) -> bool:
        if instance.source == "bayesnet":
            return True  # deterministic by construction (compile.py module notes)
        return self._determinism(instance).is_deterministic

    # -- reference ----------------------------------------------------------------------------
    def reference(self, instance: CircuitInstance, query: Query) -> float | None:
        """Brute-force enumeration of the joint (<= 16 binary variables), or, for compiled
        circuits, the source network: the bayesnet family's reference (pgmpy) for marginals,
        the product of CPT entries for likelihoods, enumeration of the network for MPE."""
        c = instance.circuit
        target, evidence, conflict = self._parse(c, query)
        if instance.compiled is not None:
            return self._network_reference(instance, query, target, evidence, conflict)
        joint = checks.joint_table(c)
        if joint is None:
            return None
        if query.kind == "mpe":
            smooth, decomposable, deterministic = self.properties(instance)
            if not (smooth and decomposable and deterministic):
                # what max-product reports, recomputed by the independent plain-space recursion
                return 0.0 if conflict else checks.brute_max_product(c, evidence)
            return _joint_max(joint, evidence) if not conflict else 0.0
        return _joint_answer(joint, query, target, evidence, conflict)

    def _network_reference(self, instance, query, target, evidence, conflict) -> float | None:
        net = instance.compiled.network
        names = instance.circuit.variables
        if query.kind == "likelihood" and len({**evidence, **target}) == len(names):
            if conflict:
                return -np.inf
            a = {names[v]: x for v, x in {**evidence, **target}.items()}
            with np.errstate(divide="ignore"):
                return float(sum(np.log(net.cpts[v][(a[v],) + tuple(a[p] for p in net.parents[v])])
                                 for v in net.variables))
        if query.kind == "probability" and instance.network_instance is not None:
            try:
                bn = self._bayesnet()
                r = bn.reference(instance.network_instance, query)
            except (ImportError, InputError, ModelError):
                r = None
            if r is not None:
                return float(r)
        joint = network_joint(net)
        if joint is None:
            return None
        if query.kind == "mpe":
            return 0.0 if conflict else _joint_max(joint, evidence)
        return _joint_answer(joint, query, target, evidence, conflict)

    # -- cost formulas ------------------------------------------------------------------------
    def predicted_work(self, instance: CircuitInstance, query: Query, *,
                       method: str = "exact") -> float:
        """``passes x n_edges`` (1 pass; 2 for a conditional) from the structure alone."""
        return float(self._passes(query) * instance.circuit.n_edges)

    def predicted_bytes(self, instance: CircuitInstance, query: Query, *,
                        method: str = "exact") -> float | None:
        """Node values of every pass plus the largest single operation's intermediate."""
        c = instance.circuit
        return float(8 * self._passes(query) * (c.n_nodes + c.max_op_edges))

    def expected_growth(self, *, axis: str, topology: str, level: Level | str,
                        method: str) -> str | None:
        """Vtree circuits: polynomial on both axes (edges are (n-1)(K^3+2K^2)+K). Compiled
        networks: what variable elimination on the source family predicts (the circuit's size
        is the elimination's cost)."""
        if Level(level) is not Level.ASSOCIATIONAL or method != "exact":
            return None
        if self._source() == "bayesnet":
            try:
                return self._bayesnet().expected_growth(axis=axis, topology=topology,
                                                        level=level, method="exact")
            except (ImportError, InputError, AttributeError):
                return None
        return "polynomial" if axis in ("graph", "mechanism") else None


def _ancestral_samples(c: Circuit, rng: np.random.Generator, count: int) -> np.ndarray:
    """Top-down sampling of a smooth, decomposable circuit: each sum picks a child by weight x
    the child's mass, each product keeps all children, each leaf draws a state. Only nonzero
    choices are made, so every sample has nonzero probability. O(n_nodes x count)."""
    from model_zoo.circuit.core import LEAF as _LEAF, SUM as _SUM
    values = _run(c, np.full((c.n_variables, 1), -1, dtype=np.int64), "sum")[:, 0]
    row_of = c._plan.row_of  # type: ignore[attr-defined]
    active = np.zeros((c.n_nodes, count), dtype=bool)
    active[c.root] = True
    out = np.zeros((count, c.n_variables), dtype=np.int64)
    cards = c.cards
    for node in range(c.root, -1, -1):
        who = np.flatnonzero(active[node])
        if who.size == 0:
            continue
        kind = c.node_type[node]
        ch = c.children(node)
        if kind == _LEAF:
            v = int(c.leaf_var[node])
            p = c.leaf_probs[node][:cards[v]]
            out[who, v] = rng.choice(cards[v], size=who.size, p=p / p.sum())
        elif kind == _SUM:
            with np.errstate(divide="ignore"):
                score = np.log(c.weights(node)) + values[row_of[ch]]
            prob = np.exp(score - score.max())
            pick = rng.choice(ch.size, size=who.size, p=prob / prob.sum())
            active[ch[pick], who] = True
        else:
            active[np.ix_(ch, who)] = True
    return out


def _joint_answer(joint: np.ndarray, query: Query, target: dict[int, int],
                  evidence: dict[int, int], conflict: bool) -> float:
    def mass(a: dict[int, int]) -> float:
        index = tuple(a.get(v, slice(None)) for v in range(joint.ndim))
        return float(np.sum(joint[index]))

    if query.kind == "likelihood":
        with np.errstate(divide="ignore"):
            return -np.inf if conflict else float(np.log(mass({**evidence, **target})))
    if conflict:
        return 0.0
    num = mass({**evidence, **target})
    return num / mass(evidence) if evidence else num


def _joint_max(joint: np.ndarray, evidence: dict[int, int]) -> float:
    index = tuple(evidence.get(v, slice(None)) for v in range(joint.ndim))
    return float(np.max(joint[index]))


def network_joint(net: DiscreteNetwork, *, limit: int = checks.EXHAUSTIVE_LIMIT
                  ) -> np.ndarray | None:
    """The network's joint as an array over ``net.variables`` (product of CPTs), or None
    beyond ``limit`` entries. O(n x prod(cards))."""
    cards = [net.card(v) for v in net.variables]
    if math.prod(cards) > limit:                      # exact: no float overflow
        return None
    axis = {v: i for i, v in enumerate(net.variables)}
    joint = np.ones(cards)
    for v in net.variables:
        table = np.asarray(net.cpts[v], dtype=np.float64)
        scope = (v,) + tuple(net.parents[v])
        order = np.argsort([axis[s] for s in scope])
        t = np.transpose(table, order)
        shape = [1] * len(cards)
        for s in scope:
            shape[axis[s]] = cards[axis[s]]
        joint = joint * t.reshape(shape)
    return joint
