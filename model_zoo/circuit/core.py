"""The circuit representation and its layered, log-space, batched bottom-up pass.

A :class:`Circuit` is a rooted DAG of three node kinds, stored in compressed sparse rows with
children before parents (node ids are a topological order):

* **leaf** — a categorical leaf on one variable with a vector ``p`` over its states. Under
  evidence ``X = x`` its value is ``p[x]``; when ``X`` is marginalised its value is ``sum(p)``
  (1 for a normalised leaf; the parameter ``theta`` for a weighted indicator ``theta * lambda_x``
  of an arithmetic circuit). A Bernoulli leaf is the two-state case.
* **product** — the product of its children.
* **sum** — a weighted sum of its children (weights >= 0).

The engine (:func:`forward`) evaluates every node for a whole batch of queries at once, in log
space so that thousands of variables do not underflow. At construction the nodes are grouped
into topological *layers* and, inside a layer, into *operations* that numpy runs as one call:

* products of equal arity: one gather of child rows and one sum of logs;
* sums with the *same set of children* form a block (the K sum units of a vtree node share their
  K x K products); blocks of equal shape (m sums x k children) are stacked, the children are
  shifted by their per-column maximum, exponentiated once per *child* (not per edge) and mixed by
  one batched matrix product ``W @ exp(G - max)`` — log-sum-exp at BLAS speed. Compiled
  arithmetic circuits have blocks of one sum each; those are a weighted sum per row.

Max-product (``mode="max"``) replaces each sum by ``max_c (log w_c + value_c)``.

Cost: one pass is O(n_edges x batch) arithmetic and O(n_nodes x batch) memory; the unit of work
the family reports is *edges evaluated x batch*.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Sequence

import numpy as np

from model_zoo.circuit import regions as _regions
from model_zoo.errors import InputError

__all__ = ["LEAF", "PRODUCT", "SUM", "Circuit", "CircuitBuilder", "forward", "log_values",
           "states_matrix", "mpe_assignment"]

LEAF, PRODUCT, SUM = 0, 1, 2
_TYPE_NAMES = {LEAF: "leaf", PRODUCT: "product", SUM: "sum"}

#: Upper bound on the elements of one intermediate array of a sum operation (about 32 MB of
#: float64): blocks are processed in chunks so that memory stays O(n_nodes x batch).
_CHUNK_ELEMENTS = 1 << 22


@dataclass(frozen=True)
class _ProductOp:
    start: int          # first output row (outputs are contiguous)
    n: int
    arity: int
    children: np.ndarray  # (n * arity,) plan rows, row-major by output


@dataclass(frozen=True)
class _SumOp:
    start: int          # first output row; outputs are (n_blocks, m) row-major
    n_blocks: int
    m: int
    k: int
    children: np.ndarray  # (n_blocks, k) plan rows
    weights: np.ndarray   # (n_blocks, m, k)
    log_weights: np.ndarray  # (n_blocks, m, k)


@dataclass(frozen=True)
class _Plan:
    order: np.ndarray       # plan row -> original node id
    row_of: np.ndarray      # original node id -> plan row
    n_leaves: int
    leaf_var: np.ndarray    # (n_leaves,) variable index of each leaf row
    leaf_logp: np.ndarray   # (n_leaves, max_states), -inf padding
    leaf_logsum: np.ndarray  # (n_leaves,) log sum p: value when the variable is marginalised
    leaf_logmax: np.ndarray  # (n_leaves,) log max p: value under max-product when not observed
    layers: tuple[tuple[Any, ...], ...]
    root_row: int
    max_op_edges: int


@dataclass(frozen=True, eq=False)
class Circuit:
    """A probabilistic (or arithmetic) circuit over discrete variables.

    Attributes
    ----------
    variables, states
        Variable names and, per variable, its state names (state ``i`` is index ``i``).
    node_type
        ``(n_nodes,)`` int8: 0 leaf, 1 product, 2 sum. Node ids are a topological order.
    child_ptr, child_idx
        CSR children: node ``i`` has children ``child_idx[child_ptr[i]:child_ptr[i+1]]``.
    edge_weight
        ``(n_edges,)`` weight of each edge; 1.0 on product edges.
    leaf_var
        ``(n_nodes,)`` variable index of each leaf, -1 elsewhere.
    leaf_probs
        ``(n_nodes, max_states)`` leaf vectors (zeros on other rows and past a variable's states).
    root
        Id of the root (the last node).
    normalised
        True when every sum's weights and every leaf's vector sum to one (a probabilistic
        circuit); False for arithmetic circuits such as compiled networks.
    name
        Where it came from, for messages.
    """

    variables: tuple[str, ...]
    states: tuple[tuple[str, ...], ...]
    node_type: np.ndarray
    child_ptr: np.ndarray
    child_idx: np.ndarray
    edge_weight: np.ndarray
    leaf_var: np.ndarray
    leaf_probs: np.ndarray
    root: int
    normalised: bool = True
    name: str = "circuit"
    meta: dict = field(default_factory=dict)
    _cache: dict = field(default_factory=dict, repr=False)

    def __post_init__(self) -> None:
        object.__setattr__(self, "_plan", _make_plan(self))
        # log of the partition function f(all marginalised): 0 for a normalised circuit up to
        # rounding; computed once so that marginals of arithmetic circuits are f(e) / Z.
        z = forward(self, np.full((len(self.variables), 1), -1, dtype=np.int64))
        object.__setattr__(self, "log_z", float(z[0]))

    # -- sizes ------------------------------------------------------------------------------
    @property
    def n_nodes(self) -> int:
        return int(self.node_type.shape[0])

    @property
    def n_edges(self) -> int:
        return int(self.child_idx.shape[0])

    @property
    def n_variables(self) -> int:
        return len(self.variables)

    @property
    def depth(self) -> int:
        """Number of layers above the leaves (0 for a single leaf)."""
        return len(self._plan.layers)

    @property
    def cards(self) -> tuple[int, ...]:
        return tuple(len(s) for s in self.states)

    def n_parameters(self) -> int:
        """Sum-edge weights plus leaf entries (the numbers a file stores)."""
        n_sum_edges = int(np.sum(np.diff(self.child_ptr)[self.node_type == SUM]))
        cards = np.asarray(self.cards)
        leaves = self.leaf_var[self.node_type == LEAF]
        return n_sum_edges + int(cards[leaves].sum())

    def children(self, node: int) -> np.ndarray:
        return self.child_idx[self.child_ptr[node]:self.child_ptr[node + 1]]

    def weights(self, node: int) -> np.ndarray:
        return self.edge_weight[self.child_ptr[node]:self.child_ptr[node + 1]]

    def var_index(self, name: str, *, where: str = "query") -> int:
        index = self._cache.get("_var_index")
        if index is None:
            index = {v: i for i, v in enumerate(self.variables)}
            self._cache["_var_index"] = index
        try:
            return index[name]
        except KeyError:
            raise InputError.at(where, "variable", f"a variable of circuit {self.name!r}",
                                name) from None

    @property
    def max_op_edges(self) -> int:
        return self._plan.max_op_edges


class CircuitBuilder:
    """Adds nodes in bulk (children must already exist), then :meth:`build` a :class:`Circuit`.

    Ids are handed out in creation order, which is therefore a topological order.
    """

    def __init__(self, variables: Sequence[str], states: Sequence[Sequence[str]]) -> None:
        self.variables = tuple(variables)
        self.states = tuple(tuple(s) for s in states)
        self.max_states = max((len(s) for s in self.states), default=1)
        self._types: list[np.ndarray] = []
        self._arity: list[np.ndarray] = []
        self._children: list[np.ndarray] = []
        self._weights: list[np.ndarray] = []
        self._leaf_var: list[np.ndarray] = []
        self._leaf_probs: list[np.ndarray] = []
        self.n_nodes = 0

    def _add(self, kind: int, n: int, arity: np.ndarray, children: np.ndarray,
             weights: np.ndarray, leaf_var: np.ndarray, leaf_probs: np.ndarray) -> np.ndarray:
        ids = np.arange(self.n_nodes, self.n_nodes + n, dtype=np.int64)
        if children.size and (children.min() < 0 or children.max() >= self.n_nodes):
            raise ValueError("children must be existing nodes")
        self._types.append(np.full(n, kind, dtype=np.int8))
        self._arity.append(arity.astype(np.int64))
        self._children.append(children.astype(np.int64).ravel())
        self._weights.append(weights.astype(np.float64).ravel())
        self._leaf_var.append(leaf_var.astype(np.int64))
        self._leaf_probs.append(leaf_probs)
        self.n_nodes += n
        return ids

    def leaves(self, var: np.ndarray | Sequence[int], probs: np.ndarray) -> np.ndarray:
        """One leaf per row of ``probs`` (shape ``(n, s)`` with ``s <= max_states``)."""
        var = np.asarray(var, dtype=np.int64).reshape(-1)
        probs = np.asarray(probs, dtype=np.float64)
        if probs.ndim != 2 or probs.shape[0] != var.shape[0]:
            raise ValueError("probs must have one row per leaf")
        padded = np.zeros((var.shape[0], self.max_states))
        padded[:, :probs.shape[1]] = probs
        n = var.shape[0]
        return self._add(LEAF, n, np.zeros(n), np.empty(0, np.int64), np.empty(0), var, padded)

    def products(self, children: np.ndarray) -> np.ndarray:
        """One product per row of ``children`` (shape ``(n, arity)``)."""
        children = np.asarray(children, dtype=np.int64)
        n, a = children.shape
        return self._add(PRODUCT, n, np.full(n, a), children, np.ones(n * a),
                         np.full(n, -1), np.zeros((n, self.max_states)))

    def sums(self, children: np.ndarray, weights: np.ndarray) -> np.ndarray:
        """One sum per row of ``children`` with the matching row of ``weights``."""
        children = np.asarray(children, dtype=np.int64)
        weights = np.broadcast_to(np.asarray(weights, dtype=np.float64), children.shape)
        n, a = children.shape
        return self._add(SUM, n, np.full(n, a), children, weights,
                         np.full(n, -1), np.zeros((n, self.max_states)))

    def ragged(self, kind: int, children: Sequence[Sequence[int]],
               weights: Sequence[Sequence[float]] | None = None) -> np.ndarray:
        """Sums or products with differing arity (used by the file loader)."""
        arity = np.array([len(c) for c in children], dtype=np.int64)
        flat = np.array([c for row in children for c in row], dtype=np.int64)
        if weights is None:
            w = np.ones(flat.shape[0])
        else:
            w = np.array([x for row in weights for x in row], dtype=np.float64)
        n = len(children)
        return self._add(kind, n, arity, flat, w, np.full(n, -1), np.zeros((n, self.max_states)))

    def build(self, root: int, *, normalised: bool, name: str, meta: dict | None = None
              ) -> Circuit:
        """The circuit of the nodes below ``root`` (nodes it does not reach are dropped)."""
        types = np.concatenate(self._types)
        arity = np.concatenate(self._arity)
        children = np.concatenate(self._children)
        weights = np.concatenate(self._weights)
        leaf_var = np.concatenate(self._leaf_var)
        leaf_probs = np.concatenate(self._leaf_probs, axis=0)
        ptr = np.zeros(types.shape[0] + 1, dtype=np.int64)
        np.cumsum(arity, out=ptr[1:])
        return _restrict(self.variables, self.states, types, ptr, children, weights, leaf_var,
                         leaf_probs, int(root), normalised=normalised, name=name, meta=meta or {})


def _restrict(variables, states, types, ptr, children, weights, leaf_var, leaf_probs, root, *,
              normalised, name, meta) -> Circuit:
    """Keep the nodes reachable from ``root``, renumbered in their (topological) id order."""
    n = types.shape[0]
    has_parent = np.bincount(children, minlength=n) > 0
    has_parent[root] = True
    if root == n - 1 and has_parent.all():
        # every node but the root has a parent and parents have larger ids: all reachable
        reach = np.ones(n, dtype=bool)
    else:
        reach = np.zeros(n, dtype=bool)
        reach[root] = True
        # ids are topological, so one sweep from the top marks everything below the root
        ptr_list = ptr.tolist()
        for i in range(root, -1, -1):
            if reach[i] and types[i] != LEAF:
                reach[children[ptr_list[i]:ptr_list[i + 1]]] = True
    if reach.all():
        keep_ptr, keep_children, keep_weights = ptr, children, weights
        new_root = root
        keep = slice(None)
    else:
        keep = np.flatnonzero(reach)
        new_id = np.full(n, -1, dtype=np.int64)
        new_id[keep] = np.arange(keep.shape[0])
        arity = np.diff(ptr)[keep]
        edge_keep = np.repeat(reach, np.diff(ptr))
        keep_children = new_id[children[edge_keep]]
        keep_weights = weights[edge_keep]
        keep_ptr = np.zeros(keep.shape[0] + 1, dtype=np.int64)
        np.cumsum(arity, out=keep_ptr[1:])
        new_root = int(new_id[root])
    lv = leaf_var[keep].copy()
    lv[types[keep] != LEAF] = -1
    return Circuit(variables=tuple(variables), states=tuple(states),
                   node_type=types[keep].astype(np.int8), child_ptr=keep_ptr,
                   child_idx=keep_children, edge_weight=keep_weights, leaf_var=lv,
                   leaf_probs=leaf_probs[keep], root=new_root, normalised=bool(normalised),
                   name=name, meta=dict(meta))


# -- the plan ---------------------------------------------------------------------------------
def _layers_of(types: np.ndarray, ptr: np.ndarray, children: np.ndarray) -> np.ndarray:
    """Layer of every node: 0 for leaves, 1 + the highest child layer otherwise.

    Ids are topological; the sweep takes maximal runs of consecutive ids whose children all lie
    before the run (a whole vtree level, one elimination step) and handles each run with one
    vectorised reduction, so the cost is O(n_edges) plus a small constant per run.
    """
    n = types.shape[0]
    layer = np.zeros(n, dtype=np.int64)
    arity = np.diff(ptr)
    has = arity > 0
    maxchild = np.full(n, -1, dtype=np.int64)
    if has.any():
        maxchild[has] = np.maximum.reduceat(children, ptr[:-1][has])
    s = 0
    while s < n:
        length = 64
        while True:
            seg = maxchild[s + 1:s + 1 + length]
            bad = np.flatnonzero(seg >= s)
            if bad.size:
                e = s + 1 + int(bad[0])
                break
            if s + 1 + length >= n:
                e = n
                break
            length *= 2
        lo, hi = ptr[s], ptr[e]
        if hi > lo:
            vals = layer[children[lo:hi]] + 1
            nz = has[s:e]
            starts = (ptr[s:e] - lo)[nz]
            sub = layer[s:e]
            sub[nz] = np.maximum.reduceat(vals, starts)
        s = e
    return layer


def _make_plan(c: Circuit) -> _Plan:
    types, ptr, children, weights = c.node_type, c.child_ptr, c.child_idx, c.edge_weight
    n = types.shape[0]
    layer = _layers_of(types, ptr, children)
    arity = np.diff(ptr)
    leaf_ids = np.flatnonzero(types == LEAF)
    order_parts = [leaf_ids]
    # first pass: decide the order of rows (leaves, then each layer's ops contiguous)
    ops_raw: list[list[tuple]] = []
    next_row = leaf_ids.shape[0]
    n_layers = int(layer.max()) if n else 0
    by_layer = np.argsort(layer, kind="stable")
    bounds = np.searchsorted(layer[by_layer], np.arange(n_layers + 2))
    for lv in range(1, n_layers + 1):
        nodes = by_layer[bounds[lv]:bounds[lv + 1]]
        layer_ops: list[tuple] = []
        prods = nodes[types[nodes] == PRODUCT]
        for a in np.unique(arity[prods]):
            group = prods[arity[prods] == a]
            idx = ptr[group][:, None] + np.arange(a)[None, :]
            layer_ops.append(("prod", next_row, group, int(a), children[idx]))
            order_parts.append(group)
            next_row += group.shape[0]
        sums = nodes[types[nodes] == SUM]
        for k in np.unique(arity[sums]):
            group = sums[arity[sums] == k]
            idx = ptr[group][:, None] + np.arange(k)[None, :]
            ch = children[idx]
            w = weights[idx]
            # canonical child order so that sums over the same child set line up
            perm = np.argsort(ch, axis=1, kind="stable")
            ch = np.take_along_axis(ch, perm, axis=1)
            w = np.take_along_axis(w, perm, axis=1)
            if (ch == ch[0]).all():
                # one shared child set (a vtree node's K units): skip the sort-based grouping
                uniq, block_of = ch[:1], np.zeros(ch.shape[0], dtype=np.int64)
            else:
                uniq, block_of = np.unique(ch, axis=0, return_inverse=True)
                block_of = block_of.reshape(-1)
            counts = np.bincount(block_of, minlength=uniq.shape[0])
            for m in np.unique(counts):
                blocks = np.flatnonzero(counts == m)
                # members of each selected block, grouped block by block
                if blocks.shape[0] == counts.shape[0]:
                    members = np.argsort(block_of, kind="stable")
                else:
                    members = np.flatnonzero(np.isin(block_of, blocks))
                    members = members[np.argsort(block_of[members], kind="stable")]
                out_nodes = group[members]
                wm = w[members].reshape(blocks.shape[0], int(m), int(k))
                layer_ops.append(("sum", next_row, out_nodes, int(m), int(k), uniq[blocks], wm))
                order_parts.append(out_nodes)
                next_row += out_nodes.shape[0]
        ops_raw.append(layer_ops)
    order = np.concatenate(order_parts) if order_parts else np.empty(0, np.int64)
    row_of = np.empty(n, dtype=np.int64)
    row_of[order] = np.arange(n)
    layers = []
    max_op_edges = 0
    with np.errstate(divide="ignore"):
        for layer_ops in ops_raw:
            ops = []
            for op in layer_ops:
                if op[0] == "prod":
                    _, start, group, a, ch = op
                    ops.append(_ProductOp(start=start, n=group.shape[0], arity=a,
                                          children=row_of[ch].reshape(-1)))
                    max_op_edges = max(max_op_edges, group.shape[0] * a)
                else:
                    _, start, out_nodes, m, k, ch, wm = op
                    ops.append(_SumOp(start=start, n_blocks=ch.shape[0], m=m, k=k,
                                      children=row_of[ch], weights=wm,
                                      log_weights=np.log(wm)))
                    max_op_edges = max(max_op_edges, ch.shape[0] * m * k)
            layers.append(tuple(ops))
    cards = np.array([len(s) for s in c.states] or [1])
    lp = c.leaf_probs[leaf_ids]
    lvar = c.leaf_var[leaf_ids]
    valid = np.arange(lp.shape[1])[None, :] < cards[lvar][:, None]
    with np.errstate(divide="ignore"):
        logp = np.where(valid, np.log(np.where(valid, lp, 1.0)), -np.inf)
        logsum = np.log(np.where(valid, lp, 0.0).sum(axis=1))
        logmax = np.log(np.where(valid, lp, 0.0).max(axis=1)) if lp.shape[1] else logsum
    return _Plan(order=order, row_of=row_of, n_leaves=leaf_ids.shape[0], leaf_var=lvar,
                 leaf_logp=logp, leaf_logsum=logsum, leaf_logmax=logmax,
                 layers=tuple(layers), root_row=int(row_of[c.root]),
                 max_op_edges=int(max_op_edges))


# -- evaluation -------------------------------------------------------------------------------
def _leaf_rows(plan: _Plan, states: np.ndarray, mode: str) -> np.ndarray:
    """``(n_leaves, batch)`` leaf log-values; ``states`` is ``(n_variables, batch)``, -1 = free."""
    x = states[plan.leaf_var]
    vals = np.take_along_axis(plan.leaf_logp, np.maximum(x, 0), axis=1)
    free = plan.leaf_logmax if mode == "max" else plan.leaf_logsum
    return np.where(x < 0, free[:, None], vals)


def _run(circuit: Circuit, states: np.ndarray, mode: str) -> np.ndarray:
    plan: _Plan = circuit._plan  # type: ignore[attr-defined]
    batch = states.shape[1]
    values = np.empty((circuit.n_nodes, batch))
    values[:plan.n_leaves] = _leaf_rows(plan, states, mode)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        for ops in plan.layers:
            for op in ops:
                if type(op) is _ProductOp:
                    out = values[op.start:op.start + op.n]
                    if op.arity == 2:
                        np.add(values[op.children[0::2]], values[op.children[1::2]], out=out)
                    elif op.arity == 1:
                        out[...] = values[op.children]
                    else:
                        g = values[op.children].reshape(op.n, op.arity, batch)
                        np.sum(g, axis=1, out=out)
                else:
                    _sum_op(values, op, batch, mode)
    return values


def _sum_op(values: np.ndarray, op: _SumOp, batch: int, mode: str) -> None:
    m, k = op.m, op.k
    per_block = (m * k if mode == "max" else max(k, m)) * batch
    step = max(1, _CHUNK_ELEMENTS // max(per_block, 1))
    if step >= op.n_blocks:
        # the common case: one chunk, no slicing of the plan arrays (keeps per-op overhead low
        # for circuits with many thin layers, e.g. right-linear vtrees)
        _sum_chunk(values, op.children, op.weights, op.log_weights,
                   values[op.start:op.start + op.n_blocks * m].reshape(op.n_blocks, m, batch),
                   m, mode)
        return
    for b0 in range(0, op.n_blocks, step):
        b1 = min(op.n_blocks, b0 + step)
        out = values[op.start + b0 * m:op.start + b1 * m].reshape(b1 - b0, m, batch)
        _sum_chunk(values, op.children[b0:b1], op.weights[b0:b1], op.log_weights[b0:b1], out,
                   m, mode)


def _sum_chunk(values, children, weights, log_weights, out, m: int, mode: str) -> None:
    g = values[children]                                    # (nb, k, batch): one row per child
    if mode == "max":
        np.max(g[:, None, :, :] + log_weights[:, :, :, None], axis=2, out=out)
        return
    if m == 1:
        # one sum per block: fold the weights in before the shift, so a zero-weight child
        # can never set the scale and underflow its siblings
        g += log_weights[:, 0, :, None]
        top = g.max(axis=1, keepdims=True)
        # all children zero (-inf): a finite floor keeps the result -inf instead of nan
        np.maximum(top, -1e300, out=top)
        g -= top
        np.exp(g, out=g)
        s = g.sum(axis=1, keepdims=True)
    else:
        top = g.max(axis=1, keepdims=True)                  # (nb, 1, batch)
        np.maximum(top, -1e300, out=top)
        g -= top
        np.exp(g, out=g)
        s = np.matmul(weights, g)                           # (nb, m, batch)
    np.log(s, out=s)
    np.add(s, top, out=out)


def _region_plan(circuit: Circuit):
    """The circuit's region plan (:mod:`model_zoo.circuit.regions`), built once; None when
    the circuit does not have the region structure."""
    cached = circuit._cache.get("_regions", False)
    if cached is False:
        cached = _regions.region_plan(circuit._plan, circuit.n_nodes)  # type: ignore[attr-defined]
        circuit._cache["_regions"] = cached
    return cached


def forward(circuit: Circuit, states: np.ndarray, *, mode: str = "sum",
            engine: str = "auto") -> np.ndarray:
    """Log-value of the root for every column of ``states``.

    Parameters
    ----------
    circuit
        The circuit.
    states
        ``(n_variables, batch)`` integer state indices; -1 marks a marginalised variable
        (maximised over under ``mode="max"``).
    mode
        ``"sum"`` (the network polynomial: likelihoods and marginals) or ``"max"``
        (max-product).
    engine
        ``"auto"`` (default): in sum mode, the region engine of
        :mod:`model_zoo.circuit.regions` when the circuit is made of region products (vtree
        circuits; thin batches and K = 1 circuits take its faster exact routes), else the
        layered pass; ``"layers"`` forces the layered pass (every node's
        value is computed; the reference the region engine is tested against).

    Returns
    -------
    numpy.ndarray
        ``(batch,)`` natural-log root values (unnormalised: subtract ``circuit.log_z``).

    Notes
    -----
    O(n_edges x batch) time, O(n_nodes x batch) memory. Zero values are ``-inf``, never nan.
    """
    states = np.asarray(states, dtype=np.int64)
    if states.ndim != 2 or states.shape[0] != circuit.n_variables:
        raise InputError.at("circuit evaluation", "states",
                            f"an array of shape ({circuit.n_variables}, batch)", states.shape)
    if engine not in ("auto", "layers"):
        raise InputError.at("circuit evaluation", "engine", "'auto' or 'layers'", engine)
    if mode == "sum" and engine == "auto":
        rplan = _region_plan(circuit)
        if rplan is not None:
            return _regions.root_log_values_from_states(
                rplan, circuit._plan, states)  # type: ignore[attr-defined]
    values = _run(circuit, states, mode)
    return values[circuit._plan.root_row].copy()  # type: ignore[attr-defined]


def log_values(circuit: Circuit, assignments: np.ndarray, *, mode: str = "sum") -> np.ndarray:
    """Normalised log-probabilities ``ln P(assignment)`` for each row of ``assignments``.

    ``assignments`` is ``(batch, n_variables)`` with -1 for marginalised variables. Under
    ``mode="max"`` the result is ``ln max_x P(x, e)`` by max-product.

    Examples
    --------
    >>> from model_zoo.circuit.vtree import vtree_circuit
    >>> c = vtree_circuit(3, 2, topology="balanced", seed=0)
    >>> float(np.exp(log_values(c, np.array([[-1, -1, -1]])))[0])  # doctest: +ELLIPSIS
    1.0...
    """
    a = np.asarray(assignments, dtype=np.int64)
    if a.ndim == 1:
        a = a[None, :]
    return forward(circuit, a.T, mode=mode) - circuit.log_z


def states_matrix(circuit: Circuit, assignments: Sequence[dict[int, int]]) -> np.ndarray:
    """``(n_variables, batch)`` state matrix from per-query {variable index: state} dicts."""
    states = np.full((circuit.n_variables, len(assignments)), -1, dtype=np.int64)
    for j, a in enumerate(assignments):
        for v, x in a.items():
            states[v, j] = x
    return states


def mpe_assignment(circuit: Circuit, evidence: dict[str, int] | None = None
                   ) -> tuple[dict[str, int], float]:
    """Max-product decoding: the assignment a top-down trace of the argmax children selects.

    Returns ``(assignment, log value)`` where the log value is the max-product root value
    (``ln max_x P(x, e)`` when the circuit is deterministic, a lower bound otherwise).

    Notes
    -----
    One max pass plus a trace, O(n_edges). On a non-deterministic circuit the state found is
    a heuristic answer and its circuit value may differ from the reported log value.
    """
    states = np.full((circuit.n_variables, 1), -1, dtype=np.int64)
    for name, x in (evidence or {}).items():
        states[circuit.var_index(name), 0] = int(x)
    values = _run(circuit, states, "max")[:, 0]
    plan: _Plan = circuit._plan  # type: ignore[attr-defined]
    row_of = plan.row_of
    chosen: dict[int, int] = {}
    stack = [circuit.root]
    seen: set[int] = set()
    with np.errstate(divide="ignore"):
        while stack:
            node = stack.pop()
            if node in seen:
                continue
            seen.add(node)
            kind = circuit.node_type[node]
            ch = circuit.children(node)
            if kind == PRODUCT:
                stack.extend(ch.tolist())
            elif kind == SUM:
                score = np.log(circuit.weights(node)) + values[row_of[ch]]
                stack.append(int(ch[int(np.argmax(score))]))
            else:
                v = int(circuit.leaf_var[node])
                if v not in chosen:
                    if states[v, 0] >= 0:
                        chosen[v] = int(states[v, 0])
                    else:
                        chosen[v] = int(np.argmax(circuit.leaf_probs[node][:circuit.cards[v]]))
    for v in range(circuit.n_variables):
        if v not in chosen:
            chosen[v] = int(states[v, 0]) if states[v, 0] >= 0 else 0
    root_value = float(values[plan.root_row]) - circuit.log_z
    return {circuit.variables[v]: x for v, x in sorted(chosen.items())}, root_value
