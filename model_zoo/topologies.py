"""Seeded graph generators shared by every family.

Each generator returns a :class:`networkx.DiGraph` whose nodes are the strings ``"X0"``,
``"X1"``, ... added in a topological order (every edge goes from a lower to a higher index), so
families can walk ``graph.nodes`` as a valid ancestral order. Random generators take ``seed`` and
draw from :func:`model_zoo.base.make_rng`; the same seed gives the same graph.

================  ===========================================  ===================================
topology          shape                                        treewidth of the moral graph
================  ===========================================  ===================================
``chain``         X0 -> X1 -> ... -> X(n-1)                    1
``tree``          node i has the single parent (i-1)//b         1
``grid``          k x k lattice, edges right and down           k = sqrt(n) (grows with n)
``random``        each node has 1..max_in_degree earlier        grows with n in general
                  parents, chosen uniformly
``layered``       layers of ``width`` nodes; edges only from    bounded by a function of width
                  layer i to layer i+1, 1..max_in_degree each
================  ===========================================  ===================================
"""

from __future__ import annotations

import math

import networkx as nx

from model_zoo.base import TOPOLOGIES, make_rng
from model_zoo.errors import InputError

__all__ = [
    "chain",
    "tree",
    "grid",
    "random",
    "layered",
    "make_graph",
    "realizable_graph_size",
    "parent_map",
    "node_name",
]


def node_name(i: int) -> str:
    """The name of the ``i``-th node: ``"X{i}"``."""
    return f"X{i}"


def _check_n(n: int, where: str) -> int:
    import numbers

    if isinstance(n, bool) or not isinstance(n, numbers.Integral) or n < 1:
        raise InputError.at(where, "n", "an integer >= 1", n)
    return int(n)


def _empty(n: int) -> nx.DiGraph:
    g = nx.DiGraph()
    g.add_nodes_from(node_name(i) for i in range(n))
    return g


def chain(n: int) -> nx.DiGraph:
    """A Markov chain ``X0 -> X1 -> ... -> X(n-1)``: n nodes, n-1 edges. O(n)."""
    n = _check_n(n, "chain")
    g = _empty(n)
    g.add_edges_from((node_name(i - 1), node_name(i)) for i in range(1, n))
    return g


def tree(n: int, branching: int = 2) -> nx.DiGraph:
    """A complete ``branching``-ary tree rooted at X0 (heap numbering): node i's one parent is
    ``(i - 1) // branching``. n nodes, n-1 edges. O(n)."""
    n = _check_n(n, "tree")
    if isinstance(branching, bool) or not isinstance(branching, int) or branching < 1:
        raise InputError.at("tree", "branching", "an integer >= 1", branching)
    g = _empty(n)
    g.add_edges_from((node_name((i - 1) // branching), node_name(i)) for i in range(1, n))
    return g


def grid(n: int) -> nx.DiGraph:
    """A k x k lattice with ``k = round(sqrt(n))`` (at least 1), edges pointing right and down.

    Node ``(r, c)`` is ``X{r*k + c}``; row-major numbering is a topological order. The graph has
    k*k nodes (see :func:`realizable_graph_size`) and 2k(k-1) edges. O(k^2).
    """
    n = _check_n(n, "grid")
    k = max(1, round(math.sqrt(n)))
    g = _empty(k * k)
    for r in range(k):
        for c in range(k):
            here = node_name(r * k + c)
            if c + 1 < k:
                g.add_edge(here, node_name(r * k + c + 1))
            if r + 1 < k:
                g.add_edge(here, node_name((r + 1) * k + c))
    return g


def random(n: int, *, max_in_degree: int = 3, seed: int) -> nx.DiGraph:
    """A random DAG with bounded in-degree.

    Nodes are numbered in a random topological order; every node after the first draws its
    number of parents uniformly from ``1..min(max_in_degree, i)`` and the parents uniformly
    without replacement from the earlier nodes, so the graph is connected (every node reaches X0
    through its parents) and no node has more than ``max_in_degree`` parents. O(n * max_in_degree).
    """
    n = _check_n(n, "random")
    if isinstance(max_in_degree, bool) or not isinstance(max_in_degree, int) or max_in_degree < 1:
        raise InputError.at("random", "max_in_degree", "an integer >= 1", max_in_degree)
    rng = make_rng(seed, "topology", "random", n, max_in_degree)
    g = _empty(n)
    for i in range(1, n):
        k = int(rng.integers(1, min(max_in_degree, i) + 1))
        for p in sorted(int(x) for x in rng.choice(i, size=k, replace=False)):
            g.add_edge(node_name(p), node_name(i))
    return g


def layered(n: int, *, width: int = 4, max_in_degree: int = 3, seed: int) -> nx.DiGraph:
    """Layers of ``width`` nodes (the last may be partial); edges only from layer i to layer
    i+1, each node of layer i+1 drawing 1..min(max_in_degree, |layer i|) parents uniformly from
    layer i. O(n * max_in_degree)."""
    n = _check_n(n, "layered")
    if isinstance(width, bool) or not isinstance(width, int) or width < 1:
        raise InputError.at("layered", "width", "an integer >= 1", width)
    if isinstance(max_in_degree, bool) or not isinstance(max_in_degree, int) or max_in_degree < 1:
        raise InputError.at("layered", "max_in_degree", "an integer >= 1", max_in_degree)
    rng = make_rng(seed, "topology", "layered", n, width, max_in_degree)
    g = _empty(n)
    for i in range(width, n):
        layer_start = (i // width - 1) * width
        prev = list(range(layer_start, layer_start + width))
        k = int(rng.integers(1, min(max_in_degree, len(prev)) + 1))
        for p in sorted(int(x) for x in rng.choice(prev, size=k, replace=False)):
            g.add_edge(node_name(p), node_name(i))
    return g


def realizable_graph_size(topology: str, n: int) -> int:
    """The number of nodes :func:`make_graph` really builds for a requested ``n``
    (``grid``: k*k with k = round(sqrt(n)); every other topology: n)."""
    if topology not in TOPOLOGIES:
        raise InputError.at("topology", None, "one of " + ", ".join(TOPOLOGIES), topology)
    n = _check_n(n, topology)
    if topology == "grid":
        k = max(1, round(math.sqrt(n)))
        return k * k
    return n


def make_graph(topology: str, n: int, *, seed: int, max_in_degree: int = 3) -> nx.DiGraph:
    """Dispatch to the generator named ``topology`` (one of ``model_zoo.base.TOPOLOGIES``).

    ``seed`` is ignored by the deterministic shapes (chain, tree, grid).

    Examples
    --------
    >>> g = make_graph("grid", 10, seed=0)
    >>> g.number_of_nodes(), g.number_of_edges()
    (9, 12)
    """
    if topology == "chain":
        return chain(n)
    if topology == "tree":
        return tree(n)
    if topology == "grid":
        return grid(n)
    if topology == "random":
        return random(n, max_in_degree=max_in_degree, seed=seed)
    if topology == "layered":
        return layered(n, max_in_degree=max_in_degree, seed=seed)
    raise InputError.at("topology", None, "one of " + ", ".join(TOPOLOGIES), topology)


def parent_map(graph: nx.DiGraph) -> dict[str, tuple[str, ...]]:
    """Parents of every node, in node-insertion (topological) order — the CPT axis order."""
    rank = {v: i for i, v in enumerate(graph.nodes)}
    return {v: tuple(sorted(graph.predecessors(v), key=rank.__getitem__)) for v in graph.nodes}
