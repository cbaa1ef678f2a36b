"""Scaled circuits over a random vtree: smooth and structured-decomposable by construction.

A *vtree* is a full binary tree whose leaves are the variables (Pipatsrisawat & Darwiche 2008).
The circuit gives every vtree leaf (variable) K categorical leaves and every internal vtree node
K sum units; each sum unit is a mixture over all K x K products ``left_i x right_j`` of its two
children's units. The root is one sum over the K units of the vtree root.

Sizes: with n variables and K components, n K leaves, (n - 1) K^2 products, (n - 1) K + 1 sums,
and ``n_edges = (n - 1) (K^3 + 2 K^2) + K`` (K^3 sum edges and 2 K^2 product edges per internal
vtree node). The pass is therefore linear in n and cubic in K; both are polynomial.

References
----------
Pipatsrisawat, K. & Darwiche, A. (2008). New compilation languages based on structured
decomposability. AAAI.
Peharz, R. et al. (2020). Einsum networks: fast and scalable learning of tractable
probabilistic circuits. ICML (the K x K region-product layout and its dense evaluation).
"""

from __future__ import annotations

from typing import Union

import numpy as np

from model_zoo.base import make_rng
from model_zoo.circuit.core import Circuit, CircuitBuilder
from model_zoo.errors import InputError

__all__ = ["VTREE_TOPOLOGIES", "make_vtree", "vtree_circuit", "vtree_edges"]

#: Vtree shapes, and the shared topology names accepted as aliases.
VTREE_TOPOLOGIES = ("balanced", "right_linear")
TOPOLOGY_ALIASES = {"balanced": "balanced", "right_linear": "right_linear",
                    "tree": "balanced", "chain": "right_linear"}

VTree = Union[int, tuple]


def canonical_topology(topology: str, *, where: str = "family 'circuit'") -> str:
    """``balanced`` / ``right_linear`` from a vtree name or its shared alias (tree, chain)."""
    try:
        return TOPOLOGY_ALIASES[topology]
    except (KeyError, TypeError):
        raise InputError.at(where, "topology",
                            "balanced, right_linear (or the aliases tree, chain)",
                            topology) from None


def make_vtree(n_variables: int, topology: str, *, seed: int) -> VTree:
    """A vtree over variables ``0 .. n-1`` in a random (seeded) left-to-right order.

    ``balanced`` splits the order in halves recursively (depth ~log2 n); ``right_linear`` hangs
    one variable off each internal node (depth n - 1).
    """
    shape = canonical_topology(topology)
    order = make_rng(seed, "vtree").permutation(n_variables).tolist()
    if shape == "right_linear":
        tree: VTree = order[-1]
        for v in reversed(order[:-1]):
            tree = (v, tree)
        return tree

    def split(items: list[int]) -> VTree:
        if len(items) == 1:
            return items[0]
        mid = len(items) // 2
        return (split(items[:mid]), split(items[mid:]))

    return split(order)


def vtree_edges(n_variables: int, k: int) -> int:
    """Edges of :func:`vtree_circuit` (closed form, see the module notes)."""
    return (n_variables - 1) * (k ** 3 + 2 * k ** 2) + k


def vtree_circuit(n_variables: int, k: int, *, topology: str, seed: int, n_states: int = 2,
                  leaf_concentration: float = 1.0, weight_concentration: float = 1.0,
                  name: str | None = None) -> Circuit:
    """Build the K-component circuit over a random vtree.

    Parameters
    ----------
    n_variables
        Number of variables (leaves of the vtree), >= 1.
    k
        Components per scope: categorical leaves per variable and sum units per internal vtree
        node, >= 1.
    topology
        ``balanced`` or ``right_linear`` (aliases ``tree``, ``chain``).
    seed
        Seeds the variable order and every weight.
    n_states
        States per variable (2: Bernoulli leaves).
    leaf_concentration, weight_concentration
        Dirichlet concentrations of leaf distributions and sum weights (small values give
        near-zero probabilities).

    Returns
    -------
    Circuit
        Normalised, smooth and structured-decomposable; not deterministic.

    Notes
    -----
    O(n K^3) time and memory to build.

    Examples
    --------
    >>> c = vtree_circuit(4, 2, topology="balanced", seed=1)
    >>> c.n_edges == vtree_edges(4, 2)
    True
    """
    for field_name, value, low in (("n_variables", n_variables, 1), ("k", k, 1),
                                   ("n_states", n_states, 1)):
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < low:
            raise InputError.at("circuit", field_name, f"an integer >= {low}", value)
    for field_name, value in (("leaf_concentration", leaf_concentration),
                              ("weight_concentration", weight_concentration)):
        if not np.isfinite(value) or value <= 0:
            raise InputError.at("circuit", field_name, "a positive number", value)
    shape = canonical_topology(topology)
    tree = make_vtree(int(n_variables), shape, seed=seed)
    rng = make_rng(seed, "circuit-weights")
    variables = tuple(f"X{i}" for i in range(n_variables))
    states = tuple(tuple(str(s) for s in range(n_states)) for _ in range(n_variables))
    b = CircuitBuilder(variables, states)

    # leaves: K categorical distributions per variable
    leaf_var = np.repeat(np.arange(n_variables), k)
    probs = rng.dirichlet(np.full(n_states, leaf_concentration), size=n_variables * k)
    leaf_ids = b.leaves(leaf_var, probs).reshape(n_variables, k)

    # flatten the vtree; heights let a whole level be built in one bulk call
    internal: list[tuple[VTree, VTree]] = []
    height: dict[int, int] = {}
    units: dict[int, np.ndarray] = {}

    def visit(t: VTree) -> int:
        if isinstance(t, int):
            units[id(t) if False else -1 - t] = leaf_ids[t]
            return -1 - t
        left, right = visit(t[0]), visit(t[1])
        key = len(internal)
        internal.append((left, right))
        height[key] = 1 + max(height.get(left, 0), height.get(right, 0))
        return key

    import sys
    limit = sys.getrecursionlimit()
    sys.setrecursionlimit(max(limit, 4 * n_variables + 100))
    try:
        root_key = visit(tree)
    finally:
        sys.setrecursionlimit(limit)

    if internal:
        by_height: dict[int, list[int]] = {}
        for key, h in height.items():
            by_height.setdefault(h, []).append(key)
        for h in sorted(by_height):
            keys = by_height[h]
            left = np.stack([units[internal[j][0]] for j in keys])     # (J, K)
            right = np.stack([units[internal[j][1]] for j in keys])    # (J, K)
            pairs = np.stack([np.repeat(left, k, axis=1), np.tile(right, (1, k))], axis=2)
            prod_ids = b.products(pairs.reshape(-1, 2)).reshape(len(keys), k * k)
            children = np.repeat(prod_ids, k, axis=0)                  # (J K, K^2)
            weights = rng.dirichlet(np.full(k * k, weight_concentration), size=len(keys) * k)
            sum_ids = b.sums(children, weights).reshape(len(keys), k)
            for j, key in enumerate(keys):
                units[key] = sum_ids[j]
    top = units[root_key]
    root_w = rng.dirichlet(np.full(k, weight_concentration))
    root = b.sums(top[None, :], root_w[None, :])[0]
    label = name or f"circuit-{shape}-n{n_variables}-k{k}-s{seed}"
    return b.build(int(root), normalised=True, name=label,
                   meta={"vtree": tree, "k": int(k), "topology": shape})
