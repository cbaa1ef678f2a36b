"""Pure elimination functions: moral graph, min-fill order, predicted cost."""

from __future__ import annotations


import networkx as nx
import pytest

from model_zoo import topologies
from model_zoo.elimination import elimination_cost, min_fill_order, moral_graph


def test_moral_graph_marries_co_parents():
    """Moralisation joins each child to its parents and the parents to each other
    (Koller & Friedman 2009, Def. 4.16)."""
    g = moral_graph({"B": (), "E": (), "A": ("B", "E"), "J": ("A",), "M": ("A",)})
    assert set(map(frozenset, g.edges)) == {frozenset(e) for e in
                                            [("A", "B"), ("A", "E"), ("B", "E"), ("A", "J"),
                                             ("A", "M")]}


@pytest.mark.parametrize("k", [2, 3, 4, 5])
def test_min_fill_width_on_a_grid_is_k(k):
    """A k x k lattice has treewidth k (Bodlaender 1998); min-fill finds width k on small grids
    (REFERENCES.md: networkx's heuristics are exact on small grids)."""
    _, width = min_fill_order(nx.grid_2d_graph(k, k))
    assert width == k


def test_min_fill_width_on_trees_and_cycles():
    """Any tree has treewidth 1; a cycle 2; K_n n-1 (Bodlaender 1998, REFERENCES.md)."""
    assert min_fill_order(moral_graph(topologies.parent_map(topologies.tree(40))))[1] == 1
    assert min_fill_order(nx.cycle_graph(9))[1] == 2
    assert min_fill_order(nx.complete_graph(6))[1] == 5


def test_min_fill_is_deterministic_and_respects_eliminate():
    """Same graph, same order; nodes outside ``eliminate`` are never eliminated."""
    g = moral_graph(topologies.parent_map(topologies.random(60, seed=2)))
    a = min_fill_order(g)
    b = min_fill_order(nx.Graph(sorted(g.edges, reverse=True)))
    assert a == b
    keep = {"X10", "X20"}
    order, _ = min_fill_order(g, eliminate=[v for v in g if v not in keep])
    assert set(order) == set(g) - keep


def _brute_cost(graph, order, cards):
    """Independent re-count: scopes of actual factors (the edges as 2-variable factors)."""
    factors = [frozenset(e) for e in graph.edges] + [frozenset([v]) for v in graph.nodes]
    total = largest = 0
    for z in order:
        mine = [f for f in factors if z in f]
        union = frozenset().union(*mine)
        size = 1
        for v in union:
            size *= cards[v]
        total += size
        largest = max(largest, size)
        factors = [f for f in factors if z not in f] + [union - {z}]
    rest = frozenset().union(*factors) if factors else frozenset()
    if rest:
        size = 1
        for v in rest:
            size *= cards[v]
        total += size
        largest = max(largest, size)
    return total, largest


@pytest.mark.parametrize("seed", range(5))
def test_elimination_cost_equals_a_factor_level_recount(seed):
    """The graph-based cost formula equals a re-count over explicit factor scopes."""
    g = moral_graph(topologies.parent_map(topologies.random(25, seed=seed)))
    cards = {v: 2 + (i % 3) for i, v in enumerate(sorted(g))}
    order, _ = min_fill_order(g, eliminate=[v for v in g if v != "X24"])
    assert elimination_cost(g, order, cards) == _brute_cost(g, order, cards)


def test_binary_chain_of_1000_costs_3998_entries():
    """Dechter 1999 / Koller & Friedman §9.4 (REFERENCES.md): a 1000-node binary chain queried at
    its last node multiplies 999 tables of 4 entries and a final one of 2: 3998 (bound 4000)."""
    g = moral_graph(topologies.parent_map(topologies.chain(1000)))
    order, width = min_fill_order(g, eliminate=[v for v in g if v != "X999"])
    assert width == 1
    assert elimination_cost(g, order, {v: 2 for v in g}) == (3998, 4)


def test_min_fill_beats_a_bad_order_on_a_star():
    """On a star, eliminating leaves first (min-fill) costs less than the hub first."""
    g = nx.star_graph(6)
    cards = {v: 2 for v in g}
    good, w = min_fill_order(g)
    assert w == 1
    hub_first = [0] + list(range(1, 7))
    assert elimination_cost(g, good, cards)[0] < elimination_cost(g, hub_first, cards)[0]


def _naive_min_fill(graph, eliminate):
    """Textbook greedy min-fill: re-score every candidate at every step (Koller & Friedman 2009,
    Alg. 9.4), ties by degree then name."""
    adj = {u: set(graph[u]) - {u} for u in graph}
    todo = set(eliminate)
    order, width = [], 0
    while todo:
        def key(u):
            nb = list(adj[u])
            miss = sum(1 for i, a in enumerate(nb) for b in nb[i + 1:] if b not in adj[a])
            return (miss, len(nb), u)
        z = min(todo, key=key)
        nbrs = adj.pop(z)
        width = max(width, len(nbrs))
        for a in nbrs:
            adj[a] |= nbrs
            adj[a] -= {a, z}
        todo.discard(z)
        order.append(z)
    return order, width


@pytest.mark.parametrize("topology,seed", [("random", 0), ("random", 1), ("layered", 2),
                                           ("grid", 0)])
def test_incremental_min_fill_equals_the_naive_greedy(topology, seed):
    """The delta-updated fill counts give exactly the order of the re-score-everything version."""
    g = moral_graph(topologies.parent_map(topologies.make_graph(topology, 49, seed=seed)))
    keep = {"X3"}
    elim = [v for v in g if v not in keep]
    assert min_fill_order(g, eliminate=elim) == _naive_min_fill(g, elim)
