"""Structural causal models with discrete endogenous variables, finite exogenous variables and
MLP mechanisms (numpy only), answered at all three levels of the causal hierarchy.

The model
---------
Each endogenous variable ``V_i`` (``n_states`` states, binary by default) has its own exogenous
variable ``U_i`` with finite support (``n_exogenous`` states, random normalised probabilities),
and may share *confounders* ``C_k`` (exogenous roots feeding a pair of endogenous variables; the
``random`` topology draws some). Its mechanism is

    V_i = argmax_s MLP_i(onehot(parents), onehot(U_i), onehot(C_k ...))[s]

with ReLU hidden layers of ``hidden width`` units (the mechanism knob, ``Size.mechanism``) and
``depth`` hidden layers (default 1). The graph comes from :func:`model_zoo.topologies.make_graph`.

Non-degenerate mechanisms. The argmax of a random MLP is often constant, which would make every
query trivial. Each mechanism is therefore drawn, then tabulated over all its input
configurations, and (1) its output biases are *centred*: for two states the bias of state 1 is
shifted so that the decision boundary falls in the widest gap between the middle third of the
sorted logit differences (about half of the configurations give each state, and no configuration
sits within a rounding error of a tie); for more states each state's logit is centred on its mean
over the configurations; (2) the table must not be constant, must depend on every input (each
parent and each exogenous variable changes the output somewhere) and have a top-two logit margin
of at least ``1e-7``. A draw that fails is redrawn from the next derived stream (up to 50 times;
``meta["n_degenerate_mechanisms"]`` counts the rare survivors). Mechanisms with more than 4,096
input configurations are checked on a random sample of configurations, for non-constancy only.

Engines
-------
``exact`` enumerates the exogenous configurations ("worlds") that can matter for the query
(the exogenous parents of the query's ancestral set; ``prune=False`` enumerates them all), in
chunks, pushes each chunk through the mechanisms as dense float64 matrix products (worlds x
features @ weights, every layer, the first on the one-hot codes with its bias folded in) and
weights each world by P(u):

- associational P(Y=y | E=e): one pass;
- interventional P(Y=y | do(X=x), E=e): one pass with X's mechanism replaced by the constant x;
- counterfactual P(Y_x=y | E=e) by abduction-action-prediction (Pearl 2009, ch. 7): the factual
  pass gives the posterior over worlds (P(u) restricted to worlds consistent with e), then the
  descendants of X that the target needs are recomputed under do(X=x) in the same worlds.

World weights are products of exogenous probabilities in double precision. When the evidence's
probability comes out below 1e-250, worlds consistent with it may have underflowed to weight
zero, so the engine enumerates a second time with log weights (sums of ln P(u), summed by
log-sum-exp): evidence as unlikely as exp(-1000) gets its exact conditional, and only evidence
no world satisfies raises "evidence has probability zero". That rare second pass counts twice
the work and says so in the answer's note.

``sampling`` draws ``n_samples`` worlds from P(U) (stream ``make_rng(seed, "sampling", crc32 of
the query)``), runs the same passes and keeps the samples whose (factual) world matches the
evidence (rejection). The estimate is the accepted fraction; its standard error is the binomial
one with the Agresti-Coull adjustment (two successes and two failures added), so that an estimate
of 0 or 1 does not claim zero uncertainty.

Speed (what the engine does besides the counted products; see ``tests/perf/bench_neural_scm.py``).
Every layer's product is computed as its transpose, (outputs x inputs) @ (inputs x worlds): the
one-hot inputs are written as one contiguous row per state, and bias additions, ReLUs and the
comparison of two logits run over contiguous rows; a two-state output layer is computed as two
matrix-vector products (BLAS is slow on two-row matrix products). Work buffers are shared by
the mechanisms and chunks of one call (and one set is pooled per instance); a query's plan and
its enumeration layout (the trailing exogenous values, their one-hot codes and world weights;
at most ``_LAYOUT_CACHE_BYTES`` = 32 MiB in all) are cached on the instance, so a repeated
query skips planning and enumerating. Every counted product is still performed densely,
multiply-add for multiply-add (no row gather for the one-hot layer, no difference-of-logits
shortcut on the two-state output layer).

Work unit: *multiply-adds*. A mechanism costs the multiply-adds of its dense layers,
``in*H + (depth-1)*H*H + H*S`` (``in`` = one-hot input width; bias additions, ReLU and argmax not
counted); a query costs ``worlds x (sum over the mechanisms it evaluates)`` (exact, worlds = the
product of the relevant exogenous supports) or ``n_samples x`` the same (sampling). A
counterfactual evaluates the factual mechanisms plus the recomputed ones. Exact enumeration is
refused with :class:`ModelError` beyond ``max_worlds`` (default ``2**30``); memory stays bounded
by the chunk size either way.

Reference: an independent code path through pgmpy. :func:`to_bayesian_network` turns the SCM into a
discrete Bayesian network over U and V with deterministic CPTs (tabulated by a separate plain
evaluation of each MLP); :func:`twin_network` builds the twin network of Balke & Pearl (1994)
(shared U, a factual and a counterfactual copy of V, the intervened copy cut and clamped), and
pgmpy's variable elimination answers. Above ``reference_max_variables`` endogenous variables
(default 12) or 200,000 CPT entries the reference is None.

File format (``format_version`` 1; see docs/formats/neural_scm.md)::

    {"family": "neural_scm", "format_version": 1, "name": "...",
     "weights_file": "model.npz",                       # optional
     "variables": [{"name": "X0", "states": ["0", "1"], "parents": [],
                    "exogenous": {"name": "U_X0", "probabilities": [0.3, 0.7]},
                    "shared_exogenous": ["C0"],
                    "mechanism": {"layers": [{"weights": [[...]], "bias": [...]}, ...]}}],
     "confounders": [{"name": "C0", "probabilities": [0.5, 0.5]}]}

Layer ``k`` has ``weights`` of shape (inputs, outputs); the first layer's inputs are the one-hot
codes of the parents (in the listed order), then of the own exogenous variable, then of the shared
ones (in the listed order); the last layer has one output per state. With ``weights_file`` a
``weights``/``bias`` entry may be a string naming an array in that ``.npz`` (read with
``allow_pickle=False``).

References
----------
Pearl, J. (2009). *Causality*, 2nd ed., ch. 7 (abduction, action, prediction).
Balke, A. & Pearl, J. (1994). Probabilistic evaluation of counterfactual queries. AAAI-94.
Agresti, A. & Coull, B. A. (1998). Approximate is better than "exact" for interval estimation of
binomial proportions. The American Statistician 52(2):119-126.
"""

from __future__ import annotations

import itertools
import json
import math
import pathlib
import zipfile
import zlib
from dataclasses import dataclass, field
from typing import Any, Sequence

import numpy as np

from model_zoo.base import Answer, FamilyBase, Level, Query, Size, make_rng, register
from model_zoo.discrete import DiscreteNetwork
from model_zoo.errors import InputError, ModelError, UnsupportedQuery

__all__ = [
    "Mechanism",
    "NeuralSCM",
    "NeuralSCMFamily",
    "build_scm",
    "from_dict",
    "to_dict",
    "simulate",
    "mechanism_table",
    "to_bayesian_network",
    "twin_network",
    "evaluate_worlds",
    "enumeration_shapes",
    "MAX_WORLDS",
]

FORMAT_VERSION = 1
#: Default hard limit on enumerated exogenous worlds for the exact engine.
MAX_WORLDS = 2 ** 30
#: Mechanisms with more input configurations are checked on a sample of configurations.
_TABLE_CHECK_LIMIT = 4096
_MAX_REDRAWS = 50
_MIN_MARGIN = 1e-7
#: Bytes a chunk of worlds may use (values, one-hot inputs, hidden activations).
_CHUNK_BYTES = 2 ** 25
#: Bytes of enumeration layouts (values, one-hot codes, weights) cached per instance.
_LAYOUT_CACHE_BYTES = 2 ** 25
_REFERENCE_MAX_ENTRIES = 200_000


# ---------------------------------------------------------------------------------------------
# representation
# ---------------------------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class Mechanism:
    """One MLP: ``weights[k]`` has shape (inputs_k, outputs_k), ``biases[k]`` shape (outputs_k,).

    ReLU follows every layer but the last; the output is the argmax over the last layer's units.
    ``folded`` is the first layer with its bias appended as a last row, so that a one-hot input
    with a trailing constant 1 gets its bias from the matrix product.
    """

    weights: tuple[np.ndarray, ...]
    biases: tuple[np.ndarray, ...]
    folded: np.ndarray = field(init=False, repr=False)

    def __post_init__(self) -> None:
        w = tuple(np.ascontiguousarray(x, dtype=np.float64) for x in self.weights)
        b = tuple(np.ascontiguousarray(x, dtype=np.float64).reshape(-1) for x in self.biases)
        object.__setattr__(self, "weights", w)
        object.__setattr__(self, "biases", b)
        object.__setattr__(self, "folded",
                           np.ascontiguousarray(np.vstack([w[0], b[0][None, :]])))
        # the engine computes every product transposed, (outputs x inputs) @ (inputs x rows):
        # activations are (units x rows), so that bias additions, ReLUs and the comparison of
        # two logits run over contiguous rows (and BLAS is a little faster on these shapes)
        object.__setattr__(self, "_weights_t", (np.ascontiguousarray(self.folded.T),)
                           + tuple(np.ascontiguousarray(v.T) for v in w[1:]))
        object.__setattr__(self, "_biases_col", (None,)
                           + tuple(np.ascontiguousarray(v[:, None]) for v in b[1:]))
        # work buffers of the engine (see _Scratch.get): the inputs, then each layer's output
        # (hidden layers alternate between two slots per width)
        object.__setattr__(self, "_keys", (("x", w[0].shape[0] + 1, None),)
                           + tuple(("h", v.shape[1], None, k % 2) for k, v in enumerate(w[:-1]))
                           + (("o", w[-1].shape[1], None),))

    @property
    def n_inputs(self) -> int:
        return int(self.weights[0].shape[0])

    @property
    def n_outputs(self) -> int:
        return int(self.weights[-1].shape[1])

    @property
    def multiply_adds(self) -> int:
        """Multiply-adds of one evaluation: sum of inputs x outputs over the layers."""
        return int(sum(w.shape[0] * w.shape[1] for w in self.weights))

    @property
    def n_parameters(self) -> int:
        return int(sum(w.size for w in self.weights) + sum(b.size for b in self.biases))


@dataclass(frozen=True, eq=False)
class NeuralSCM:
    """A structural causal model with MLP mechanisms (see the module docstring).

    Attributes
    ----------
    variables
        Endogenous names in a topological order.
    states
        State names of each endogenous variable (query values are indices into these).
    parents
        Endogenous parents of each variable, as indices into ``variables``.
    exogenous, exogenous_probabilities
        Exogenous names and distributions: each variable's own ``U`` first (``exogenous[i]``
        belongs to ``variables[i]``), then the shared confounders.
    exogenous_inputs
        Exogenous inputs of each variable (indices into ``exogenous``): its own first, then shared.
    mechanisms
        One :class:`Mechanism` per variable.
    """

    size: Size
    topology: str
    seed: int
    name: str
    variables: tuple[str, ...]
    states: tuple[tuple[str, ...], ...]
    parents: tuple[tuple[int, ...], ...]
    exogenous: tuple[str, ...]
    exogenous_probabilities: tuple[np.ndarray, ...]
    exogenous_inputs: tuple[tuple[int, ...], ...]
    mechanisms: tuple[Mechanism, ...]
    meta: dict = field(default_factory=dict)

    def __post_init__(self) -> None:
        object.__setattr__(self, "_index", {v: i for i, v in enumerate(self.variables)})
        children: list[list[int]] = [[] for _ in self.variables]
        for i, ps in enumerate(self.parents):
            for p in ps:
                children[p].append(i)
        object.__setattr__(self, "_children", tuple(tuple(c) for c in children))
        object.__setattr__(self, "_offsets", tuple(tuple(int(o) for o in _input_offsets(
            self.input_cards(i))) for i in range(len(self.variables))))
        # per mechanism input: (first row, last row + 1, the states as a column) of its one-hot
        # block in the engine's transposed input matrix
        object.__setattr__(self, "_blocks", tuple(
            tuple((o, o + c, np.arange(c, dtype=np.intp)[:, None])
                  for o, c in zip(self._offsets[i], self.input_cards(i)))  # type: ignore[attr-defined]
            for i in range(len(self.variables))))
        # query plans and enumeration layouts, keyed by (query, prune): repeated queries skip
        # the pure-Python planning (bounded; see _cached)
        object.__setattr__(self, "_cache", {})

    def __getstate__(self) -> dict:
        # the cache (plans, layouts, pooled buffers) is rebuilt where the instance lands
        return {**self.__dict__, "_cache": {}}

    def __setstate__(self, state: dict) -> None:
        self.__dict__.update(state)

    # -- small accessors ----------------------------------------------------------------------
    def index(self, name: str) -> int:
        try:
            return self._index[name]  # type: ignore[attr-defined]
        except KeyError:
            raise InputError.at(self.name, "variable", "one of the model's variables "
                                f"({', '.join(self.variables[:5])}{', ...' if len(self.variables) > 5 else ''})",
                                name) from None

    @property
    def n_variables(self) -> int:
        return len(self.variables)

    @property
    def children(self) -> tuple[tuple[int, ...], ...]:
        return self._children  # type: ignore[attr-defined]

    @property
    def input_offsets(self) -> tuple[tuple[int, ...], ...]:
        """Start of each input's one-hot block in each mechanism's first layer."""
        return self._offsets  # type: ignore[attr-defined]

    def card(self, i: int) -> int:
        return len(self.states[i])

    def exogenous_card(self, j: int) -> int:
        return int(self.exogenous_probabilities[j].size)

    def input_cards(self, i: int) -> tuple[int, ...]:
        """Cardinalities of variable i's mechanism inputs, in the one-hot layout order."""
        return (tuple(self.card(p) for p in self.parents[i]) +
                tuple(self.exogenous_card(j) for j in self.exogenous_inputs[i]))

    def log10_worlds(self, exogenous: Sequence[int] | None = None) -> float:
        js = range(len(self.exogenous)) if exogenous is None else exogenous
        return float(sum(math.log10(self.exogenous_card(j)) for j in js))


def _input_offsets(cards: Sequence[int]) -> np.ndarray:
    return np.concatenate([[0], np.cumsum(cards)[:-1]]).astype(np.intp) if cards else np.zeros(0, np.intp)


# ---------------------------------------------------------------------------------------------
# the vectorised evaluation (engine path)
# ---------------------------------------------------------------------------------------------
class _Scratch:
    """Work buffers for chunks of ``m`` rows, shared by every mechanism and chunk of one call.

    Mechanisms with equal layer widths reuse the same arrays (keys from ``Mechanism._keys``), so
    a pass allocates only its outputs after the first chunk. Memory: one input matrix, two
    hidden matrices and one logit matrix per distinct width, O(m x widths).
    """

    __slots__ = ("m", "buffers")

    def __init__(self, m: int) -> None:
        self.m = m
        self.buffers: dict[tuple, np.ndarray] = {}

    def get(self, key: tuple) -> np.ndarray:
        """The buffer for ``key`` = (kind, rows or None, columns or None): ``None`` is ``m``."""
        buf = self.buffers.get(key)
        if buf is None:
            kind, rows, cols = key[:3]
            buf = self.buffers[key] = np.empty((self.m if rows is None else rows,
                                                self.m if cols is None else cols))
            if kind == "x":
                buf[-1] = 1.0  # the folded bias's constant input
        return buf


def _borrow_scratch(scm: NeuralSCM, m: int) -> _Scratch:
    """A pooled :class:`_Scratch` of ``m`` rows from ``scm``'s cache, or a new one. The pool
    keeps at most one (the last returned): buffers of one chunk, O(m x widths) bytes. Threads
    answering on one instance each get their own (``list.pop`` / ``append`` are atomic)."""
    pool = scm._cache.setdefault("scratch", [])  # type: ignore[attr-defined]
    try:
        scratch = pool.pop()
    except IndexError:
        return _Scratch(m)
    return scratch if scratch.m == m else _Scratch(m)


def _return_scratch(scm: NeuralSCM, scratch: _Scratch) -> None:
    pool = scm._cache.setdefault("scratch", [])  # type: ignore[attr-defined]
    if not pool:
        pool.append(scratch)


def _eval_mechanism(mech: Mechanism, inputs: Sequence[np.ndarray],
                    blocks: Sequence[tuple[int, int, np.ndarray]], scratch: _Scratch,
                    out: np.ndarray) -> np.ndarray:
    """States chosen by ``mech`` for ``scratch.m`` rows of input state indices, written to
    ``out`` (integer, length m); dense matmuls.

    The one-hot inputs are written transposed, (features x rows), one broadcast comparison per
    input (``blocks``: its rows and states) or a copy where an input is given as its codes, a
    (states x rows) float array. The products are the dense ones that
    :func:`enumeration_shapes` lists, ``(rows x k) @ (k x n)`` per layer, each computed as its
    transpose ``(n x k) @ (k x rows)`` (the same multiply-adds), so that activations and logits
    are contiguous rows; two logits are computed as two matrix-vector products. Cost: rows x multiply-adds, plus O(rows x (inputs + units)) for the
    one-hot codes, the bias additions, the ReLUs and the comparison.
    """
    keys = mech._keys  # type: ignore[attr-defined]
    weights_t = mech._weights_t  # type: ignore[attr-defined]
    biases = mech._biases_col  # type: ignore[attr-defined]
    h = scratch.get(keys[0])
    for (lo, hi, states), col in zip(blocks, inputs):
        if col.ndim == 2:  # one-hot codes already made (the enumerated exogenous inputs)
            np.copyto(h[lo:hi], col)
        else:
            np.equal(col, states, out=h[lo:hi])
    last = len(weights_t) - 1
    for k, w in enumerate(weights_t):
        if k:
            np.maximum(h, 0.0, out=h)  # ReLU of the hidden layer before
        nxt = scratch.get(keys[k + 1])
        if k == last and w.shape[0] == 2:
            # two logits: one matrix-vector product per row is faster than a two-row
            # matrix product in BLAS (the same multiply-adds)
            np.matmul(w[0], h, out=nxt[0])
            np.matmul(w[1], h, out=nxt[1])
            h = nxt
        else:
            h = np.matmul(w, h, out=nxt)
        if k:  # the first layer's bias is folded in
            np.add(h, biases[k], out=h)
    if h.shape[0] == 2:
        # argmax of two logits, a tie going to state 0
        return np.greater(h[1], h[0], out=out)
    return np.argmax(h, axis=0, out=out)


def _run_pass(scm: NeuralSCM, order: Sequence[int], values: dict[int, np.ndarray],
              exo: dict[int, np.ndarray], clamp: dict[int, int], m: int,
              scratch: _Scratch | None = None, codes: dict[int, np.ndarray] | None = None) -> None:
    """Fill ``values`` for ``order`` (topological) from exogenous values; clamped ones constant.
    ``codes`` may give some exogenous inputs as (states x m) one-hot codes instead."""
    if scratch is None or scratch.m != m:
        scratch = _Scratch(m)
    if codes:
        exo = {**exo, **codes}
    blocks = scm._blocks  # type: ignore[attr-defined]
    outs = np.empty((len(order), m), dtype=np.intp)
    for k, i in enumerate(order):
        if i in clamp:
            outs[k] = clamp[i]
            values[i] = outs[k]
            continue
        inputs = [values[p] for p in scm.parents[i]] + [exo[j] for j in scm.exogenous_inputs[i]]
        values[i] = _eval_mechanism(scm.mechanisms[i], inputs, blocks[i], scratch, outs[k])


def evaluate_worlds(scm: NeuralSCM, exogenous_values: np.ndarray, *,
                    intervention: dict[int, int] | None = None) -> np.ndarray:
    """Endogenous values of every variable in given worlds.

    Parameters
    ----------
    scm
        The model.
    exogenous_values
        Integer array (n_worlds, n_exogenous) of exogenous state indices.
    intervention
        ``{variable index: state}`` replacing those mechanisms by constants.

    Returns
    -------
    numpy.ndarray
        (n_worlds, n_variables) state indices.

    Notes
    -----
    Cost: n_worlds x sum of the mechanisms' multiply-adds (dense float64 matmuls).
    """
    u = np.asarray(exogenous_values, dtype=np.intp)
    m = u.shape[0]
    exo = {j: np.ascontiguousarray(u[:, j]) for j in range(u.shape[1])}
    values: dict[int, np.ndarray] = {}
    _run_pass(scm, range(scm.n_variables), values, exo, dict(intervention or {}), m)
    out = np.empty((m, scm.n_variables), dtype=np.intp)
    for i, col in values.items():
        out[:, i] = col
    return out


def _sample_exogenous(scm: NeuralSCM, js: Sequence[int], m: int,
                      rng: np.random.Generator) -> dict[int, np.ndarray]:
    out = {}
    for j in js:
        cdf = np.cumsum(scm.exogenous_probabilities[j])
        draw = np.searchsorted(cdf, rng.random(m) * cdf[-1], side="right")
        out[j] = np.minimum(draw, cdf.size - 1).astype(np.intp)
    return out


def simulate(scm: NeuralSCM, n: int, *, seed: int | np.random.Generator = 0,
             intervention: dict[int, int] | None = None) -> np.ndarray:
    """Draw ``n`` worlds from P(U) and return the (n, n_variables) endogenous values.

    Cost: n x sum of all mechanisms' multiply-adds.
    """
    rng = make_rng(seed, "simulate")
    exo = _sample_exogenous(scm, range(len(scm.exogenous)), n, rng)
    values: dict[int, np.ndarray] = {}
    _run_pass(scm, range(scm.n_variables), values, exo, dict(intervention or {}), n)
    return np.stack([values[i] for i in range(scm.n_variables)], axis=1)


# ---------------------------------------------------------------------------------------------
# plain tabulation (reference path and mechanism checks)
# ---------------------------------------------------------------------------------------------
def _plain_logits(mech: Mechanism, configs: np.ndarray, cards: Sequence[int]) -> np.ndarray:
    """Logits for rows of input configurations, with explicit one-hot codes and ``x @ W + b``."""
    codes = [np.eye(c)[configs[:, k]] for k, c in enumerate(cards)]
    h = np.concatenate(codes, axis=1) if codes else np.zeros((configs.shape[0], 0))
    n_layers = len(mech.weights)
    for k in range(n_layers):
        h = h @ mech.weights[k] + mech.biases[k]
        if k < n_layers - 1:
            h = np.maximum(h, 0.0)
    return h


def _all_configs(cards: Sequence[int]) -> np.ndarray:
    if not cards:
        return np.zeros((1, 0), dtype=np.intp)
    grids = np.indices(tuple(cards)).reshape(len(cards), -1).T
    return np.ascontiguousarray(grids, dtype=np.intp)


def mechanism_table(scm: NeuralSCM, i: int) -> np.ndarray:
    """The deterministic function of variable ``i``: state for every input configuration.

    Returns an integer array of shape ``input_cards(i)`` (parents, own exogenous, shared), computed
    by a plain evaluation independent of the engine's folded-bias path.
    Cost: prod(input cards) x the mechanism's multiply-adds.
    """
    cards = scm.input_cards(i)
    logits = _plain_logits(scm.mechanisms[i], _all_configs(cards), cards)
    return np.argmax(logits, axis=1).reshape(cards if cards else ())


# ---------------------------------------------------------------------------------------------
# building
# ---------------------------------------------------------------------------------------------
def _depends_on_every_input(table: np.ndarray) -> bool:
    return all(bool(np.any(np.ptp(table, axis=a) > 0)) for a in range(table.ndim))


def _centre_output_bias(logits: np.ndarray, bias: np.ndarray) -> np.ndarray | None:
    """New output bias per the module's centring scheme, or None when the draw is degenerate."""
    bias = bias.copy()
    if logits.shape[1] == 2:
        d = np.sort(logits[:, 1] - logits[:, 0])
        n = d.size
        if n < 2:
            return None
        lo, hi = max(0, (n - 1) // 3), min(n - 2, (2 * n) // 3)
        if hi < lo:
            lo, hi = 0, n - 2
        gaps = d[lo + 1:hi + 2] - d[lo:hi + 1]
        k = lo + int(np.argmax(gaps))
        if d[k + 1] - d[k] <= 2 * _MIN_MARGIN * max(1.0, abs(d[k])):
            return None
        bias[1] -= 0.5 * (d[k] + d[k + 1])
        return bias
    return bias - logits.mean(axis=0)


def _draw_mechanism(cards: Sequence[int], hidden_width: int, depth: int, n_states: int,
                    seed: int, index: int) -> tuple[Mechanism, bool]:
    """Draw a non-degenerate mechanism (module docstring); returns (mechanism, passed_checks)."""
    n_in = int(sum(cards))
    n_configs = int(np.prod(cards, dtype=np.float64)) if cards else 1
    mech = None
    for attempt in range(_MAX_REDRAWS):
        rng = make_rng(seed, "mechanism", index, attempt)
        dims = [n_in] + [hidden_width] * depth + [n_states]
        # He initialisation for ReLU layers (common practice); small random biases
        weights = [rng.normal(0.0, math.sqrt(2.0 / max(1, dims[k])), size=(dims[k], dims[k + 1]))
                   for k in range(len(dims) - 1)]
        biases = [rng.normal(0.0, 0.1, size=dims[k + 1]) for k in range(len(dims) - 1)]
        mech = Mechanism(tuple(weights), tuple(biases))
        full = n_configs <= _TABLE_CHECK_LIMIT
        if full:
            configs = _all_configs(cards)
        else:
            configs = np.stack([rng.integers(0, c, size=_TABLE_CHECK_LIMIT) for c in cards], axis=1)
        logits = _plain_logits(mech, configs, cards)
        new_bias = _centre_output_bias(logits, biases[-1])
        if new_bias is None:
            continue
        biases[-1] = new_bias
        mech = Mechanism(tuple(weights), tuple(biases))
        logits = _plain_logits(mech, configs, cards)
        top2 = np.sort(logits, axis=1)[:, -2:]
        if np.min(top2[:, 1] - top2[:, 0]) < _MIN_MARGIN:
            continue
        out = np.argmax(logits, axis=1)
        if np.all(out == out[0]):
            continue
        if full and cards and not _depends_on_every_input(out.reshape(tuple(cards))):
            continue
        return mech, True
    return mech, False  # type: ignore[return-value]


def _random_probabilities(rng: np.random.Generator, k: int) -> np.ndarray:
    # bounded away from zero so that rejection sampling keeps an acceptance rate
    p = rng.uniform(0.2, 1.0, size=k)
    return p / p.sum()


def build_scm(graph: Any, *, hidden_width: int, depth: int = 1, n_states: int = 2,
              n_exogenous: int = 3, confounders: Sequence[tuple[str, str]] = (),
              confounder_states: int = 2, seed: int = 0, topology: str = "custom",
              name: str | None = None) -> NeuralSCM:
    """A neural SCM over a DAG with seeded random, non-degenerate MLP mechanisms.

    Parameters
    ----------
    graph
        A networkx DiGraph over the endogenous variables (node names become variable names).
    hidden_width, depth
        Units per hidden layer and number of hidden layers.
    n_states, n_exogenous, confounder_states
        States of each endogenous, own-exogenous and shared-exogenous variable.
    confounders
        Pairs of endogenous names that share one exogenous parent each.
    seed
        Seeds the probabilities and weights.

    Returns
    -------
    NeuralSCM

    Notes
    -----
    Cost: for each variable, up to 50 draws, each tabulated over min(prod(input cards), 4096)
    configurations: O(n x configs x multiply-adds).

    Examples
    --------
    >>> import networkx as nx
    >>> scm = build_scm(nx.DiGraph([("A", "B")]), hidden_width=4, seed=1)
    >>> scm.variables, len(scm.exogenous)
    (('A', 'B'), 2)
    """
    import networkx as nx

    for label, value, least in (("hidden_width", hidden_width, 1), ("depth", depth, 1),
                                ("n_states", n_states, 2), ("n_exogenous", n_exogenous, 1),
                                ("confounder_states", confounder_states, 1)):
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < least:
            raise InputError.at("neural_scm", label, f"an integer >= {least}", value)
    nodes = list(graph.nodes)
    if not nx.is_directed_acyclic_graph(graph):
        raise InputError("neural_scm: graph: expected a directed acyclic graph, got a cycle")
    position = {v: k for k, v in enumerate(nodes)}
    if any(position[a] > position[b] for a, b in graph.edges):
        nodes = list(nx.lexicographical_topological_sort(graph, key=lambda v: position[v]))
    names = tuple(str(v) for v in nodes)
    index = {v: k for k, v in enumerate(nodes)}
    parents = tuple(tuple(sorted(index[p] for p in graph.predecessors(v))) for v in nodes)
    rng = make_rng(seed, "exogenous")
    exo_names = [f"U_{v}" for v in names]
    exo_probs = [_random_probabilities(rng, n_exogenous) for _ in names]
    exo_inputs: list[list[int]] = [[k] for k in range(len(names))]
    for c, (a, b) in enumerate(confounders):
        j = len(exo_names)
        exo_names.append(f"C{c}")
        exo_probs.append(_random_probabilities(rng, confounder_states))
        for v in (a, b):
            if v not in index:
                raise InputError.at("neural_scm", "confounders", "pairs of graph nodes", v)
            exo_inputs[index[v]].append(j)
    states = tuple(tuple(str(s) for s in range(n_states)) for _ in names)
    mechanisms, n_bad = [], 0
    for k in range(len(names)):
        cards = tuple([n_states] * len(parents[k]) + [len(exo_probs[j]) for j in exo_inputs[k]])
        mech, ok = _draw_mechanism(cards, hidden_width, depth, n_states, seed, k)
        mechanisms.append(mech)
        n_bad += not ok
    return NeuralSCM(
        size=Size(graph=max(1, len(names)), mechanism=int(hidden_width)),
        topology=topology, seed=int(seed),
        name=name or f"neural_scm-{topology}-{len(names)}x{hidden_width}-s{seed}",
        variables=names, states=states, parents=parents, exogenous=tuple(exo_names),
        exogenous_probabilities=tuple(exo_probs),
        exogenous_inputs=tuple(tuple(x) for x in exo_inputs), mechanisms=tuple(mechanisms),
        meta={"n_degenerate_mechanisms": n_bad, "depth": depth,
              "confounders": [tuple(p) for p in confounders]})


# ---------------------------------------------------------------------------------------------
# query planning: which variables and exogenous inputs a query needs
# ---------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class _Plan:
    factual: tuple[int, ...]          # computed in the first pass (topological order)
    clamp: dict                       # constants in the first pass (interventional)
    recompute: tuple[int, ...]        # recomputed under the intervention (counterfactual)
    cf_clamp: dict
    exogenous: tuple[int, ...]
    multiply_adds: int                # per world
    log10_worlds: float
    target: tuple[tuple[int, int], ...]
    evidence: tuple[tuple[int, int], ...]
    level: Level


def _ancestral(scm: NeuralSCM, seeds: set[int], cut: set[int]) -> set[int]:
    out, stack = set(), list(seeds)
    while stack:
        v = stack.pop()
        if v in out:
            continue
        out.add(v)
        if v not in cut:
            stack.extend(scm.parents[v])
    return out


def _descendants(scm: NeuralSCM, roots: set[int]) -> set[int]:
    out, stack = set(), list(roots)
    while stack:
        v = stack.pop()
        for c in scm.children[v]:
            if c not in out:
                out.add(c)
                stack.append(c)
    return out


def _assignment(scm: NeuralSCM, pairs, what: str) -> tuple[tuple[int, int], ...]:
    out = []
    for name, value in pairs:
        i = scm.index(name)
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)) \
                or not 0 <= int(value) < scm.card(i):
            raise InputError.at(f"query {what}", name, f"a state index 0..{scm.card(i) - 1}", value)
        out.append((i, int(value)))
    return tuple(out)


def _cached(scm: NeuralSCM, kind: str, key: Any, make, *, max_bytes: int | None = None):
    """``make()`` memoised in ``scm``'s cache under ``(kind, key)``; no caching for unhashable
    keys. A kind holds at most 256 entries and, with ``max_bytes``, at most that many bytes of
    arrays (``nbytes`` of the entries): it is emptied when a new entry would pass either."""
    try:
        table = scm._cache.setdefault(kind, {})  # type: ignore[attr-defined]
        hit = table.get(key)
    except TypeError:
        return make()
    if hit is None:
        hit = make()
        size = hit.nbytes if max_bytes is not None else 0
        if max_bytes is not None and size > max_bytes:
            return hit
        used = sum(v.nbytes for v in table.values()) if max_bytes is not None else 0
        if len(table) >= 256 or (max_bytes is not None and used + size > max_bytes):
            table.clear()
        table[key] = hit
    return hit


def _plan(scm: NeuralSCM, query: Query, *, prune: bool = True) -> _Plan:
    """The query's plan (cached per query: planning is pure Python, ~20 us)."""
    return _cached(scm, "plan", (query, bool(prune)), lambda: _make_plan(scm, query, prune=prune))


def _make_plan(scm: NeuralSCM, query: Query, *, prune: bool = True) -> _Plan:
    if query.kind != "probability":
        raise UnsupportedQuery(f"neural_scm answers probability queries, not {query.kind!r}")
    target = _assignment(scm, query.target, "target")
    if not target:
        raise InputError.at("query", "target", "at least one variable", "none")
    evidence = _assignment(scm, query.evidence, "evidence")
    do = dict(_assignment(scm, query.intervention, "intervention"))
    everything = set(range(scm.n_variables))
    t_vars, e_vars = {i for i, _ in target}, {i for i, _ in evidence}
    if query.level is Level.COUNTERFACTUAL:
        x = set(do)
        strict = _descendants(scm, x) - x
        c = _ancestral(scm, t_vars, x) if prune else everything
        recompute = {v for v in c if v in strict}
        need = e_vars | {v for v in c if v not in strict and v not in x}
        factual = _ancestral(scm, need, set()) if prune else everything
        clamp: dict = {}
        cf_clamp = do
    else:
        factual = _ancestral(scm, t_vars | e_vars, set(do)) if prune else everything
        recompute, clamp, cf_clamp = set(), do, {}
    computed = [v for v in factual if v not in clamp] + list(recompute)
    exo = sorted({j for v in computed for j in scm.exogenous_inputs[v]})
    macs = sum(scm.mechanisms[v].multiply_adds for v in computed)
    return _Plan(tuple(sorted(factual)), clamp, tuple(sorted(recompute)), cf_clamp, tuple(exo),
                 int(macs), scm.log10_worlds(exo), target, evidence, query.level)


def _outcomes(scm: NeuralSCM, plan: _Plan, exo: dict[int, np.ndarray], m: int,
              scratch: _Scratch | None = None, codes: dict[int, np.ndarray] | None = None
              ) -> tuple[np.ndarray, np.ndarray]:
    """(evidence mask, target mask) over m worlds (``codes``: see :func:`_run_pass`)."""
    if scratch is None or scratch.m != m:
        scratch = _Scratch(m)
    values: dict[int, np.ndarray] = {}
    _run_pass(scm, plan.factual, values, exo, plan.clamp, m, scratch, codes)
    mask = _event(values, plan.evidence, m)
    if plan.level is Level.COUNTERFACTUAL:
        cf = dict(values)  # non-descendants of X keep their factual values
        for i, s in plan.cf_clamp.items():
            cf[i] = np.full(m, s, dtype=np.intp)
        _run_pass(scm, plan.recompute, cf, exo, {}, m, scratch, codes)
        values = cf
    return mask, _event(values, plan.target, m, within=mask)


def _event(values: dict[int, np.ndarray], pairs: Sequence[tuple[int, int]], m: int,
           within: np.ndarray | None = None) -> np.ndarray:
    """Boolean mask of the rows where every (variable, state) pair holds, and ``within``
    (never modified; returned itself when there are no pairs)."""
    out = within
    for i, s in pairs:
        eq = values[i] == s
        out = eq if out is None else np.logical_and(out, eq, out=eq)
    return np.ones(m, dtype=bool) if out is None else out


def _chunk_rows(scm: NeuralSCM, plan: _Plan) -> int:
    widths = [w.shape[1] for v in set(plan.factual) | set(plan.recompute)
              for w in scm.mechanisms[v].weights] or [1]
    inputs = [scm.mechanisms[v].n_inputs + 1 for v in set(plan.factual) | set(plan.recompute)] or [1]
    per_row = 8 * (len(plan.factual) + len(plan.recompute) + len(plan.exogenous)
                   + max(inputs) + 2 * max(widths) + 2)
    return int(min(1 << 16, max(256, _CHUNK_BYTES // per_row)))


def _world_split(cards: Sequence[int], rows: int) -> int:
    """First exogenous position of the trailing block enumerated inside one chunk."""
    split = len(cards)
    while split > 0 and math.prod(cards[split - 1:]) <= rows:
        split -= 1
    return split


@dataclass(frozen=True, eq=False)
class _Layout:
    """How the exact engine walks a plan's worlds: chunks follow the mixed radix, the trailing
    exogenous inputs are enumerated once (their values and weights repeat in every chunk of
    ``rows`` worlds); the leading ones are constant in a chunk."""

    n_worlds: int
    rows: int
    leading: tuple[int, ...]
    leading_cards: tuple[int, ...]
    trailing_values: dict
    trailing_codes: dict
    trailing_weights: np.ndarray

    @property
    def nbytes(self) -> int:
        arrays = [self.trailing_weights, *self.trailing_values.values(),
                  *self.trailing_codes.values()]
        return int(sum(a.nbytes for a in arrays))


def _enumeration_layout(scm: NeuralSCM, plan: _Plan) -> _Layout:
    """Cost: O(rows x trailing inputs); memory: the same, at most ``_chunk_rows`` rows."""
    cards = [scm.exogenous_card(j) for j in plan.exogenous]
    split = _world_split(cards, _chunk_rows(scm, plan))
    grid = _all_configs(cards[split:])
    values = {j: np.ascontiguousarray(grid[:, k]) for k, j in enumerate(plan.exogenous[split:])}
    weights = np.ones(grid.shape[0])
    for j, col in values.items():
        weights *= scm.exogenous_probabilities[j][col]
    # the one-hot codes of the trailing inputs, (states x rows), copied into each mechanism's
    # input matrix instead of compared again in every call
    codes = {j: (col == np.arange(scm.exogenous_card(j))[:, None]).astype(np.float64)
             for j, col in values.items()}
    return _Layout(int(math.prod(cards)), int(grid.shape[0]), tuple(plan.exogenous[:split]),
                   tuple(cards[:split]), values, codes, weights)


def enumeration_shapes(scm: NeuralSCM, query: Query, *, prune: bool = True
                       ) -> tuple[int, list[tuple[int, int, int]]]:
    """The matrix products the exact engine performs for ``query``, for benchmarks.

    Returns ``(n_chunks, shapes)``: every chunk of worlds multiplies, for each evaluated
    mechanism and layer, an (rows x k) by (k x n) pair of float64 matrices, listed in ``shapes``
    as ``(rows, k, n)`` (the first layer's k includes the folded bias column; the engine
    computes each product as its transpose, ``(n x k) @ (k x rows)``). Timing
    ``np.matmul`` on these shapes ``n_chunks`` times gives the machine's rate on the same work.
    """
    plan = _plan(scm, query, prune=prune)
    cards = [scm.exogenous_card(j) for j in plan.exogenous]
    split = _world_split(cards, _chunk_rows(scm, plan))
    rows = math.prod(cards[split:])
    n_chunks = math.prod(cards[:split])
    shapes = []
    for v in [v for v in plan.factual if v not in plan.clamp] + list(plan.recompute):
        mech = scm.mechanisms[v]
        shapes.append((rows,) + mech.folded.shape)
        shapes.extend((rows,) + w.shape for w in mech.weights[1:])
    return int(n_chunks), shapes


#: Below this linear-space evidence probability the exact engine re-enumerates in log space:
#: a world of weight < 1e-308 underflows to zero, which matters only when the worlds that
#: remain are not overwhelmingly heavier (at 1e-250 an underflowed world is < 1e-58 of them).
_LINEAR_DEN_MIN = 1e-250


def _chunks(layout: _Layout):
    """(leading states, exogenous values) of every chunk of ``layout.rows`` worlds: the
    trailing inputs enumerated once, the leading ones constant within a chunk."""
    m = layout.rows
    for lead in itertools.product(*map(range, layout.leading_cards)):
        exo = dict(layout.trailing_values)
        for j, u in zip(layout.leading, lead):
            exo[j] = np.full(m, u, dtype=np.intp)
        yield lead, exo


def _log_sum(logs: Sequence[float]) -> float:
    """ln sum exp(logs), -inf for none (or all -inf)."""
    top = max(logs, default=-math.inf)
    if top == -math.inf:
        return -math.inf
    return top + math.log(math.fsum(math.exp(x - top) for x in logs))


def _log_sum_where(log_w: np.ndarray, mask: np.ndarray) -> float:
    """ln sum of exp(log_w) over the rows where ``mask`` is nonzero; -inf when there are none."""
    sel = log_w[np.asarray(mask, dtype=bool)]
    if not sel.size:
        return -math.inf
    top = float(sel.max())
    if top == -math.inf:
        return -math.inf
    return top + float(np.log(np.sum(np.exp(sel - top))))


def _describe_zero(query: Query) -> str:
    ev = ", ".join(f"{v}={s}" for v, s in query.evidence) or "(none)"
    return f"evidence has probability zero: {ev} in {query.describe()}"


# ---------------------------------------------------------------------------------------------
# pgmpy reference (independent path)
# ---------------------------------------------------------------------------------------------
def _deterministic_cpt(table: np.ndarray, card: int) -> np.ndarray:
    """CPT of shape (card, *table.shape) with a one where the mechanism's output is."""
    cpt = np.zeros((card,) + table.shape)
    for s in range(card):
        cpt[s] = table == s
    return cpt


def to_bayesian_network(scm: NeuralSCM, intervention: dict | Sequence | None = None,
                        ) -> DiscreteNetwork:
    """The SCM as a discrete Bayesian network over U and V with deterministic CPTs.

    Parameters
    ----------
    scm
        The model.
    intervention
        ``{name: state index}`` (or pairs): those variables lose their parents and get a point
        mass at the given state (the mutilated model of do(X=x)).

    Returns
    -------
    DiscreteNetwork
        Exogenous roots first (state names "0".."k-1"), then the endogenous variables with
        parents (endogenous parents, own exogenous, shared exogenous).

    Notes
    -----
    Cost: sum over variables of prod(input cards) x multiply-adds (each mechanism tabulated).
    """
    do = dict(intervention.items() if isinstance(intervention, dict) else (intervention or ()))
    do_idx = dict(_assignment(scm, tuple(do.items()), "intervention"))
    variables = list(scm.exogenous)
    states: dict[str, tuple[str, ...]] = {}
    parents: dict[str, tuple[str, ...]] = {}
    cpts: dict[str, np.ndarray] = {}
    for j, u in enumerate(scm.exogenous):
        states[u] = tuple(str(k) for k in range(scm.exogenous_card(j)))
        parents[u] = ()
        cpts[u] = np.array(scm.exogenous_probabilities[j], dtype=float)
    for i, v in enumerate(scm.variables):
        variables.append(v)
        states[v] = scm.states[i]
        if i in do_idx:
            parents[v] = ()
            cpts[v] = np.eye(scm.card(i))[do_idx[i]]
            continue
        parents[v] = (tuple(scm.variables[p] for p in scm.parents[i]) +
                      tuple(scm.exogenous[j] for j in scm.exogenous_inputs[i]))
        cpts[v] = _deterministic_cpt(mechanism_table(scm, i), scm.card(i))
    return DiscreteNetwork(tuple(variables), states, parents, cpts, name=f"{scm.name} (as BN)")


#: Suffix of the counterfactual copies in :func:`twin_network`.
CF_SUFFIX = "*"


def twin_network(scm: NeuralSCM, intervention: dict | Sequence) -> DiscreteNetwork:
    """The twin network of Balke & Pearl (1994) for do(intervention).

    Shared exogenous roots; the factual copy of every endogenous variable (its own name) and a
    counterfactual copy (name + ``"*"``) whose parents are the counterfactual copies of its
    endogenous parents and the same exogenous variables; the counterfactual copies of the
    intervened variables are cut from their parents and clamped. P(Y_x=y | e) is
    P(Y*=y | e) in this network.

    Cost: twice that of :func:`to_bayesian_network`.
    """
    do = dict(intervention.items() if isinstance(intervention, dict) else intervention)
    do_idx = dict(_assignment(scm, tuple(do.items()), "intervention"))
    base = to_bayesian_network(scm)
    variables = list(base.variables)
    states, parents, cpts = dict(base.states), dict(base.parents), dict(base.cpts)
    endo = set(scm.variables)
    for i, v in enumerate(scm.variables):
        w = v + CF_SUFFIX
        variables.append(w)
        states[w] = scm.states[i]
        if i in do_idx:
            parents[w] = ()
            cpts[w] = np.eye(scm.card(i))[do_idx[i]]
        else:
            parents[w] = tuple(p + CF_SUFFIX if p in endo else p for p in base.parents[v])
            cpts[w] = base.cpts[v]
    return DiscreteNetwork(tuple(variables), states, parents, cpts,
                           name=f"{scm.name} (twin network)")


def _to_pgmpy(network: DiscreteNetwork):
    """A pgmpy DiscreteBayesianNetwork for a DiscreteNetwork (private; pgmpy imported here)."""
    from pgmpy.factors.discrete import TabularCPD
    from pgmpy.models import DiscreteBayesianNetwork

    model = DiscreteBayesianNetwork()
    model.add_nodes_from(network.variables)
    model.add_edges_from((p, v) for v in network.variables for p in network.parents[v])
    cpds = []
    for v in network.variables:
        ps = network.parents[v]
        table = np.asarray(network.cpts[v], dtype=float)
        card = network.card(v)
        names = {v: list(network.states[v])}
        names.update({p: list(network.states[p]) for p in ps})
        cpds.append(TabularCPD(v, card, table.reshape(card, -1),
                               evidence=list(ps) or None,
                               evidence_card=[network.card(p) for p in ps] or None,
                               state_names=names))
    model.add_cpds(*cpds)
    return model


def _pgmpy_probability(network: DiscreteNetwork, target: dict[str, str],
                       evidence: dict[str, str]) -> float:
    import warnings

    from pgmpy.inference import VariableElimination

    clash = [v for v in target if v in evidence]
    for v in clash:
        if target[v] != evidence[v]:
            return 0.0
    target = {v: s for v, s in target.items() if v not in evidence}
    if not target:
        return 1.0
    model = _to_pgmpy(network)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        factor = VariableElimination(model).query(variables=list(target), evidence=evidence or None,
                                                  joint=True, show_progress=False)
        value = float(factor.get_value(**target))
    if not math.isfinite(value):
        raise ModelError("evidence has probability zero (pgmpy reference returned NaN)")
    return value


# ---------------------------------------------------------------------------------------------
# JSON format
# ---------------------------------------------------------------------------------------------
def to_dict(scm: NeuralSCM, *, arrays: dict[str, np.ndarray] | None = None) -> dict:
    """The JSON document of ``scm``; with ``arrays`` given, weights go there by name instead."""
    conf_children: dict[int, list[str]] = {}
    variables = []
    n_own = scm.n_variables
    for i, v in enumerate(scm.variables):
        layers = []
        mech = scm.mechanisms[i]
        for k, (w, b) in enumerate(zip(mech.weights, mech.biases)):
            if arrays is not None:
                kw, kb = f"{v}.layer{k}.weights", f"{v}.layer{k}.bias"
                arrays[kw], arrays[kb] = w, b
                layers.append({"weights": kw, "bias": kb})
            else:
                layers.append({"weights": w.tolist(), "bias": b.tolist()})
        own, shared = scm.exogenous_inputs[i][0], scm.exogenous_inputs[i][1:]
        for j in shared:
            conf_children.setdefault(j, []).append(v)
        variables.append({
            "name": v, "states": list(scm.states[i]),
            "parents": [scm.variables[p] for p in scm.parents[i]],
            "exogenous": {"name": scm.exogenous[own],
                          "probabilities": scm.exogenous_probabilities[own].tolist()},
            "shared_exogenous": [scm.exogenous[j] for j in shared],
            "mechanism": {"layers": layers}})
    confounders = [{"name": scm.exogenous[j], "probabilities": scm.exogenous_probabilities[j].tolist(),
                    "children": conf_children.get(j, [])}
                   for j in range(n_own, len(scm.exogenous))]
    return {"family": "neural_scm", "format_version": FORMAT_VERSION, "name": scm.name,
            "topology": scm.topology, "seed": scm.seed,
            "variables": variables, "confounders": confounders}


def _expect(cond: bool, where: str, fld: str, expected: str, got: object) -> None:
    if not cond:
        raise InputError.at(where, fld, expected, got)


def _short(value: object) -> object:
    text = repr(value)
    return value if len(text) <= 60 else text[:57] + "..."


def _probabilities(value: object, where: str, fld: str) -> np.ndarray:
    try:
        p = np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        raise InputError.at(where, fld, "a list of probabilities", _short(value)) from None
    _expect(p.ndim == 1 and p.size >= 1, where, fld, "a non-empty list of probabilities", _short(value))
    _expect(bool(np.all(np.isfinite(p))) and bool(np.all(p >= 0)), where, fld,
            "finite probabilities >= 0", _short(value))
    _expect(abs(float(p.sum()) - 1.0) <= 1e-6, where, fld, "probabilities summing to 1 (tolerance 1e-6)",
            float(p.sum()))
    return p / p.sum()


def _array(value: object, where: str, fld: str, npz, ndim: int) -> np.ndarray:
    if isinstance(value, str):
        if npz is None:
            raise InputError.at(where, fld, "nested lists (no weights_file is given)", value)
        if value not in npz.files:
            raise InputError.at(where, fld, "the name of an array in weights_file", value)
        try:
            a = np.asarray(npz[value])
        except (OSError, ValueError, EOFError, zipfile.BadZipFile) as exc:
            raise InputError(f"{where}: {fld}: cannot read array {value!r} ({exc})") from exc
    else:
        try:
            a = np.asarray(value, dtype=float)
        except (TypeError, ValueError):
            raise InputError.at(where, fld, f"a {ndim}-d numeric array (nested lists)", _short(value)) from None
    _expect(a.ndim == ndim and a.dtype.kind in "fiu", where, fld,
            f"a {ndim}-d numeric array", f"shape {a.shape}, dtype {a.dtype}")
    a = a.astype(float)
    _expect(bool(np.all(np.isfinite(a))), where, fld, "finite numbers", "NaN or infinity")
    return a


def from_dict(doc: object, *, where: str = "neural_scm", base_dir: pathlib.Path | None = None,
              name: str | None = None) -> NeuralSCM:
    """Parse and validate a neural SCM document (the JSON format in the module docstring).

    Raises
    ------
    InputError
        One line naming ``where`` and the field, what was expected and what arrived.
    """
    if not isinstance(doc, dict):
        raise InputError.at(where, None, "a JSON object", type(doc).__name__)
    _expect(doc.get("family") == "neural_scm", where, "family", "'neural_scm'", doc.get("family"))
    _expect(type(doc.get("format_version")) is int and doc.get("format_version") == FORMAT_VERSION, where, "format_version", str(FORMAT_VERSION),
            doc.get("format_version"))
    npz = None
    if doc.get("weights_file") is not None:
        wf = doc["weights_file"]
        _expect(isinstance(wf, str) and wf != "", where, "weights_file", "a file name", wf)
        path = (base_dir or pathlib.Path(".")) / wf
        try:
            npz = np.load(path, allow_pickle=False)
        except (OSError, ValueError, EOFError, zipfile.BadZipFile) as exc:
            raise InputError(f"{where}: weights_file: cannot read {str(path)!r} as .npz ({exc})") from exc
        if not isinstance(npz, np.lib.npyio.NpzFile):
            raise InputError.at(where, "weights_file", "an .npz archive of named arrays",
                                f"a single array in {str(path)!r}")
    variables = doc.get("variables")
    _expect(isinstance(variables, list) and len(variables) >= 1, where, "variables",
            "a non-empty list", _short(variables))
    conf = doc.get("confounders", [])
    _expect(isinstance(conf, list), where, "confounders", "a list", _short(conf))
    names: list[str] = []
    for k, var in enumerate(variables):
        _expect(isinstance(var, dict), where, f"variables[{k}]", "an object", _short(var))
        _expect(isinstance(var.get("name"), str) and var.get("name") != "", where,
                f"variables[{k}].name", "a non-empty string", var.get("name"))
        _expect(var["name"] not in names, where, f"variables[{k}].name", "a unique name", var["name"])
        names.append(var["name"])
    index = {v: k for k, v in enumerate(names)}
    exo_names = [None] * len(names)
    exo_probs: list[np.ndarray] = [np.zeros(0)] * len(names)
    conf_index: dict[str, int] = {}
    conf_names, conf_probs = [], []
    for k, c in enumerate(conf):
        f = f"confounders[{k}]"
        _expect(isinstance(c, dict), where, f, "an object", _short(c))
        _expect(isinstance(c.get("name"), str) and c.get("name") not in conf_index
                and c.get("name") not in index, where, f + ".name", "a new unique name", c.get("name"))
        conf_index[c["name"]] = len(names) + k
        conf_names.append(c["name"])
        conf_probs.append(_probabilities(c.get("probabilities"), where, f + ".probabilities"))
    states, parents, exo_inputs, mechanisms = [], [], [], []
    for k, var in enumerate(variables):
        f = f"variables[{k}] ({var['name']})"
        st = var.get("states", ["0", "1"])
        _expect(isinstance(st, list) and len(st) >= 2 and len(set(map(str, st))) == len(st), where,
                f + ".states", "a list of at least 2 distinct state names", _short(st))
        states.append(tuple(str(s) for s in st))
        ps = var.get("parents", [])
        _expect(isinstance(ps, list) and all(isinstance(p, str) for p in ps), where, f + ".parents",
                "a list of variable names", _short(ps))
        for p in ps:
            _expect(p in index and index[p] < k, where, f + ".parents",
                    "names of variables listed before this one (topological order)", p)
        _expect(len(set(ps)) == len(ps), where, f + ".parents", "distinct names", ps)
        parents.append(tuple(index[p] for p in ps))
        ex = var.get("exogenous")
        _expect(isinstance(ex, dict), where, f + ".exogenous", "an object with name and probabilities",
                _short(ex))
        _expect(isinstance(ex.get("name"), str) and ex.get("name") not in conf_index
                and ex.get("name") not in exo_names and ex.get("name") not in index,
                where, f + ".exogenous.name", "a new unique name", ex.get("name"))
        exo_names[k] = ex["name"]
        exo_probs[k] = _probabilities(ex.get("probabilities"), where, f + ".exogenous.probabilities")
        shared = var.get("shared_exogenous", [])
        _expect(isinstance(shared, list) and all(isinstance(s, str) and s in conf_index for s in shared)
                and len(set(shared)) == len(shared), where, f + ".shared_exogenous",
                "distinct names from 'confounders'", _short(shared))
        exo_inputs.append((k,) + tuple(conf_index[s] for s in shared))
    all_probs = exo_probs + conf_probs
    for k, var in enumerate(variables):
        f = f"variables[{k}] ({var['name']}).mechanism"
        mech = var.get("mechanism")
        _expect(isinstance(mech, dict) and isinstance(mech.get("layers"), list)
                and len(mech["layers"]) >= 1, where, f + ".layers", "a non-empty list of layers",
                _short(mech))
        cards = [len(states[p]) for p in parents[k]] + [all_probs[j].size for j in exo_inputs[k]]
        n_in = int(sum(cards))
        ws, bs = [], []
        for L, layer in enumerate(mech["layers"]):
            g = f"{f}.layers[{L}]"
            _expect(isinstance(layer, dict), where, g, "an object with weights and bias", _short(layer))
            w = _array(layer.get("weights"), where, g + ".weights", npz, 2)
            b = _array(layer.get("bias"), where, g + ".bias", npz, 1)
            want_in = n_in if L == 0 else ws[-1].shape[1]
            _expect(w.shape[0] == want_in, where, g + ".weights",
                    f"{want_in} rows (the {'one-hot input width' if L == 0 else 'previous layer width'})",
                    f"{w.shape[0]} rows")
            _expect(b.shape[0] == w.shape[1], where, g + ".bias", f"{w.shape[1]} entries",
                    f"{b.shape[0]} entries")
            ws.append(w)
            bs.append(b)
        _expect(ws[-1].shape[1] == len(states[k]), where, f"{f}.layers[{len(ws) - 1}].weights",
                f"{len(states[k])} columns (one per state)", f"{ws[-1].shape[1]} columns")
        mechanisms.append(Mechanism(tuple(ws), tuple(bs)))
    width = max((w.shape[1] for m in mechanisms for w in m.weights[:-1]), default=1)
    depth = max(len(m.weights) - 1 for m in mechanisms)
    pairs = []
    for j in range(len(conf_names)):
        kids = [names[k] for k in range(len(names)) if len(names) + j in exo_inputs[k]]
        pairs.append(tuple(kids))
    seed = doc.get("seed", 0)
    return NeuralSCM(
        size=Size(graph=len(names), mechanism=int(max(1, width))),
        topology=str(doc.get("topology", "file")), seed=int(seed) if isinstance(seed, int) else 0,
        name=name or str(doc.get("name", where)), variables=tuple(names), states=tuple(states),
        parents=tuple(parents), exogenous=tuple(exo_names) + tuple(conf_names),
        exogenous_probabilities=tuple(all_probs), exogenous_inputs=tuple(exo_inputs),
        mechanisms=tuple(mechanisms),
        meta={"n_degenerate_mechanisms": 0, "depth": depth, "confounders": pairs})


# ---------------------------------------------------------------------------------------------
# the family
# ---------------------------------------------------------------------------------------------
_DEFAULTS: dict[str, Any] = {
    "n_states": 2, "n_exogenous": 3, "depth": 1, "max_in_degree": 3, "n_confounders": None,
    "confounder_states": 2, "n_samples": 2000, "seed": 0, "max_worlds": MAX_WORLDS,
    "reference_max_variables": 12, "min_evidence_frequency": 0.05, "prune": True,
    "target_choice": "any",
}


@register
class NeuralSCMFamily(FamilyBase):
    """Neural SCMs: discrete endogenous variables, finite exogenous ones, MLP mechanisms.

    Parameters (keywords, stored only)
    ----------------------------------
    n_states : int, default 2
        States of each endogenous variable.
    n_exogenous : int, default 3
        Support size of each variable's own exogenous variable.
    depth : int, default 1
        Hidden layers per mechanism.
    max_in_degree : int, default 3
        Passed to the graph generator.
    n_confounders : int or None
        Shared exogenous variables (each feeding a random pair); None: ``n // 5`` (at least 1) on
        the ``random`` topology, 0 elsewhere.
    confounder_states : int, default 2
    n_samples : int, default 2000
        Monte Carlo draws of the sampling engine.
    seed : int, default 0
        Seed of the sampling streams.
    max_worlds : int, default 2**30
        Exact enumeration beyond this many exogenous worlds raises ModelError.
    reference_max_variables : int, default 12
        Endogenous variables above which :meth:`reference` returns None.
    min_evidence_frequency : float, default 0.05
        Generated evidence is kept when at least this fraction of simulated worlds matches it.
    prune : bool, default True
        Restrict engines to the query's ancestral set (exact answers are unchanged).
    target_choice : {"any", "last"}, default "any"
        ``"last"`` asks every generated query about the last variable in topological order (the
        one farthest downstream, whose ancestral set is largest) and intervenes on the first
        variable that has children, so that cost along a growth curve is not blurred by where a
        random target or intervention happened to fall; ``"any"`` draws targets from the second
        half of the order and interventions at random.
    """

    name = "neural_scm"
    levels = frozenset({Level.ASSOCIATIONAL, Level.INTERVENTIONAL, Level.COUNTERFACTUAL})
    methods = frozenset({"exact", "sampling"})
    mechanism_knob = "hidden width"
    work_unit = "multiply-adds"

    def _p(self, key: str) -> Any:
        return self.params.get(key, _DEFAULTS[key])

    def _target_choice(self) -> str:
        choice = self._p("target_choice")
        if choice not in ("any", "last"):
            raise InputError.at("neural_scm", "target_choice", "'any' or 'last'", choice)
        return choice

    # -- building ---------------------------------------------------------------------------
    def realizable(self, size: Size, *, topology: str) -> Size:
        """The size the graph generator really builds (a k x k grid for ``grid``)."""
        from model_zoo.topologies import realizable_graph_size

        self.check_topology(topology)
        return Size(graph=int(realizable_graph_size(topology, size.graph)), mechanism=size.mechanism)

    def build(self, size: Size, *, topology: str, seed: int) -> NeuralSCM:
        """A seeded instance: graph from :func:`model_zoo.topologies.make_graph`, then
        :func:`build_scm` with ``hidden_width = size.mechanism``.

        Cost: O(n x configs x multiply-adds) (see :func:`build_scm`).
        """
        from model_zoo.topologies import make_graph

        self.check_topology(topology)
        n = int(size.graph)
        graph = make_graph(topology, n, seed=seed, max_in_degree=int(self._p("max_in_degree")))
        n_conf = self._p("n_confounders")
        if n_conf is None:
            n_conf = max(1, n // 5) if topology == "random" and n >= 2 else 0
        nodes = list(graph.nodes)
        rng = make_rng(seed, "confounders")
        pairs = []
        for _ in range(int(n_conf) if len(nodes) >= 2 else 0):
            a, b = rng.choice(len(nodes), size=2, replace=False)
            a, b = sorted((int(a), int(b)))
            pairs.append((nodes[a], nodes[b]))
        return build_scm(graph, hidden_width=int(size.mechanism), depth=int(self._p("depth")),
                         n_states=int(self._p("n_states")), n_exogenous=int(self._p("n_exogenous")),
                         confounders=pairs, confounder_states=int(self._p("confounder_states")),
                         seed=int(seed), topology=topology)

    # -- queries ----------------------------------------------------------------------------
    def queries(self, instance: NeuralSCM, level: Level, *, n: int, seed: int) -> list[Query]:
        """Random queries whose evidence is possible and likely enough for rejection sampling.

        Evidence values are read off worlds simulated from the model (so every evidence has
        positive probability), and kept when at least ``min_evidence_frequency`` of 256 simulated
        worlds agree with them (fewer evidence variables are tried otherwise). Targets are drawn
        from the second half of the topological order (descendants of the intervened variable
        when there are any). Counterfactual evidence is the factual world on the intervened
        variable, the target, and sometimes one more variable, e.g. P(Y_{X=1}=1 | X=0, Y=0).

        Cost: O(256 x total multiply-adds) per distinct intervention, plus O(n) draws.
        """
        level = self.check_level(level)
        scm = instance
        rng = make_rng(seed, "neural_scm-queries", level.value)
        nv = scm.n_variables
        min_freq = float(self._p("min_evidence_frequency"))
        pools: dict[tuple, np.ndarray] = {}

        def pool(do: tuple) -> np.ndarray:
            if do not in pools:
                pools[do] = simulate(scm, 256, seed=make_rng(seed, "neural_scm-pool", *[x for p in do for x in p]),
                                     intervention=dict(do))
            return pools[do]

        late = list(range(nv // 2, nv)) or [0]
        last_only = self._target_choice() == "last"
        has_children = [i for i in range(nv) if scm.children[i]]
        out: list[Query] = []
        for _ in range(n):
            do: tuple = ()
            if level is not Level.ASSOCIATIONAL:
                xi = int(rng.choice(has_children)) if has_children else int(rng.integers(nv))
                if last_only and has_children:
                    xi = has_children[0]  # upstream-most: its cut decides the ancestral set
                do = ((xi, int(rng.integers(scm.card(xi)))),)
                desc = sorted(_descendants(scm, {xi}))
                late_desc = [d for d in desc if d >= nv // 2] or desc
                candidates = late_desc or [v for v in late if v != xi] or [xi]
            else:
                candidates = late
            yi = int(rng.choice(candidates))
            if last_only and (nv - 1) in candidates:
                yi = nv - 1
            y_state = int(rng.integers(scm.card(yi)))
            if level is Level.COUNTERFACTUAL:
                fact = pool(())
                row = fact[int(rng.integers(fact.shape[0]))]
                xi = do[0][0]
                x_fact = int(row[xi])
                if scm.card(xi) > 1:  # the hypothetical value differs from the factual one
                    others = [s for s in range(scm.card(xi)) if s != x_fact]
                    do = ((xi, int(rng.choice(others))),)
                ev_vars = [xi] + ([yi] if yi != xi else [])
                extra = [v for v in range(nv) if v not in ev_vars]
                if extra and rng.random() < 0.5:
                    ev_vars.append(int(rng.choice(extra)))
                ev_vars = self._thin(fact, row, ev_vars, min_freq, keep=1)
                evidence = tuple((scm.variables[v], int(row[v])) for v in ev_vars)
            else:
                world = pool(do)
                row = world[int(rng.integers(world.shape[0]))]
                banned = {yi} | {i for i, _ in do}
                others = [v for v in range(nv) if v not in banned]
                k = int(rng.integers(0, 3 if level is Level.ASSOCIATIONAL else 2))
                k = min(k, len(others))
                ev_vars = [int(v) for v in rng.choice(others, size=k, replace=False)] if k else []
                ev_vars = self._thin(world, row, ev_vars, min_freq, keep=0)
                evidence = tuple((scm.variables[v], int(row[v])) for v in ev_vars)
            out.append(Query(level=level, target=((scm.variables[yi], y_state),), evidence=evidence,
                             intervention=tuple((scm.variables[i], s) for i, s in do)))
        return out

    @staticmethod
    def _thin(world: np.ndarray, row: np.ndarray, ev_vars: list[int], min_freq: float,
              *, keep: int) -> list[int]:
        """Drop evidence variables from the end until the simulated frequency is high enough."""
        ev = list(ev_vars)
        while len(ev) > keep:
            freq = float(np.mean(np.all(world[:, ev] == row[ev], axis=1))) if ev else 1.0
            if freq >= min_freq:
                break
            ev.pop()
        return ev

    # -- engines ----------------------------------------------------------------------------
    def answer(self, instance: NeuralSCM, query: Query, *, method: str) -> Answer:
        """P(target | evidence) at the query's level, exactly or by rejection sampling.

        Raises
        ------
        ModelError
            Evidence of probability zero (exact), no accepted sample (sampling), or an exogenous
            space beyond ``max_worlds`` (exact).

        Notes
        -----
        Cost: exact ``worlds x multiply-adds`` of the query's plan (see :meth:`predicted_work`);
        sampling ``n_samples x`` the same. Memory: one chunk of worlds (<= 32 MiB of arrays).
        """
        self.check_method(method)
        self.check_level(query.level)
        plan = _plan(instance, query, prune=bool(self._p("prune")))
        if method == "exact":
            return self._exact(instance, query, plan)
        return self._sampling(instance, query, plan)

    def _exact(self, scm: NeuralSCM, query: Query, plan: _Plan) -> Answer:
        limit = int(self._p("max_worlds"))
        if plan.log10_worlds > math.log10(limit) + 1e-12:
            raise ModelError(
                f"exact enumeration needs 10^{plan.log10_worlds:.1f} exogenous worlds, beyond "
                f"max_worlds={limit} for {query.describe()} on {scm.name}; use method 'sampling'")
        # Keyed by structure (which exogenous variables, how many rows per chunk), not by the
        # query: the layout holds no evidence, so queries of one shape share it, as bayesnet's
        # plans are shared per query shape.
        layout = _cached(scm, "layout", (tuple(plan.exogenous), _chunk_rows(scm, plan)),
                         lambda: _enumeration_layout(scm, plan), max_bytes=_LAYOUT_CACHE_BYTES)
        m = layout.rows
        scratch = _borrow_scratch(scm, m)
        num = den = 0.0
        probs = scm.exogenous_probabilities
        for lead, exo in _chunks(layout):
            scale = math.prod(float(probs[j][u]) for j, u in zip(layout.leading, lead))
            mask, hit = _outcomes(scm, plan, exo, m, scratch, layout.trailing_codes)
            den += scale * float(np.dot(layout.trailing_weights, mask))
            num += scale * float(np.dot(layout.trailing_weights, hit))
        n_worlds = layout.n_worlds
        work = float(n_worlds) * plan.multiply_adds
        if den < _LINEAR_DEN_MIN:
            # The evidence's probability is near or below what doubles hold: worlds consistent
            # with it may have underflowed to zero weight. Enumerate again in log space (the
            # exact weights of every world, however small); a second pass only in this case.
            log_num, log_den = self._exact_log_space(scm, plan, layout, scratch)
            _return_scratch(scm, scratch)
            if log_den == -math.inf:
                raise ModelError(_describe_zero(query))
            return Answer(value=min(1.0, math.exp(log_num - log_den)), work=2.0 * work,
                          note=f"{n_worlds} worlds, twice (log space: P(evidence) = "
                               f"exp({log_den:.1f}))")
        _return_scratch(scm, scratch)
        return Answer(value=min(1.0, num / den), work=work, note=f"{n_worlds} worlds")

    @staticmethod
    def _exact_log_space(scm: NeuralSCM, plan: _Plan, layout: _Layout, scratch: Any
                         ) -> tuple[float, float]:
        """(ln numerator, ln denominator) of the exact conditional, every world weighted by
        ln P(u) (sums of logs, never underflowing) and summed by log-sum-exp per chunk.
        Same cost as the linear pass plus O(worlds) exp/log; -inf when no world counts."""
        with np.errstate(divide="ignore"):
            log_p = [np.log(np.asarray(p, dtype=np.float64)) for p in scm.exogenous_probabilities]
        m = layout.rows
        log_tw = np.zeros(m)
        for j, col in layout.trailing_values.items():
            log_tw += log_p[j][col]
        nums, dens = [], []
        for lead, exo in _chunks(layout):
            log_scale = math.fsum(float(log_p[j][u]) for j, u in zip(layout.leading, lead))
            if log_scale == -math.inf:
                continue
            mask, hit = _outcomes(scm, plan, exo, m, scratch, layout.trailing_codes)
            dens.append(log_scale + _log_sum_where(log_tw, mask))
            nums.append(log_scale + _log_sum_where(log_tw, hit))
        return _log_sum(nums), _log_sum(dens)

    def _sampling(self, scm: NeuralSCM, query: Query, plan: _Plan) -> Answer:
        n = self._p("n_samples")
        if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < 1:
            raise InputError.at("neural_scm", "n_samples", "an integer >= 1", n)
        n = int(n)
        rng = make_rng(int(self._p("seed")), "sampling", zlib.crc32(query.describe().encode()))
        rows = _chunk_rows(scm, plan)
        n_acc = n_hit = 0
        scratch = _Scratch(min(rows, n))
        for start in range(0, n, rows):
            m = min(rows, n - start)
            exo = _sample_exogenous(scm, plan.exogenous, m, rng)
            mask, hit = _outcomes(scm, plan, exo, m, scratch)
            n_acc += int(mask.sum())
            n_hit += int(hit.sum())
        if n_acc == 0:
            raise ModelError(f"no sample matched the evidence (0 of {n} accepted) for "
                             f"{query.describe()} on {scm.name}; the evidence is improbable or "
                             "impossible — raise n_samples or use method 'exact'")
        p = n_hit / n_acc
        # Agresti-Coull: add two successes and two failures, so p=0 or 1 keeps an uncertainty
        pt = (n_hit + 2) / (n_acc + 4)
        stderr = math.sqrt(pt * (1 - pt) / (n_acc + 4))
        return Answer(value=p, work=float(n) * plan.multiply_adds, stderr=stderr, is_exact=False,
                      n_accepted=n_acc, note=f"{n_acc} of {n} samples accepted")

    def reference(self, instance: NeuralSCM, query: Query) -> float | None:
        """pgmpy variable elimination on the deterministic-CPT network (associational,
        interventional: the mutilated network) or on the twin network (counterfactual).
        None above ``reference_max_variables`` endogenous variables or 200,000 CPT entries."""
        scm = instance
        self.check_level(query.level)
        _plan(scm, query)  # validates names and values
        if scm.n_variables > int(self._p("reference_max_variables")):
            return None
        entries = sum(np.prod(scm.input_cards(i), dtype=np.float64) * scm.card(i)
                      for i in range(scm.n_variables))
        if entries * (2 if query.level is Level.COUNTERFACTUAL else 1) > _REFERENCE_MAX_ENTRIES:
            return None

        def named(pairs, suffix: str = "") -> dict[str, str]:
            return {v + suffix: scm.states[scm.index(v)][int(s)] for v, s in pairs}

        if query.level is Level.COUNTERFACTUAL:
            net = twin_network(scm, dict(query.intervention))
            return _pgmpy_probability(net, named(query.target, CF_SUFFIX), named(query.evidence))
        net = to_bayesian_network(scm, dict(query.intervention) or None)
        return _pgmpy_probability(net, named(query.target), named(query.evidence))

    # -- structure and cost -----------------------------------------------------------------
    def profile(self, instance: NeuralSCM) -> dict[str, float]:
        """Structural profile: sizes of the graph, the mechanisms and the exogenous space."""
        scm = instance
        n_edges = sum(len(p) for p in scm.parents)
        log10w = scm.log10_worlds()
        worlds = 10.0 ** log10w if log10w < 300 else math.inf
        macs = sum(m.multiply_adds for m in scm.mechanisms)
        hidden = [w.shape[1] for m in scm.mechanisms for w in m.weights[:-1]]
        return {
            "n_variables": float(scm.n_variables),
            "n_edges": float(n_edges),
            "n_exogenous": float(len(scm.exogenous)),
            "n_confounders": float(len(scm.exogenous) - scm.n_variables),
            "n_exogenous_edges": float(sum(len(x) for x in scm.exogenous_inputs)),
            "n_parameters": float(sum(m.n_parameters for m in scm.mechanisms)
                                  + sum(p.size for p in scm.exogenous_probabilities)),
            "n_exogenous_worlds": worlds,
            "log10_exogenous_worlds": log10w,
            "mechanism_multiply_adds": float(macs),
            "max_in_degree": float(max((len(p) for p in scm.parents), default=0)),
            "depth": float(max(len(m.weights) - 1 for m in scm.mechanisms)),
            "hidden_width": float(max(hidden, default=0)),
            "max_states": float(max(scm.card(i) for i in range(scm.n_variables))),
            "n_levels": float(len(self.levels)),
            "n_degenerate_mechanisms": float(scm.meta.get("n_degenerate_mechanisms", 0)),
        }

    def predicted_work(self, instance: NeuralSCM, query: Query, *, method: str) -> float:
        """worlds x multiply-adds (exact) or n_samples x multiply-adds (sampling), where the
        worlds are the product of the supports of the exogenous inputs of the query's plan and
        the multiply-adds those of the mechanisms it evaluates; equals ``Answer.work``.
        May be ``inf`` when the world count overflows a float."""
        self.check_method(method)
        plan = _plan(instance, query, prune=bool(self._p("prune")))
        if method == "sampling":
            return float(int(self._p("n_samples")) * plan.multiply_adds)
        log_work = plan.log10_worlds + math.log10(max(1, plan.multiply_adds))
        if log_work > 300:
            return math.inf
        cards = [instance.exogenous_card(j) for j in plan.exogenous]
        return float(math.prod(cards)) * plan.multiply_adds

    def predicted_bytes(self, instance: NeuralSCM, query: Query, *, method: str) -> float | None:
        """Arrays of one chunk of worlds (or samples) plus the weights; bounded by the chunk.

        Per row: the values of the evaluated variables and the exogenous inputs, one work buffer
        per distinct input width, two per distinct hidden width and one for the logits
        (:class:`_Scratch`), and for exact the cached layout (values, one-hot codes, weight)."""
        self.check_method(method)
        scm = instance
        plan = _plan(scm, query, prune=bool(self._p("prune")))
        used = set(plan.factual) | set(plan.recompute)
        rows = _chunk_rows(scm, plan)
        if method == "exact":
            rows = min(rows, int(10 ** min(plan.log10_worlds, 18)))
        else:
            rows = min(rows, int(self._p("n_samples")))
        hidden = {w.shape[1] for v in used for w in scm.mechanisms[v].weights[:-1]}
        outputs = [scm.mechanisms[v].n_outputs for v in used] or [1]
        inputs = {scm.mechanisms[v].n_inputs + 1 for v in used} or {1}
        per_row = 8 * (2 * len(used) + len(plan.exogenous) + sum(inputs) + 2 * sum(hidden)
                       + max(outputs) + 4)
        if method == "exact":
            per_row += 8 * sum(1 + scm.exogenous_card(j) for j in plan.exogenous)
        weights = 8 * sum(scm.mechanisms[v].n_parameters for v in used)
        return float(rows * per_row + weights)

    def expected_growth(self, *, axis: str, topology: str, level: Level, method: str) -> str | None:
        """What the cost formula implies.

        Exact on the graph axis: exponential, because the enumerated worlds are the product of the
        exogenous supports of the query's ancestral set, which grows linearly with n on chain,
        grid and layered graphs (sublinearly on ``random``, whose parents are drawn from all
        earlier nodes: there the growth is stretched-exponential, still faster than any
        polynomial); on ``tree`` (edges point from the root down, so a node's ancestors are its
        path to the root, of length ~log2 n) the worlds are ~n_exogenous^log2(n), a polynomial,
        as long as ``prune`` is on. The mechanism axis is polynomial for both
        engines (hidden width^2 per hidden layer, width per input/output layer); sampling is
        polynomial on the graph axis (n_samples x multiply-adds of the ancestral set).
        """
        if axis == "graph" and method == "exact":
            if topology == "tree" and bool(self._p("prune")):
                return "polynomial"
            return "exponential"
        if axis in ("graph", "mechanism"):
            return "polynomial"
        return None

    # -- files ------------------------------------------------------------------------------
    def load(self, source: str | pathlib.Path) -> NeuralSCM:
        """Read our JSON format (module docstring); bad files raise InputError naming the field."""
        path = pathlib.Path(source)
        try:
            text = path.read_text(encoding="utf-8")
        except (OSError, UnicodeDecodeError) as exc:
            raise InputError(f"{path}: cannot read ({exc})") from exc
        try:
            doc = json.loads(text)
        except json.JSONDecodeError as exc:
            raise InputError(f"{path} line {exc.lineno}: not valid JSON ({exc.msg})") from exc
        except RecursionError as exc:
            raise InputError(f"{path}: not valid JSON (nested too deeply)") from exc
        return from_dict(doc, where=str(path), base_dir=path.parent, name=path.stem)

    def dump(self, instance: NeuralSCM, path: str | pathlib.Path, *,
             weights_file: str | None = None) -> None:
        """Write ``instance`` as JSON; with ``weights_file`` the weights go to that ``.npz``
        (next to the JSON) and the layers name its arrays."""
        path = pathlib.Path(path)
        if weights_file is None:
            doc = to_dict(instance)
        else:
            arrays: dict[str, np.ndarray] = {}
            doc = to_dict(instance, arrays=arrays)
            doc["weights_file"] = weights_file
            np.savez(path.parent / weights_file, **arrays)
        path.write_text(json.dumps(doc, indent=1), encoding="utf-8")
