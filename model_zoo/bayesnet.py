"""The ``bayesnet`` family: discrete Bayesian networks, exact by variable elimination and
approximate by likelihood weighting.

Instances
---------
:class:`BayesNetInstance` wraps a :class:`model_zoo.discrete.DiscreteNetwork`. Scaled instances
take their graph from :mod:`model_zoo.topologies` (graph axis = number of variables; a grid is
realised as k x k) and give every variable ``d`` states (mechanism axis = states per variable).
Each CPT column is drawn from a Dirichlet(``dirichlet_alpha``) distribution and mixed with the
uniform one (weight ``floor``, default 0.05), so every entry is at least ``floor / d`` and no
evidence ever has probability zero. Files (BIF, XMLBIF, UAI, bundled pgmpy networks) are read by
:meth:`BayesNetFamily.load`; see ``docs/formats/bayesnet.md``.

Queries are P(Y=y | E=e) (associational) and P(Y=y | do(X=x), E=e) (interventional); values are
state indices (state names are accepted too).

Exact engine (``method="exact"``)
---------------------------------
1. Graph surgery for ``do(X=x)``: X loses its parents and its CPT; x then acts as evidence.
2. Barren-node pruning: keep only ancestors of the target, evidence and intervened variables.
3. Evidence is applied by slicing every CPT that mentions an observed variable.
4. A greedy min-fill order (:func:`model_zoo.elimination.min_fill_order`) on the interaction graph
   of the sliced factors (the moral graph of the relevant subnetwork without the observed
   variables), then one ``np.einsum`` per eliminated variable over the factors that mention it,
   and a final product over the target.
5. P(y | e) = joint(y, e) / sum over y of joint(y, e); P(e) = 0 raises :class:`ModelError`.

Steps 1-4 depend only on the query's *shape* (target variable, evidence variables, intervened
variables), so they are compiled once into a plan cached on the instance; ``answer_batch`` groups
queries by shape and runs each plan once over the whole batch, with a leading batch axis on every
factor that depends on evidence values.

Work unit (exact): *table entries multiplied* — the sum over elimination steps of the size of the
product table before summing out, plus the final product over the target (Dechter 1999). A query
answered inside a batch is charged the same count as alone (steps that do not depend on evidence
are shared across the batch, so the batched path does less real work than it reports).

Sampling engine (``method="sampling"``)
---------------------------------------
Likelihood weighting (Fung & Chang 1989; Shachter & Peot 1989), vectorised over ``n_samples``
samples (default 2000) in topological order over the relevant subnetwork of the mutilated graph:
observed variables are clamped and multiply the weight by their CPT entry, intervened variables
are clamped without weight, the rest are drawn from their CPT column. The estimate is the
self-normalised ratio p = sum w f / sum w with f = 1[Y = y]; its standard error is the delta-method
value sqrt(sum w^2 (f - p)^2) / sum w (Owen 2013, *Monte Carlo theory, methods and examples*,
§9.2), floored at the binomial error sqrt(q (1 - q) / n_eff) with q = (n_eff p + 1/2) / (n_eff + 1)
and Kish's effective sample size n_eff = (sum w)^2 / sum w^2, so an estimate of exactly 0 or 1 from
a finite sample does not claim zero error. Work unit: *CPT entries read by the sampler* —
per sample, card(v) for each sampled variable (its column is scanned) and 1 for each observed one.

Reference
---------
pgmpy's ``VariableElimination`` with its default elimination order; interventional queries on
``model.do([X])`` with X observed (never ``CausalInference.query``, which drops evidence in its
adjustment sum). None when the predicted work exceeds ``reference_max_work`` (default 1e7).

References
----------
Dechter, R. (1999). Bucket elimination: a unifying framework for reasoning. AIJ 113:41-85.
Koller, D. & Friedman, N. (2009). *Probabilistic Graphical Models*, §9.3-9.4 (variable elimination),
§12.2 (likelihood weighting). Pearl, J. (2009). *Causality*, §3.2 (interventions as graph surgery).
Fung, R. & Chang, K.-C. (1989). Weighing and integrating evidence for stochastic simulation in
Bayesian networks. UAI 5. Shachter, R. & Peot, M. (1989). Simulation approaches to general
probabilistic inference on belief networks. UAI 5.
"""

from __future__ import annotations

import string
import zlib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping, Sequence

import numpy as np

from model_zoo.base import (Answer, FamilyBase, Level, Query, Size, make_rng, register)
from model_zoo.discrete import DiscreteNetwork
from model_zoo.elimination import elimination_cost, min_fill_order, moral_graph
from model_zoo.errors import InputError, ModelError, UnsupportedQuery
from model_zoo import topologies

__all__ = ["BayesNetFamily", "BayesNetInstance", "random_network", "bundled_networks"]

#: Entries (float64) a batched intermediate table may hold before the batch is split in chunks.
_CHUNK_ENTRIES = 1 << 22
#: Einsum letters for variables; the batch axis uses a letter outside this set.
_LETTERS = string.ascii_letters.replace("Z", "")
_BATCH = "Z"


def bundled_networks() -> list[str]:
    """Names of the networks bundled with pgmpy that :meth:`BayesNetFamily.load` reads offline."""
    from model_zoo.networks.readers import bundled_networks as names

    return names()


@dataclass(frozen=True, eq=False)
class BayesNetInstance:
    """One discrete Bayesian network, with the caches the engines fill (plans, pgmpy model)."""

    size: Size
    topology: str
    seed: int
    name: str
    network: DiscreteNetwork
    _cache: dict = field(default_factory=dict, repr=False, compare=False)


def random_network(graph, n_states: int, *, seed: int, alpha: float = 1.0, floor: float = 0.05,
                   name: str = "random") -> DiscreteNetwork:
    """A network on ``graph`` (a DiGraph with nodes in topological order) with ``n_states``
    states per variable and CPT columns ~ (1 - floor) Dirichlet(alpha) + floor * uniform.
    O(parameters)."""
    rng = make_rng(seed, "cpt")
    parents = topologies.parent_map(graph)
    variables = tuple(graph.nodes)
    d = int(n_states)
    states = {v: tuple(f"s{i}" for i in range(d)) for v in variables}
    cpts = {}
    for v in variables:
        n_cols = d ** len(parents[v])
        cols = rng.dirichlet(np.full(d, float(alpha)), size=n_cols).T  # (d, n_cols)
        table = (1.0 - floor) * cols + floor / d
        table /= table.sum(axis=0, keepdims=True)
        cpts[v] = table.reshape((d,) + (d,) * len(parents[v]))
    return DiscreteNetwork(variables=variables, states=states, parents=parents, cpts=cpts,
                           name=name)


# -- shared per-network index -------------------------------------------------------------------
class _Index:
    """Lookups derived once per network: cards, state positions, topological rank."""

    def __init__(self, net: DiscreteNetwork) -> None:
        self.net = net
        self.rank = {v: i for i, v in enumerate(net.variables)}
        self.card = {v: net.card(v) for v in net.variables}
        self.state_pos = {v: {s: i for i, s in enumerate(net.states[v])} for v in net.variables}
        self.parents = net.parents
        self.cpts = {v: np.ascontiguousarray(net.cpts[v], dtype=float) for v in net.variables}
        # Flattened (card, n_columns) tables and column strides for the sampler.
        self.flat = {v: self.cpts[v].reshape(self.card[v], -1) for v in net.variables}
        self.strides = {}
        for v in net.variables:
            cards = [self.card[p] for p in net.parents[v]]
            s = np.ones(len(cards), dtype=np.int64)
            for i in range(len(cards) - 2, -1, -1):
                s[i] = s[i + 1] * cards[i + 1]
            self.strides[v] = s

    def state(self, var: str, value: Any, where: str) -> int:
        if var not in self.card:
            raise InputError(f"query: {where}: unknown variable {var!r} in network "
                             f"{self.net.name!r}")
        if isinstance(value, (bool, np.bool_)):
            value = int(value)
        if isinstance(value, (int, np.integer)):
            if 0 <= int(value) < self.card[var]:
                return int(value)
        elif isinstance(value, str):
            pos = self.state_pos[var].get(value)
            if pos is not None:
                return pos
            if value.lstrip("-").isdigit() and 0 <= int(value) < self.card[var]:
                return int(value)
        raise InputError(f"query: {where}: {var!r} has states "
                         f"{', '.join(self.net.states[var])} (or indices 0..{self.card[var] - 1}), "
                         f"got {value!r}")

    def relevant(self, roots: Sequence[str], cut: frozenset[str]) -> list[str]:
        """Ancestral closure of ``roots`` in the graph where ``cut`` lost their parents, in
        topological order (barren-node pruning)."""
        seen = set()
        stack = list(roots)
        while stack:
            v = stack.pop()
            if v in seen:
                continue
            seen.add(v)
            if v not in cut:
                stack.extend(self.parents[v])
        return sorted(seen, key=self.rank.__getitem__)


def _index(inst: BayesNetInstance) -> _Index:
    idx = inst._cache.get("index")
    if idx is None:
        idx = inst._cache["index"] = _Index(inst.network)
    return idx


# -- query normalisation ------------------------------------------------------------------------
@dataclass(frozen=True)
class _Parsed:
    """A query reduced to its shape and values. ``trivial`` holds the answer when the target is
    itself observed or intervened (an indicator)."""

    target: str
    target_value: int
    evidence_vars: tuple[str, ...]
    do_vars: tuple[str, ...]
    values: tuple[int, ...]           # evidence values then do values, matching the shape
    trivial: float | None = None

    @property
    def shape(self) -> tuple[str, tuple[str, ...], tuple[str, ...]]:
        return (self.target, self.evidence_vars, self.do_vars)


def _parse(idx: _Index, q: Query) -> _Parsed:
    if len(q.target) != 1:
        raise UnsupportedQuery(f"bayesnet: a query asks for one target variable, got "
                               f"{len(q.target)} ({q.describe()})")
    if q.kind != "probability":
        raise UnsupportedQuery(f"bayesnet: query kind {q.kind!r} is not supported "
                               "(only 'probability')")
    (t, tv), = q.target
    t_val = idx.state(t, tv, "target")
    do = {}
    for v, x in q.intervention:
        do[v] = idx.state(v, x, "do")
    ev = {}
    for v, x in q.evidence:
        val = idx.state(v, x, "evidence")
        if v in ev and ev[v] != val:
            raise ModelError(f"bayesnet: evidence has probability zero: {v!r} observed twice "
                             f"with different values in {q.describe()}")
        if v in do:
            if do[v] != val:
                raise ModelError(f"bayesnet: evidence has probability zero: {v!r} is set by "
                                 f"do() to {do[v]} and observed as {val} in {q.describe()}")
            continue  # observing what was set by intervention adds nothing
        ev[v] = val
    trivial = None
    if t in do:
        trivial = float(do[t] == t_val)
    elif t in ev:
        trivial = float(ev[t] == t_val)
    ev_vars = tuple(sorted(ev))
    do_vars = tuple(sorted(do))
    values = tuple(ev[v] for v in ev_vars) + tuple(do[v] for v in do_vars)
    return _Parsed(t, t_val, ev_vars, do_vars, values, trivial)


# -- exact engine: plans ------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class _Factor:
    table: np.ndarray          # observed axes first, then free axes
    obs_cols: tuple[int, ...]  # which columns of the values array index the observed axes
    scope: tuple[str, ...]     # free variables
    batched: bool


@dataclass(frozen=True, eq=False)
class _Plan:
    target: str
    factors: tuple[_Factor, ...]
    steps: tuple[tuple[tuple[int, ...], str, int], ...]   # (inputs, subscripts, output slot)
    final_inputs: tuple[int, ...]
    final_subscripts: str
    final_batched: bool
    n_slots: int
    graph: dict                # interaction graph {node: neighbours} the order was computed on
    order: tuple[str, ...]
    width: int
    work: int                  # entries multiplied, counted from the actual einsum operands
    largest: int
    relevant: tuple[str, ...]


def _subscripts(in_scopes, in_batched, out_scope, out_batched) -> str:
    letters: dict[str, str] = {}

    def word(scope, batched):
        out = _BATCH if batched else ""
        for v in scope:
            if v not in letters:
                if len(letters) >= len(_LETTERS):
                    raise ModelError("bayesnet: an elimination step spans more than "
                                     f"{len(_LETTERS)} variables; the table is infeasible")
                letters[v] = _LETTERS[len(letters)]
            out += letters[v]
        return out

    ins = ",".join(word(s, b) for s, b in zip(in_scopes, in_batched))
    return f"{ins}->{word(out_scope, out_batched)}"



def _cheaper_order(graph: dict[str, set[str]], target: str,
                   card: Mapping[str, int]) -> tuple[list[str], int]:
    """The cheaper of two elimination orders for everything but ``target``: greedy min-fill, and
    the network's own topological order (a sweeping frontier, which on grid-like networks stays
    near the optimal width where min-fill's ties go astray). Both are priced by
    :func:`elimination_cost` before anything is multiplied.

    Cost: O(n * w**2) for the two orders and their prices, small beside the elimination itself.
    """
    eliminate = [v for v in graph if v != target]
    fill_order, fill_width = min_fill_order(graph, eliminate=eliminate)
    if len(eliminate) <= 2:
        return fill_order, fill_width
    # graph is built in topological order, so `eliminate` is the sweeping order
    if elimination_cost(graph, eliminate, card)[0] >= elimination_cost(graph, fill_order, card)[0]:
        return fill_order, fill_width
    adj = {u: set(n) for u, n in graph.items()}
    width = 0
    for z in eliminate:
        nbrs = adj.pop(z)
        width = max(width, len(nbrs))
        for u in nbrs:
            adj[u].discard(z)
            adj[u].update(nbrs - {u})
    return eliminate, width


def _build_plan(idx: _Index, target: str, ev_vars: tuple[str, ...],
                do_vars: tuple[str, ...]) -> _Plan:
    obs = ev_vars + do_vars
    obs_col = {v: i for i, v in enumerate(obs)}
    cut = frozenset(do_vars)
    relevant = idx.relevant((target,) + obs, cut)
    factors: list[_Factor] = []
    # interaction graph of the sliced factors, as {node: neighbours} (cheaper than networkx)
    graph: dict[str, set[str]] = {v: set() for v in relevant if v not in obs_col}
    for v in relevant:
        if v in cut:
            continue  # surgery: the intervened variable's CPT is replaced by a point mass
        scope = (v,) + tuple(idx.parents[v])
        obs_axes = [i for i, u in enumerate(scope) if u in obs_col]
        free_axes = [i for i, u in enumerate(scope) if u not in obs_col]
        table = idx.cpts[v]
        if obs_axes:
            table = np.ascontiguousarray(table.transpose(obs_axes + free_axes))
        free = tuple(scope[i] for i in free_axes)
        factors.append(_Factor(table, tuple(obs_col[scope[i]] for i in obs_axes), free,
                               bool(obs_axes)))
        for u in free:
            graph[u].update(free)
    for u, nbrs in graph.items():
        nbrs.discard(u)
    order, width = _cheaper_order(graph, target, idx.card)

    scopes = [f.scope for f in factors]
    batched = [f.batched for f in factors]
    alive = set(range(len(factors)))
    mentions: dict[str, set[int]] = {v: set() for v in graph}
    for i, s in enumerate(scopes):
        for v in s:
            mentions[v].add(i)
    steps = []
    work = 0
    largest = 0
    for z in order:
        ins = tuple(sorted(mentions[z]))
        union: list[str] = []
        for i in ins:
            for v in scopes[i]:
                if v not in union:
                    union.append(v)
        out_scope = tuple(v for v in union if v != z)
        out_b = any(batched[i] for i in ins)
        size = 1
        for v in union:
            size *= idx.card[v]
        work += size
        largest = max(largest, size)
        sub = _subscripts([scopes[i] for i in ins], [batched[i] for i in ins], out_scope, out_b)
        slot = len(scopes)
        scopes.append(out_scope)
        batched.append(out_b)
        for i in ins:
            alive.discard(i)
            for v in scopes[i]:
                mentions[v].discard(i)
        alive.add(slot)
        for v in out_scope:
            mentions[v].add(slot)
        steps.append((ins, sub, slot))
    final_inputs = tuple(sorted(alive))
    final_b = any(batched[i] for i in final_inputs)
    size = idx.card[target]
    work += size
    largest = max(largest, size)
    final_sub = _subscripts([scopes[i] for i in final_inputs],
                            [batched[i] for i in final_inputs], (target,), final_b)
    return _Plan(target, tuple(factors), tuple(steps), final_inputs, final_sub, final_b,
                 len(scopes), graph, tuple(order), width, work, largest, tuple(relevant))


def _plan(inst: BayesNetInstance, parsed: _Parsed) -> _Plan:
    plans = inst._cache.setdefault("plans", {})
    key = parsed.shape
    plan = plans.get(key)
    if plan is None:
        plan = plans[key] = _build_plan(_index(inst), *key)
    return plan


def _run_plan(plan: _Plan, values: np.ndarray) -> np.ndarray:
    """Joint table P(target, e) for each row of ``values`` (B x n_observed ints) -> (B, card)."""
    n = values.shape[0]
    slots: list[Any] = [None] * plan.n_slots
    for i, f in enumerate(plan.factors):
        if f.batched:
            slots[i] = f.table[tuple(values[:, c] for c in f.obs_cols)]
        else:
            slots[i] = f.table
    for ins, sub, out in plan.steps:
        slots[out] = np.einsum(sub, *[slots[i] for i in ins])
        for i in ins:
            slots[i] = None  # free intermediate tables as soon as they are consumed
    joint = np.einsum(plan.final_subscripts, *[slots[i] for i in plan.final_inputs])
    if not plan.final_batched:
        joint = np.broadcast_to(joint, (n,) + joint.shape)
    return joint


def _exact_batch(inst: BayesNetInstance, parsed_list: list[_Parsed], queries) -> list[Answer]:
    out: list[Answer | None] = [None] * len(parsed_list)
    groups: dict[tuple, list[int]] = {}
    for i, p in enumerate(parsed_list):
        if p.trivial is not None:
            out[i] = Answer(value=p.trivial, work=0.0, note="target observed or intervened")
        else:
            groups.setdefault(p.shape, []).append(i)
    for key, members in groups.items():
        plan = _plan(inst, parsed_list[members[0]])
        n_obs = len(key[1]) + len(key[2])
        values = np.array([parsed_list[i].values for i in members], dtype=np.intp).reshape(
            len(members), n_obs)
        chunk = max(1, _CHUNK_ENTRIES // max(1, plan.largest))
        for start in range(0, len(members), chunk):
            rows = members[start:start + chunk]
            joint = _run_plan(plan, values[start:start + chunk])
            p_e = joint.sum(axis=1)
            for r, i in enumerate(rows):
                pe = float(p_e[r])
                if not pe > 0.0 or not np.isfinite(pe):
                    raise ModelError(f"bayesnet: evidence has probability zero in "
                                     f"{queries[i].describe()} (network {inst.name!r})")
                value = float(joint[r, parsed_list[i].target_value]) / pe
                out[i] = Answer(value=value, work=float(plan.work))
    return out  # type: ignore[return-value]


# -- sampling engine ----------------------------------------------------------------------------
def _query_stream(seed: int, q: Query) -> np.random.Generator:
    # Stable across processes and call order: the stream is keyed by the query's text.
    return make_rng(seed, "lw", zlib.crc32(q.describe().encode()))


def _lw_cost(idx: _Index, parsed: _Parsed) -> tuple[list[str], int]:
    cut = frozenset(parsed.do_vars)
    relevant = idx.relevant((parsed.target,) + parsed.evidence_vars + parsed.do_vars, cut)
    ev = set(parsed.evidence_vars)
    per_sample = sum(0 if v in cut else (1 if v in ev else idx.card[v]) for v in relevant)
    return relevant, per_sample


def _likelihood_weighting(idx: _Index, parsed: _Parsed, n_samples: int,
                          rng: np.random.Generator, describe: str) -> Answer:
    relevant, per_sample = _lw_cost(idx, parsed)
    obs = dict(zip(parsed.evidence_vars + parsed.do_vars, parsed.values))
    do = set(parsed.do_vars)
    n = int(n_samples)
    sample: dict[str, np.ndarray] = {}
    weight = np.ones(n)
    for v in relevant:
        if v in do:
            sample[v] = np.full(n, obs[v], dtype=np.intp)
            continue
        ps = idx.parents[v]
        if ps:
            col = sample[ps[0]] * idx.strides[v][0]
            for k in range(1, len(ps)):
                col = col + sample[ps[k]] * idx.strides[v][k]
        else:
            col = np.zeros(n, dtype=np.intp)
        table = idx.flat[v]
        if v in obs:
            weight *= table[obs[v], col]
            sample[v] = np.full(n, obs[v], dtype=np.intp)
        else:
            cum = np.cumsum(table[:, col], axis=0)         # (card, n)
            u = rng.random(n) * cum[-1]
            sample[v] = np.minimum((cum < u).sum(axis=0), idx.card[v] - 1)
    total = float(weight.sum())
    if not total > 0.0:
        raise ModelError(f"bayesnet: likelihood weighting: every one of {n} samples has weight "
                         f"zero in {describe} (evidence of probability zero, or too unlikely "
                         "for this sample count)")
    f = (sample[parsed.target] == parsed.target_value).astype(float)
    p = float(np.dot(weight, f) / total)
    w2 = float(np.dot(weight, weight))
    se_delta = float(np.sqrt(np.dot(weight * weight, (f - p) ** 2))) / total
    n_eff = total * total / w2
    q = (n_eff * p + 0.5) / (n_eff + 1.0)
    se = max(se_delta, float(np.sqrt(q * (1.0 - q) / n_eff)))
    return Answer(value=p, work=float(n * per_sample), stderr=se, is_exact=False, n_accepted=n,
                  note=f"likelihood weighting, {n} samples, effective sample size {n_eff:.0f}")


# -- pgmpy reference ----------------------------------------------------------------------------
def _pgmpy_engine(inst: BayesNetInstance, do_vars: tuple[str, ...]):
    """VariableElimination on the network (or its mutilated copy), cached per do-set."""
    engines = inst._cache.setdefault("pgmpy_ve", {})
    if do_vars in engines:
        return engines[do_vars]
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", FutureWarning)
        from pgmpy.factors.discrete import TabularCPD
        from pgmpy.inference import VariableElimination
    from model_zoo.networks.pgmpy_bridge import to_pgmpy

    model = inst._cache.get("pgmpy_model")
    if model is None:
        model = inst._cache["pgmpy_model"] = to_pgmpy(inst.network)
    if do_vars:
        model = model.do(list(do_vars))
        # pgmpy's do() keeps the marginalised CPT, which may give the set value probability
        # zero; any positive prior is equivalent once the variable is observed.
        for v in do_vars:
            card = inst.network.card(v)
            model.remove_cpds(model.get_cpds(v))
            model.add_cpds(TabularCPD(v, card, np.full((card, 1), 1.0 / card),
                                      state_names={v: list(inst.network.states[v])}))
    engine = engines[do_vars] = VariableElimination(model)
    return engine


@register
class BayesNetFamily(FamilyBase):
    """Discrete Bayesian networks (see the module docstring for engines and work units).

    Parameters (keyword, stored by the constructor)
    ------------------------------------------------
    n_samples : int, default 2000
        Likelihood-weighting samples per query.
    seed : int, default 0
        Root of the sampling streams (one stream per query, keyed by its text).
    max_in_degree : int, default 3
        In-degree bound of the ``random`` and ``layered`` topologies.
    dirichlet_alpha : float, default 1.0; floor : float, default 0.05
        CPT columns ~ (1 - floor) Dirichlet(alpha) + floor * uniform.
    reference_max_work : float, default 1e7
        Above this predicted work, :meth:`reference` returns None.
    treewidth_lower_limit : int, default 300
        :meth:`profile` adds ``treewidth_lower`` (from :mod:`model_zoo.treewidth`) only for
        networks of at most this many variables (the bound costs seconds beyond).
    target_choice : {"any", "last"}, default "any"
        ``"last"`` asks every generated query about the last variable in topological order (the
        one farthest downstream, whose ancestral set is the largest) and intervenes on the first
        variable, so that cost along a growth curve is not blurred by where a random target or
        intervention fell; ``"any"`` draws any variable.
    """

    name = "bayesnet"
    levels = frozenset({Level.ASSOCIATIONAL, Level.INTERVENTIONAL})
    methods = frozenset({"exact", "sampling"})
    mechanism_knob = "states per variable"
    work_unit = ("table entries multiplied (exact); CPT entries read by the sampler "
                 "(sampling: per sample, card(v) per sampled variable, 1 per observed one)")
    work_units = {"exact": "table entries multiplied",
                  "sampling": "CPT entries read by the sampler"}

    def _p(self, key: str, default):
        return self.params.get(key, default)

    # -- building -----------------------------------------------------------------------------
    def realizable(self, size: Size, *, topology: str) -> Size:
        """Grids are k x k; at least 2 states per variable (one state has nothing to infer)."""
        self.check_topology(topology)
        return Size(graph=topologies.realizable_graph_size(topology, int(size.graph)),
                    mechanism=max(2, int(size.mechanism)))

    def build(self, size: Size, *, topology: str, seed: int) -> BayesNetInstance:
        """A random network of ``size.graph`` variables with ``size.mechanism`` states each.

        O(n * d^(k+1)) for in-degree k (drawing the CPTs)."""
        real = self.realizable(size, topology=topology)
        floor = float(self._p("floor", 0.05))
        alpha = float(self._p("dirichlet_alpha", 1.0))
        if not 0.0 < floor <= 1.0:
            raise InputError.at("bayesnet", "floor", "a number in (0, 1]", floor)
        if not alpha > 0.0:
            raise InputError.at("bayesnet", "dirichlet_alpha", "a number > 0", alpha)
        graph = topologies.make_graph(topology, real.graph, seed=seed,
                                      max_in_degree=int(self._p("max_in_degree", 3)))
        name = f"bayesnet-{topology}-n{real.graph}-d{real.mechanism}-s{seed}"
        net = random_network(graph, real.mechanism, seed=seed, alpha=alpha, floor=floor,
                             name=name)
        return BayesNetInstance(size=real, topology=topology, seed=int(seed), name=name,
                                network=net)

    def from_network(self, net: DiscreteNetwork, *, name: str | None = None) -> BayesNetInstance:
        """Wrap an existing (validated) network as an instance (topology ``'file'``)."""
        d = max(net.card(v) for v in net.variables) if net.variables else 1
        return BayesNetInstance(size=Size(graph=max(1, len(net.variables)), mechanism=max(1, d)),
                                topology="file", seed=0, name=name or net.name, network=net)

    def load(self, source: str | Path) -> BayesNetInstance:
        """Read ``.bif``, ``.bif.gz``, ``.xmlbif``/``.xml``, ``.uai`` or a bundled network name.

        Raises InputError (one line naming the file) on a bad file; see
        :func:`model_zoo.networks.read_network`."""
        from model_zoo.networks import read_network

        return self.from_network(read_network(source))

    def dump(self, instance: BayesNetInstance, path: str | Path) -> None:
        """Write the instance's network as BIF (or XMLBIF for ``.xmlbif``/``.xml``)."""
        from model_zoo.networks import write_network

        write_network(instance.network, path)

    # -- queries ------------------------------------------------------------------------------
    def queries(self, instance: BayesNetInstance, level: Level, *, n: int,
                seed: int) -> list[Query]:
        """``n`` random queries: a random target variable and state, 0-3 evidence variables and,
        for interventional queries, one do() variable (never the target).

        Evidence values come from one forward sample of the (mutilated) network, so the evidence
        always has positive probability, also in loaded networks with zeros in their CPTs."""
        level = self.check_level(level)
        net = instance.network
        idx = _index(instance)
        rng = make_rng(seed, "queries", level.value, zlib.crc32(instance.name.encode()))
        names = list(net.variables)
        out: list[Query] = []
        interventional = level is Level.INTERVENTIONAL
        if interventional and len(names) < 2:
            raise ModelError(f"bayesnet: {instance.name!r} has one variable; an interventional "
                             "query needs a target and a different do() variable")
        choice = self._p("target_choice", "any")
        if choice not in ("any", "last"):
            raise InputError.at("bayesnet", "target_choice", "'any' or 'last'", choice)
        for _ in range(int(n)):
            picks = rng.permutation(len(names))
            if choice == "last":  # the last variable first, the rest in random order
                picks = np.concatenate(([len(names) - 1], picks[picks != len(names) - 1]))
            target = names[picks[0]]
            rest = [names[i] for i in picks[1:]]
            do: dict[str, int] = {}
            if interventional:
                # "last": intervene upstream-most, so the cut does not decide the query's cost
                x = rest.pop(rest.index(names[0]) if choice == "last" else 0)
                do[x] = int(rng.integers(idx.card[x]))
            n_ev = int(rng.integers(0, min(3, len(rest)) + 1))
            ev_vars = rest[:n_ev]
            world = self._forward_sample(idx, ev_vars, do, rng) if ev_vars else {}
            out.append(Query(level=level,
                             target=((target, int(rng.integers(idx.card[target]))),),
                             evidence=tuple((v, world[v]) for v in ev_vars),
                             intervention=tuple(do.items())))
        return out

    @staticmethod
    def _forward_sample(idx: _Index, wanted: Sequence[str], do: dict[str, int],
                        rng: np.random.Generator) -> dict:
        """One ancestral sample of the ancestors of ``wanted`` in the mutilated network."""
        world: dict[str, int] = {}
        for v in idx.relevant(tuple(wanted), frozenset(do)):
            if v in do:
                world[v] = do[v]
                continue
            col = 0
            for p, s in zip(idx.parents[v], idx.strides[v]):
                col += world[p] * int(s)
            probs = idx.flat[v][:, col]
            world[v] = int(rng.choice(len(probs), p=probs / probs.sum()))
        return world

    # -- answering ----------------------------------------------------------------------------
    def _parse_all(self, instance: BayesNetInstance, queries: Sequence[Query]) -> list[_Parsed]:
        idx = _index(instance)
        out = []
        for q in queries:
            self.check_level(q.level)
            out.append(_parse(idx, q))
        return out

    def answer(self, instance: BayesNetInstance, query: Query, *, method: str) -> Answer:
        """P(target | evidence) or P(target | do(...), evidence); see the module docstring."""
        return self.answer_batch(instance, [query], method=method)[0]

    def answer_batch(self, instance: BayesNetInstance, queries: Sequence[Query], *,
                     method: str) -> list[Answer]:
        """Answer many queries; the exact engine groups them by shape and runs each cached plan
        once over the batch (O(batch * plan work), evidence-independent steps shared)."""
        self.check_method(method)
        queries = list(queries)
        parsed = self._parse_all(instance, queries)
        if method == "exact":
            return _exact_batch(instance, parsed, queries)
        idx = _index(instance)
        n_samples = int(self._p("n_samples", 2000))
        if n_samples < 1:
            raise InputError.at("bayesnet", "n_samples", "an integer >= 1", n_samples)
        seed = int(self._p("seed", 0))
        out = []
        for q, p in zip(queries, parsed):
            if p.trivial is not None:
                out.append(Answer(value=p.trivial, work=0.0, stderr=0.0, is_exact=False,
                                  n_accepted=n_samples, note="target observed or intervened"))
            else:
                out.append(_likelihood_weighting(idx, p, n_samples, _query_stream(seed, q),
                                                 q.describe()))
        return out

    def reference(self, instance: BayesNetInstance, query: Query) -> float | None:
        """pgmpy ``VariableElimination`` (default order); interventional via ``model.do``.

        None when the predicted exact work exceeds ``reference_max_work``."""
        parsed = _parse(_index(instance), query)
        if parsed.trivial is not None:
            return parsed.trivial
        if self.predicted_work(instance, query, method="exact") > float(
                self._p("reference_max_work", 1e7)):
            return None
        net = instance.network
        engine = _pgmpy_engine(instance, parsed.do_vars)
        observed = parsed.evidence_vars + parsed.do_vars
        evidence = {v: net.states[v][x] for v, x in zip(observed, parsed.values)}
        import warnings

        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            factor = engine.query([parsed.target], evidence=evidence or None,
                                  show_progress=False)
        pos = list(factor.state_names[parsed.target]).index(
            net.states[parsed.target][parsed.target_value])
        value = float(np.asarray(factor.values).reshape(-1)[pos])
        if not np.isfinite(value):
            raise ModelError(f"bayesnet: evidence has probability zero in {query.describe()} "
                             "(pgmpy returned NaN)")
        return value

    # -- structure and predictions ------------------------------------------------------------
    def profile(self, instance: BayesNetInstance) -> dict[str, float]:
        """Structural profile: sizes, in-degree, parameters, min-fill width of the moral graph,
        and the elimination cost of that order when every variable is summed out."""
        cached = instance._cache.get("profile")
        if cached is not None:
            return dict(cached)
        net = instance.network
        idx = _index(instance)
        moral = moral_graph(net.parents)
        order, width = min_fill_order(moral)
        work_all, largest_factor = elimination_cost(moral, order, idx.card)
        table_sizes = [net.cpts[v].size for v in net.variables] or [0]
        cards = [idx.card[v] for v in net.variables] or [0]
        prof: dict[str, float] = {
            "n_variables": float(len(net.variables)),
            "n_edges": float(net.n_edges),
            "max_in_degree": float(max((len(p) for p in net.parents.values()), default=0)),
            "n_states_max": float(max(cards)),
            "n_states_mean": float(np.mean(cards)),
            "n_parameters": float(net.n_free_parameters()),
            "n_table_entries": float(sum(table_sizes)),
            "largest_table_entries": float(max(table_sizes)),
            "moral_edges": float(moral.number_of_edges()),
            "treewidth_upper": float(width),
            "elimination_entries_all": float(work_all),
            "largest_factor_entries": float(largest_factor),
        }
        try:
            from model_zoo.treewidth import treewidth_bounds
        except ImportError:
            treewidth_bounds = None
        # The lower bound costs seconds on graphs of ~1000 nodes; a profile is asked for at
        # every point of a study, so it is only added up to `treewidth_lower_limit` variables.
        if treewidth_bounds is not None and len(net.variables) <= int(
                self._p("treewidth_lower_limit", 300)):
            bounds = treewidth_bounds(moral)
            prof["treewidth_lower"] = float(bounds.lower)
            # Our min-fill order's width stays the upper bound the engine achieves; record the
            # auditor's bound beside it.
            prof["treewidth_upper_bound"] = float(min(bounds.upper, width))
        instance._cache["profile"] = dict(prof)
        return prof

    def predicted_work(self, instance: BayesNetInstance, query: Query, *, method: str) -> float:
        """Exact: :func:`elimination_cost` of the plan's order on its interaction graph (no
        inference runs). Sampling: n_samples x (per-sample CPT entries read)."""
        cost = self._cost_parts(instance, query, method)
        if cost is None:
            return 0.0
        if method == "sampling":
            _, per_sample = cost
            return float(int(self._p("n_samples", 2000)) * per_sample)
        total, _ = cost
        return float(total)

    def predicted_bytes(self, instance: BayesNetInstance, query: Query, *,
                        method: str) -> float | None:
        """Exact: the largest product table x 8 bytes. Sampling: n_samples x (relevant
        variables + 1 weight) x 8 bytes."""
        cost = self._cost_parts(instance, query, method)
        if cost is None:
            return 0.0
        if method == "sampling":
            relevant, _ = cost
            return float(int(self._p("n_samples", 2000)) * (len(relevant) + 1) * 8)
        _, largest = cost
        return float(largest * 8)

    def _cost_parts(self, instance: BayesNetInstance, query: Query, method: str):
        """What both cost formulas read, without running inference: None for a trivial query;
        for sampling (relevant variables, CPT entries read per sample); for exact (total,
        largest) product-table entries of the plan's elimination order."""
        self.check_method(method)
        idx = _index(instance)
        parsed = _parse(idx, query)
        if parsed.trivial is not None:
            return None
        if method == "sampling":
            return _lw_cost(idx, parsed)
        plan = _plan(instance, parsed)
        return elimination_cost(plan.graph, plan.order, idx.card)

    def expected_growth(self, *, axis: str, topology: str, level: Level,
                        method: str) -> str | None:
        """Exact: O(n d^(w+1)). Graph axis: polynomial on chain/tree (w = 1), exponential on the
        grid (w = sqrt(n)); silent on random/layered graphs (w depends on the draw). Mechanism
        axis: polynomial (d^(w+1) with w fixed). Sampling: polynomial on both axes (samples x
        relevant variables x states)."""
        if method == "sampling":
            return "polynomial"
        if axis == "mechanism":
            return "polynomial"
        if axis == "graph":
            return {"chain": "polynomial", "tree": "polynomial", "grid": "exponential"}.get(
                topology)
        return None
