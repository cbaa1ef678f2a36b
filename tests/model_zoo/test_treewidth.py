"""Treewidth bounds against known values (Bodlaender 1998, TCS 209:1-45) and brute force."""

from __future__ import annotations

import gzip
import importlib.resources
import itertools

import networkx as nx
import pytest

from model_zoo.treewidth import (
    EXACT_LIMIT,
    TreewidthBounds,
    degeneracy,
    minor_min_width,
    moral_graph,
    treewidth_bounds,
    treewidth_exact,
    treewidth_upper,
)


def _brute_force_treewidth(g: nx.Graph) -> int:
    """Least elimination width over every vertex order (treewidth = min over orders)."""
    base = {v: set(g.neighbors(v)) - {v} for v in g.nodes}
    best = max(g.number_of_nodes() - 1, 0)
    for order in itertools.permutations(base):
        adj = {v: set(ns) for v, ns in base.items()}
        width = 0
        for v in order:
            nbrs = adj.pop(v)
            width = max(width, len(nbrs))
            if width >= best:
                break
            for a in nbrs:
                adj[a].discard(v)
                adj[a] |= nbrs - {a}
        best = min(best, width)
    return best


@pytest.mark.parametrize("k", [2, 3, 4])
def test_small_grid_is_exact(k):
    """k x k grid has treewidth k (Bodlaender 1998); small ones come out exact."""
    b = treewidth_bounds(nx.grid_2d_graph(k, k))
    assert (b.lower, b.upper, b.is_exact) == (k, k, True)


@pytest.mark.parametrize("k", [5, 6, 8, 10])
def test_larger_grid_is_bracketed(k):
    """Bounds bracket the k x k grid's treewidth k (Bodlaender 1998)."""
    b = treewidth_bounds(nx.grid_2d_graph(k, k))
    assert b.lower <= k <= b.upper
    assert b.lower >= 2  # a grid has a cycle: the lower bound must see more than a forest


def test_eight_by_eight_grid_heuristics_are_only_bounds():
    """networkx's heuristics give 10 on the 8 x 8 grid whose treewidth is 8 (REFERENCES.md)."""
    g = nx.grid_2d_graph(8, 8)
    assert treewidth_upper(g) == 10
    b = treewidth_bounds(g)
    assert not b.is_exact and b.lower <= 8 < b.upper


@pytest.mark.parametrize("tree", [nx.balanced_tree(2, 5), nx.balanced_tree(3, 3),
                                  nx.path_graph(30), nx.star_graph(12),
                                  nx.random_labeled_tree(40, seed=3)])
def test_trees_have_treewidth_one(tree):
    """Any tree with an edge has treewidth 1 (Bodlaender 1998)."""
    assert treewidth_bounds(tree) == TreewidthBounds(1, 1, True, treewidth_bounds(tree).method)


@pytest.mark.parametrize("n", [3, 5, 12, 40])
def test_cycles_have_treewidth_two(n):
    """A cycle has treewidth 2 (Bodlaender 1998)."""
    b = treewidth_bounds(nx.cycle_graph(n))
    assert (b.lower, b.upper, b.is_exact) == (2, 2, True)


@pytest.mark.parametrize("n", [1, 2, 5, 9, 20])
def test_complete_graphs(n):
    """K_n has treewidth n - 1 (Bodlaender 1998)."""
    b = treewidth_bounds(nx.complete_graph(n))
    assert (b.lower, b.upper, b.is_exact) == (n - 1, n - 1, True)


def test_petersen_graph_has_treewidth_four():
    """The Petersen graph has treewidth 4 (Bodlaender 1998; REFERENCES.md)."""
    b = treewidth_bounds(nx.petersen_graph())
    assert (b.lower, b.upper, b.is_exact) == (4, 4, True)
    assert treewidth_exact(nx.petersen_graph()) == 4


def test_empty_and_edgeless_graphs_are_zero():
    """networkx returns -1 for the empty graph; the bounds say 0."""
    assert treewidth_bounds(nx.Graph()) == TreewidthBounds(0, 0, True, "exact: no edges")
    assert treewidth_bounds(nx.empty_graph(7)).upper == 0
    assert treewidth_upper(nx.Graph()) == 0


def test_disconnected_graph_takes_the_widest_component():
    """Treewidth of a disjoint union is the largest of its parts (common practice)."""
    g = nx.disjoint_union(nx.cycle_graph(6), nx.complete_graph(5))
    g = nx.disjoint_union(g, nx.path_graph(4))
    b = treewidth_bounds(g)
    assert (b.lower, b.upper, b.is_exact) == (4, 4, True)


@pytest.mark.parametrize("seed", range(25))
def test_exact_programme_matches_brute_force(seed):
    """The subset programme equals the least width over all elimination orders (7 nodes)."""
    g = nx.gnp_random_graph(7, 0.5, seed=seed)
    truth = _brute_force_treewidth(g)
    assert treewidth_exact(g) == truth
    assert treewidth_exact(g, upper=treewidth_upper(g)) == truth
    b = treewidth_bounds(g)
    assert b.is_exact and b.lower == truth
    assert max(minor_min_width(g), degeneracy(g)) <= truth <= treewidth_upper(g)


def test_exact_programme_closes_a_gap_the_heuristics_leave():
    """On a graph where lower < upper, the programme (n <= limit) settles the value."""
    found = None
    for seed in range(200):
        g = nx.gnp_random_graph(12, 0.35, seed=seed)
        lo = max(minor_min_width(g), degeneracy(g))
        if lo < treewidth_upper(g):
            found = g
            break
    assert found is not None, "no gap found among the seeded graphs"
    b = treewidth_bounds(found)
    assert b.is_exact and "dynamic programme" in b.method
    assert lo <= b.lower <= treewidth_upper(found)


def test_exact_limit_is_respected():
    """A 5 x 5 grid (25 nodes > limit) keeps its bounds; raising the limit is allowed."""
    g = nx.grid_2d_graph(5, 5)
    assert EXACT_LIMIT < 25
    b = treewidth_bounds(g)
    assert b.lower <= 5 <= b.upper
    assert treewidth_bounds(nx.grid_2d_graph(3, 3), exact_limit=0).lower == 3


def test_result_does_not_depend_on_node_insertion_order():
    """Nodes are sorted first, so a shuffled copy gives the same bounds."""
    g = nx.gnp_random_graph(40, 0.12, seed=5)
    nodes = list(g.nodes)
    import random

    random.Random(1).shuffle(nodes)
    h = nx.Graph()
    h.add_nodes_from(nodes)
    h.add_edges_from(reversed(list(g.edges)))
    assert treewidth_bounds(g) == treewidth_bounds(h)


def _bundled_parents(name: str) -> dict[str, tuple[str, ...]]:
    from pgmpy.readwrite import BIFReader

    path = importlib.resources.files("pgmpy") / "utils" / "example_models" / f"{name}.bif.gz"
    with gzip.open(path, "rt") as fh:
        model = BIFReader(string=fh.read()).get_model()
    return {v: tuple(model.get_parents(v)) for v in model.nodes}


@pytest.mark.parametrize("name,nodes,arcs,max_in,min_fill", [
    ("asia", 8, 8, 2, 2),
    ("child", 20, 25, 2, 3),
    ("alarm", 37, 46, 4, 4),
    pytest.param("insurance", 27, 52, 3, 7, marks=pytest.mark.slow),
])
def test_bundled_networks_moral_graph_bounds(name, nodes, arcs, max_in, min_fill):
    """Counts and moral-graph min-fill width of networks shipped in pgmpy (REFERENCES.md,
    recomputed from the files): min-fill is an upper bound, our lower bound stays below it."""
    parents = _bundled_parents(name)
    assert len(parents) == nodes
    assert sum(len(p) for p in parents.values()) == arcs
    assert max(len(p) for p in parents.values()) == max_in
    b = treewidth_bounds(moral_graph(parents))
    assert b.lower <= b.upper <= min_fill
    assert b.lower >= 1


@pytest.mark.slow
@pytest.mark.parametrize("name,min_fill", [("hailfinder", 4), ("win95pts", 8)])
def test_bundled_larger_networks_moral_graph_bounds(name, min_fill):
    """Larger shipped networks (REFERENCES.md): bounds bracket, upper at most min-fill's."""
    b = treewidth_bounds(moral_graph(_bundled_parents(name)))
    assert 1 <= b.lower <= b.upper <= min_fill


def test_moral_graph_marries_parents():
    """Moralisation joins co-parents (Lauritzen & Spiegelhalter 1988): v-structure -> triangle."""
    g = moral_graph({"A": (), "B": (), "C": ("A", "B")})
    assert sorted(map(sorted, g.edges)) == [["A", "B"], ["A", "C"], ["B", "C"]]
