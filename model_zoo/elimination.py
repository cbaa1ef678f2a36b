"""Elimination orders and their cost: pure functions on undirected graphs.

Variable elimination multiplies, for each eliminated variable z, every factor that mentions z;
the product's scope is z together with z's neighbours in the current interaction graph, and
summing z out connects those neighbours (the *fill-in*). The cost of an order therefore follows
from the graph alone (:func:`elimination_cost`), and a good order is found greedily
(:func:`min_fill_order`).

References
----------
Dechter, R. (1999). Bucket elimination: a unifying framework for reasoning. AIJ 113:41-85.
Koller, D. & Friedman, N. (2009). *Probabilistic Graphical Models*, §9.4 (variable elimination,
induced width) and §9.4.3.2 (greedy orderings: min-fill, min-degree).
"""

from __future__ import annotations

import heapq
from collections import Counter
from typing import Iterable, Mapping, Sequence

import networkx as nx

__all__ = ["moral_graph", "min_fill_order", "elimination_cost", "adjacency"]


def moral_graph(parents: Mapping[str, Sequence[str]]) -> nx.Graph:
    """The moral graph of a DAG given as ``{child: parents}``: every child joined to its parents
    and every pair of co-parents joined ("married"). O(sum of in-degree^2).

    Examples
    --------
    >>> sorted(moral_graph({"A": (), "B": (), "C": ("A", "B")}).edges)
    [('A', 'B'), ('A', 'C'), ('B', 'C')]
    """
    g = nx.Graph()
    g.add_nodes_from(parents)
    for child, ps in parents.items():
        ps = tuple(ps)
        g.add_edges_from((p, child) for p in ps)
        g.add_edges_from((ps[i], ps[j]) for i in range(len(ps)) for j in range(i + 1, len(ps)))
    return g


def adjacency(graph: nx.Graph | Mapping[str, Iterable[str]]) -> dict[str, set[str]]:
    """A private, mutable ``{node: set(neighbours)}`` copy without self-loops."""
    if isinstance(graph, nx.Graph):
        return {u: {v for v in graph[u] if v != u} for u in graph.nodes}
    adj = {u: {v for v in nbrs if v != u} for u, nbrs in graph.items()}
    for u, nbrs in list(adj.items()):
        for v in nbrs:
            adj.setdefault(v, set()).add(u)
    return adj


def _fill(adj: dict[str, set[str]], u: str) -> int:
    """Edges missing among the neighbours of ``u``. O(deg(u)^2)."""
    nbrs = list(adj[u])
    missing = 0
    for i, a in enumerate(nbrs):
        na = adj[a]
        for b in nbrs[i + 1:]:
            if b not in na:
                missing += 1
    return missing


def min_fill_order(graph: nx.Graph | Mapping[str, Iterable[str]], *,
                   eliminate: Iterable[str] | None = None) -> tuple[list[str], int]:
    """A greedy min-fill elimination order and its induced width.

    At each step the node (among those still to eliminate) whose elimination adds the fewest
    fill-in edges is taken; ties go to the smaller current degree, then to the smaller name, so
    the result is deterministic.

    Parameters
    ----------
    graph
        Undirected graph (networkx, or ``{node: neighbours}``); not modified.
    eliminate
        The nodes to eliminate (default: all). The others stay in the graph, are never chosen and
        still count as neighbours (e.g. the query variable).

    Returns
    -------
    order, width
        The elimination order and its induced width: the largest number of neighbours a node
        has when it is eliminated (0 for an empty order). On the moral graph with
        ``eliminate=None`` the width is an upper bound on the treewidth.

    Notes
    -----
    Fill counts are updated by deltas (removing z, then adding each fill edge (a, b) changes
    only a, b and their common neighbours) and kept in a heap with lazy invalidation, so a step
    costs O(deg(z) * deg + fill(z) * deg + log n) set work instead of re-scoring the graph.

    References
    ----------
    Koller & Friedman (2009), *Probabilistic Graphical Models*, §9.4.3.2, Algorithm 9.4.

    Examples
    --------
    >>> from model_zoo.elimination import min_fill_order
    >>> min_fill_order({"A": ["B"], "B": ["C"], "C": []})
    (['A', 'B', 'C'], 1)
    """
    adj = adjacency(graph)
    todo = set(adj) if eliminate is None else set(eliminate)
    unknown = todo - set(adj)
    if unknown:
        raise ValueError(f"min_fill_order: nodes to eliminate are not in the graph: "
                         f"{sorted(map(str, unknown))[:5]}")
    # fill[u] is kept exact for every node still in the graph (also the kept ones, whose
    # neighbourhoods change too), updated by deltas as edges appear and z disappears.
    fill = {u: _fill(adj, u) for u in adj}
    score: dict[str, tuple[int, int]] = {}
    heap: list[tuple[int, int, str]] = []
    for u in todo:
        s = (fill[u], len(adj[u]))
        score[u] = s
        heap.append((s[0], s[1], u))
    heapq.heapify(heap)
    order: list[str] = []
    width = 0
    while heap:
        f, d, z = heapq.heappop(heap)
        if z not in todo or score[z] != (f, d):
            continue  # stale entry: z was re-scored or already eliminated
        todo.discard(z)
        nbrs = adj.pop(z)
        del fill[z]
        order.append(z)
        width = max(width, len(nbrs))
        for u in nbrs:
            au = adj[u]
            au.discard(z)
            # pairs (z, w) of u's neighbourhood that were missing disappear with z
            fill[u] -= len(au - nbrs)
        touched = set(nbrs)
        drop: Counter = Counter()
        nb = list(nbrs)
        for i, a in enumerate(nb):
            aa = adj[a]
            for b in nb[i + 1:]:
                if b in aa:
                    continue
                ab = adj[b]
                common = aa & ab
                drop.update(common)           # (a, b) no longer missing for common neighbours
                fill[a] += len(aa - ab)       # new missing pairs (b, x), x in N(a) \ N(b)
                fill[b] += len(ab - aa)
                aa.add(b)
                ab.add(a)
        for w, k in drop.items():
            fill[w] -= k
        touched.update(drop)
        for u in touched:
            if u in todo:
                s = (fill[u], len(adj[u]))
                if s != score[u]:
                    score[u] = s
                    heapq.heappush(heap, (s[0], s[1], u))
    return order, width


def elimination_cost(graph: nx.Graph | Mapping[str, Iterable[str]], order: Sequence[str],
                     cards: Mapping[str, int]) -> tuple[int, int]:
    """The work variable elimination does along ``order``, predicted from the graph alone.

    Eliminating z multiplies a table over z and its current neighbours
    (``cards[z] * prod(cards[neighbours])`` entries) and then connects the neighbours. The nodes
    left over after ``order`` (the query variables) are multiplied together at the end, one
    more table of ``prod(cards[left over])`` entries.

    Parameters
    ----------
    graph
        The interaction graph of the factors (the moral graph of the relevant subnetwork with the
        evidence variables removed); not modified.
    order
        Nodes to eliminate, in order.
    cards
        Number of states of every node.

    Returns
    -------
    total_entries, largest_entries
        Sum of the product-table sizes over all steps (the final product included), and the
        largest of them (peak table size; x 8 bytes for float64).

    Notes
    -----
    O(sum over steps of deg^2). With width w this is at most ``n * d**(w+1)`` entries
    (Dechter 1999; Koller & Friedman 2009, §9.4): for a binary chain of 1000 nodes queried at
    its last node it is 999 * 4 + 2 = 3998.
    """
    adj = adjacency(graph)
    total = 0
    largest = 0
    for z in order:
        nbrs = adj.pop(z)
        size = int(cards[z])
        for v in nbrs:
            size *= int(cards[v])
        total += size
        largest = max(largest, size)
        for a in nbrs:
            na = adj[a]
            na.discard(z)
            na |= nbrs      # connect the neighbours (set union runs in C)
            na.discard(a)
    if adj:
        size = 1
        for v in adj:
            size *= int(cards[v])
        total += size
        largest = max(largest, size)
    return total, largest
