"""Structural properties of circuits, which query kinds they make tractable, and a brute-force
reference that shares no code with the layered engine.

References
----------
Choi, Y., Vergari, A. & Van den Broeck, G. (2020). Probabilistic circuits: a unifying framework
for tractable probabilistic models. Technical report, UCLA (smoothness, decomposability,
determinism and the queries each combination makes tractable).
Darwiche, A. (2003). A differential approach to inference in Bayesian networks. JACM 50(3).
"""

from __future__ import annotations

from dataclasses import dataclass

import math

import numpy as np

from model_zoo.base import make_rng
from model_zoo.circuit.core import LEAF, PRODUCT, SUM, Circuit, _run

__all__ = ["scopes", "is_smooth", "is_decomposable", "DeterminismResult", "determinism",
           "is_deterministic", "tractable_kinds", "joint_table", "brute_max_product",
           "EXHAUSTIVE_LIMIT"]

#: Complete assignments enumerated at most by the exact determinism test and the reference
#: (16 binary variables).
EXHAUSTIVE_LIMIT = 1 << 16



def _n_assignments(cards) -> int:
    """Number of complete assignments, exactly (a Python int: 2**2000 does not overflow)."""
    return math.prod(int(c) for c in cards) if len(cards) else 1

def scopes(circuit: Circuit) -> list[int]:
    """Scope of every node as a bitset (bit v set when variable v is below). O(n_edges) ints."""
    cached = circuit._cache.get("scopes")
    if cached is not None:
        return cached
    types = circuit.node_type.tolist()
    ptr = circuit.child_ptr.tolist()
    ch = circuit.child_idx.tolist()
    lv = circuit.leaf_var.tolist()
    out = [0] * len(types)
    for i, t in enumerate(types):
        if t == LEAF:
            out[i] = 1 << lv[i]
        else:
            acc = 0
            for c in ch[ptr[i]:ptr[i + 1]]:
                acc |= out[c]
            out[i] = acc
    circuit._cache["scopes"] = out
    return out


def _structure(circuit: Circuit) -> tuple[bool, bool]:
    cached = circuit._cache.get("structure")
    if cached is not None:
        return cached
    sc = scopes(circuit)
    types = circuit.node_type.tolist()
    ptr = circuit.child_ptr.tolist()
    ch = circuit.child_idx.tolist()
    smooth = decomposable = True
    for i, t in enumerate(types):
        if t == LEAF:
            continue
        kids = ch[ptr[i]:ptr[i + 1]]
        if t == SUM and smooth:
            first = sc[kids[0]]
            smooth = all(sc[c] == first for c in kids)
        elif t == PRODUCT and decomposable:
            acc = 0
            for c in kids:
                if acc & sc[c]:
                    decomposable = False
                    break
                acc |= sc[c]
        if not smooth and not decomposable:
            break
    circuit._cache["structure"] = (smooth, decomposable)
    return smooth, decomposable


def is_smooth(circuit: Circuit) -> bool:
    """Every sum's children have the same scope (exact; O(n_edges) bitset operations)."""
    return _structure(circuit)[0]


def is_decomposable(circuit: Circuit) -> bool:
    """Every product's children have pairwise disjoint scopes (exact; O(n_edges))."""
    return _structure(circuit)[1]


@dataclass(frozen=True)
class DeterminismResult:
    """Outcome of the determinism test.

    ``exact`` True: every complete assignment was checked, so the verdict is a fact.
    ``exact`` False: ``n_checked`` random complete assignments were checked; a violation found
    proves non-determinism, but "deterministic" only means none was found (one-sided).
    """

    is_deterministic: bool
    exact: bool
    n_checked: int


def _all_assignments(cards: tuple[int, ...]) -> np.ndarray:
    """``(n_variables, prod(cards))`` every complete assignment, first variable slowest."""
    grids = np.indices(cards).reshape(len(cards), -1) if cards else np.zeros((0, 1), np.int64)
    return grids.astype(np.int64)


def _violations(circuit: Circuit, states: np.ndarray) -> bool:
    """True when some sum has two or more nonzero (weight > 0) children for some column."""
    values = _run(circuit, states, "sum")
    row_of = circuit._plan.row_of  # type: ignore[attr-defined]
    sums = np.flatnonzero(circuit.node_type == SUM)
    if sums.size == 0:
        return False
    arity = np.diff(circuit.child_ptr)[sums]
    idx = np.concatenate([np.arange(circuit.child_ptr[s], circuit.child_ptr[s + 1]) for s in sums])
    alive = (values[row_of[circuit.child_idx[idx]]] > -np.inf) & (circuit.edge_weight[idx] > 0)[:, None]
    starts = np.concatenate([[0], np.cumsum(arity)[:-1]])
    counts = np.add.reduceat(alive.astype(np.int64), starts, axis=0)
    return bool((counts > 1).any())


def determinism(circuit: Circuit, *, n_samples: int = 512, seed: int = 0,
                limit: int = EXHAUSTIVE_LIMIT) -> DeterminismResult:
    """Test determinism: at most one child of each sum is nonzero on any complete assignment.

    Exhaustive (exact) when the number of complete assignments is at most ``limit``; otherwise
    ``n_samples`` uniformly random complete assignments (one-sided: it can prove a circuit
    non-deterministic, never deterministic).

    Notes
    -----
    O(n_edges x assignments), in chunks that keep memory near 10^7 values.
    """
    cached = circuit._cache.get("determinism")
    if cached is not None:
        return cached
    cards = circuit.cards
    total = _n_assignments(cards)
    chunk = max(1, int(1e7 // max(circuit.n_nodes + circuit.n_edges, 1)))
    if total <= limit:
        allx = _all_assignments(cards)
        found = any(_violations(circuit, allx[:, i:i + chunk]) for i in range(0, total, chunk))
        result = DeterminismResult(not found, True, total)
    else:
        rng = make_rng(seed, "determinism")
        x = np.stack([rng.integers(0, c, size=n_samples) for c in cards]).astype(np.int64)
        found = any(_violations(circuit, x[:, i:i + chunk]) for i in range(0, n_samples, chunk))
        result = DeterminismResult(not found, False, n_samples)
    circuit._cache["determinism"] = result
    return result


def is_deterministic(circuit: Circuit) -> bool:
    """:func:`determinism` with its defaults (exact up to 16 binary variables)."""
    return determinism(circuit).is_deterministic


def tractable_kinds(smooth: bool, decomposable: bool, deterministic: bool) -> list[str]:
    """Query kinds one bottom-up pass answers exactly, given the properties.

    Complete-evidence likelihood needs nothing; marginals and conditionals need smooth and
    decomposable; MPE by max-product also needs determinism (Choi, Vergari & Van den Broeck
    2020; without determinism MAP is NP-hard).
    """
    kinds = ["likelihood"]
    if smooth and decomposable:
        kinds += ["probability", "conditional"]
        if deterministic:
            kinds.append("mpe")
    return kinds


# -- brute force (independent of the layered engine) -----------------------------------------
def _node_values_plain(circuit: Circuit, states: np.ndarray, op: str) -> np.ndarray:
    """Root value in *plain probability space* by a memoised depth-first recursion over the
    node lists, vectorised over the columns of ``states``; no layers, no logs, no renumbering.
    Memory is released as soon as a node's last parent has used it."""
    types = circuit.node_type
    ptr, ch, w = circuit.child_ptr, circuit.child_idx, circuit.edge_weight
    n_parents = np.bincount(ch, minlength=circuit.n_nodes).tolist()
    cards = circuit.cards
    memo: dict[int, np.ndarray] = {}
    # iterative post-order traversal from the root (right-linear circuits are too deep to recurse)
    stack = [(circuit.root, False)]
    while stack:
        node, ready = stack.pop()
        if node in memo:
            continue
        kids = ch[ptr[node]:ptr[node + 1]].tolist()
        if not ready and types[node] != LEAF:
            stack.append((node, True))
            stack.extend((c, False) for c in kids if c not in memo)
            continue
        if types[node] == LEAF:
            v = int(circuit.leaf_var[node])
            p = circuit.leaf_probs[node][:cards[v]]
            x = states[v]
            free = p.max() if op == "max" else p.sum()
            val = np.where(x < 0, free, p[np.clip(x, 0, None)])
        elif types[node] == PRODUCT:
            val = np.ones(states.shape[1])
            for c in kids:
                val = val * memo[c]
        else:
            ws = w[ptr[node]:ptr[node + 1]]
            if op == "max":
                val = np.max(np.stack([wc * memo[c] for wc, c in zip(ws, kids)]), axis=0)
            else:
                val = np.zeros(states.shape[1])
                for wc, c in zip(ws, kids):
                    val = val + wc * memo[c]
        memo[node] = val
        for c in set(kids):
            n_parents[c] -= kids.count(c)
            if n_parents[c] <= 0 and c != circuit.root:
                memo.pop(c, None)
    return memo[circuit.root]


def joint_table(circuit: Circuit, *, limit: int = EXHAUSTIVE_LIMIT,
                max_elements: float = 2e8) -> np.ndarray | None:
    """The normalised joint distribution as an array of shape ``cards`` by enumerating every
    complete assignment through :func:`_node_values_plain`, or None beyond ``limit``
    assignments or ``max_elements`` (edges x assignments). Cached on the circuit.

    Notes
    -----
    O(n_edges x prod(cards)).
    """
    if "joint" in circuit._cache:
        return circuit._cache["joint"]
    cards = circuit.cards
    total = _n_assignments(cards)
    if total > limit or (circuit.n_edges + circuit.n_nodes) * total > max_elements:
        return None
    values = _node_values_plain(circuit, _all_assignments(cards), "sum")
    joint = values / values.sum()
    joint = joint.reshape(cards)
    circuit._cache["joint"] = joint
    return joint


def brute_max_product(circuit: Circuit, evidence: dict[int, int]) -> float:
    """Max-product root value (normalised by the partition function computed by brute force)
    on the plain-space recursion: what max-product *should* report, checked independently."""
    states = np.full((circuit.n_variables, 2), -1, dtype=np.int64)
    for v, x in evidence.items():
        states[v, 0] = x
    mx = _node_values_plain(circuit, states[:, :1], "max")[0]
    z = _node_values_plain(circuit, states[:, 1:], "sum")[0]
    return float(mx / z)
