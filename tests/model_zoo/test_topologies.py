"""The shared graph generators: sizes, acyclicity, in-degree bounds, determinism."""

from __future__ import annotations

import networkx as nx
import pytest

from model_zoo import topologies
from model_zoo.base import TOPOLOGIES
from model_zoo.errors import InputError


def _is_topologically_numbered(g: nx.DiGraph) -> bool:
    rank = {v: i for i, v in enumerate(g.nodes)}
    return all(rank[u] < rank[v] for u, v in g.edges)


@pytest.mark.parametrize("n", [1, 2, 7, 30])
def test_chain_has_n_nodes_and_n_minus_1_edges(n):
    """A chain of n nodes is a path: n - 1 edges, X(i-1) -> X(i)."""
    g = topologies.chain(n)
    assert g.number_of_nodes() == n and g.number_of_edges() == n - 1
    assert all(g.has_edge(f"X{i - 1}", f"X{i}") for i in range(1, n))


@pytest.mark.parametrize("n,b", [(1, 2), (10, 2), (40, 3)])
def test_tree_gives_every_node_but_the_root_one_parent(n, b):
    """A tree: one root, every other node exactly one parent, connected."""
    g = topologies.tree(n, branching=b)
    assert g.number_of_edges() == n - 1
    assert [v for v in g if g.in_degree(v) == 0] == ["X0"]
    assert max(dict(g.in_degree).values()) <= 1
    assert max(dict(g.out_degree).values(), default=0) <= b
    assert nx.is_weakly_connected(g)


@pytest.mark.parametrize("n,k", [(1, 1), (9, 3), (10, 3), (14, 4), (100, 10)])
def test_grid_is_k_by_k_with_2k_k_minus_1_edges(n, k):
    """grid(n) builds k x k nodes, k = round(sqrt(n)), with edges right and down: 2k(k-1)."""
    g = topologies.grid(n)
    assert g.number_of_nodes() == k * k == topologies.realizable_graph_size("grid", n)
    assert g.number_of_edges() == 2 * k * (k - 1)
    if k > 1:
        assert g.has_edge("X0", "X1") and g.has_edge("X0", f"X{k}")


@pytest.mark.parametrize("topology", TOPOLOGIES)
@pytest.mark.parametrize("n", [5, 26, 60])
def test_every_topology_is_a_dag_numbered_topologically(topology, n):
    """Every generator returns a DAG whose node insertion order is a topological order."""
    g = topologies.make_graph(topology, n, seed=4)
    assert nx.is_directed_acyclic_graph(g)
    assert _is_topologically_numbered(g)
    assert list(g.nodes) == [f"X{i}" for i in range(g.number_of_nodes())]
    assert g.number_of_nodes() == topologies.realizable_graph_size(topology, n)


@pytest.mark.parametrize("max_in_degree", [1, 2, 3, 5])
def test_random_dag_respects_in_degree_bound_and_is_connected(max_in_degree):
    """Random DAG: every node after X0 has 1..max_in_degree parents; hence connected."""
    g = topologies.random(80, max_in_degree=max_in_degree, seed=9)
    degrees = [g.in_degree(f"X{i}") for i in range(1, 80)]
    assert min(degrees) >= 1 and max(degrees) <= max_in_degree
    assert nx.is_weakly_connected(g)
    if max_in_degree >= 2:
        assert max(degrees) == max_in_degree  # 79 draws: the bound is reached


def test_layered_edges_only_join_consecutive_layers():
    """Layered DAG: edges go from layer i to layer i+1 only, 1..max_in_degree parents each."""
    width = 4
    g = topologies.layered(30, width=width, max_in_degree=2, seed=1)
    layer = {f"X{i}": i // width for i in range(30)}
    assert all(layer[v] == layer[u] + 1 for u, v in g.edges)
    assert all(1 <= g.in_degree(f"X{i}") <= 2 for i in range(width, 30))
    assert all(g.in_degree(f"X{i}") == 0 for i in range(width))


@pytest.mark.parametrize("topology", ["random", "layered"])
def test_same_seed_same_graph_other_seed_other_graph(topology):
    """Seeded: the same seed gives the same edges, another seed (almost surely) different ones."""
    a = topologies.make_graph(topology, 50, seed=3)
    b = topologies.make_graph(topology, 50, seed=3)
    c = topologies.make_graph(topology, 50, seed=4)
    assert list(a.edges) == list(b.edges)
    assert set(a.edges) != set(c.edges)


def test_parent_map_lists_parents_in_topological_order():
    """parent_map orders each node's parents by node index (the CPT axis order)."""
    g = topologies.grid(9)
    assert topologies.parent_map(g)["X4"] == ("X1", "X3")
    assert topologies.parent_map(g)["X0"] == ()


@pytest.mark.parametrize("bad", [0, -3, 2.5, "7", True])
def test_bad_sizes_and_names_raise_input_error(bad):
    """A size that is not a positive integer, or an unknown topology, is an InputError."""
    with pytest.raises(InputError):
        topologies.make_graph("chain", bad, seed=0)
    with pytest.raises(InputError, match="topology"):
        topologies.make_graph("ring", 5, seed=0)


def test_grid_rounds_to_the_nearest_square():
    """realizable_graph_size: grid rounds sqrt(n) to the nearest integer; others keep n."""
    assert [topologies.realizable_graph_size("grid", n) for n in (2, 3, 6, 7, 50)] == \
        [1, 4, 4, 9, 49]
    assert topologies.realizable_graph_size("random", 50) == 50
    assert topologies.realizable_graph_size("grid", 1000) == 32 ** 2  # sqrt(1000) = 31.6
